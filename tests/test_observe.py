"""The GalSim stage: noise against the CCD equation, PSF width measured with photutils, photometry."""

from __future__ import annotations

import math

import numpy as np
import pytest
from astropy.stats import sigma_clipped_stats

from simlens.imaging.light import PointSource, Sersic
from simlens.lensing.mass import SIS
from simlens.imaging.observe import effective_psf_image, observe_scene, padding_for
from simlens.imaging.rays import ComponentImages, PixelGrid, render_scene
from simlens.imaging.render import observation_rays
from simlens.truth.conditions import BandConditions


def band(**changes) -> BandConditions:
    values = dict(name="r", pixel_scale=0.2, zero_point=26.8, sky_brightness=21.2, exposure_time=900.0,
                  gain=4.0, read_noise=7.0, psf_profile="moffat", psf_fwhm=0.8, psf_beta=3.0)
    values.update(changes)
    return BandConditions(**values)


def observe_profile(conditions, lens_light, source, size=64, seed=5, supersampling=4, lens_mass=None):
    grid = PixelGrid(size=size, pixel_scale=conditions.pixel_scale, supersampling=supersampling,
                     padding=padding_for(conditions.psf_fwhm, conditions.pixel_scale))
    # The production path: ray map and scene sampling as render_system chooses them.
    rays, sampling = observation_rays(lens_mass or SIS(einstein_radius=1e-8), grid)
    scene = render_scene(conditions.name, rays, lens_light, source, ComponentImages(rays, sampling))
    return observe_scene(scene, conditions, seed)


EMPTY = Sersic(flux=0.0, half_light_radius=0.5)


@pytest.mark.parametrize("changes", [dict(), dict(gain=1.5, read_noise=12.0), dict(sky_brightness=19.5, exposure_time=90.0)])
def test_empty_cutout_noise_follows_ccd_equation(changes):
    # CCD equation for a sky-dominated empty pixel: sigma [ADU] = sqrt(sky * gain + read_noise^2) / gain
    # with sky in ADU (Howell 2006, Handbook of CCD Astronomy, sect. 4.4).  Measured with
    # astropy.stats.sigma_clipped_stats on a 200x200 empty cutout; within 3 %.
    conditions = band(**changes)
    observed = observe_profile(conditions, None, EMPTY, size=200, supersampling=1)
    _, median, std = sigma_clipped_stats(observed.image, sigma=4.0)
    expected = math.sqrt(conditions.sky_level * conditions.gain + conditions.read_noise**2) / conditions.gain
    assert std == pytest.approx(expected, rel=0.03)
    assert abs(median) < 0.05 * expected  # sky-subtracted
    assert conditions.background_sigma == pytest.approx(expected)


@pytest.mark.parametrize("profile, fwhm", [("moffat", 0.8), ("moffat", 1.1), ("kolmogorov", 0.9)])
def test_psf_fwhm_measured_with_photutils(profile, fwhm):
    # A point source rendered through the pipeline (noiseless) has the recipe's PSF FWHM: measured with
    # photutils' RadialProfile Moffat fit, on 0.05 arcsec pixels so that the pixel response adds < 1 %
    # to the width; within 5 %.  The fit is a Moffat, so the Kolmogorov case is an approximation.
    from photutils.profiles import RadialProfile

    conditions = band(pixel_scale=0.05, psf_profile=profile, psf_fwhm=fwhm)
    star = PointSource(flux=1e5)
    observed = observe_profile(conditions, star, EMPTY, size=101, supersampling=3)
    image = observed.lens_light
    center = (50.0, 50.0)
    radii = np.arange(0, 40, 0.5)
    profile_ = RadialProfile(image, center, radii)
    measured = profile_.moffat_fwhm * conditions.pixel_scale
    assert measured == pytest.approx(fwhm, rel=0.05)


@pytest.mark.parametrize("profile, fwhm, beta", [("moffat", 0.6, 3.0), ("moffat", 1.0, 2.5), ("kolmogorov", 0.7, 3.0)])
def test_effective_psf_matches_galsim_convolved_with_the_pixel(profile, fwhm, beta):
    # Reference: galsim.Convolve(PSF, galsim.Pixel) drawn with tight GSParams (GalSim's own pixel
    # convolution); within 0.2 % of the peak, unit sum, centred on the central pixel.
    import galsim

    from simlens.imaging.observe import psf_profile

    conditions = band(psf_profile=profile, psf_fwhm=fwhm, psf_beta=beta)
    psf = effective_psf_image(conditions)
    tight = galsim.GSParams(folding_threshold=1e-4, maxk_threshold=1e-5)
    reference = galsim.Convolve(psf_profile(conditions), galsim.Pixel(0.2), gsparams=tight).drawImage(
        nx=25, ny=25, scale=0.2, method="no_pixel").array
    reference /= reference.sum()
    assert psf.sum() == pytest.approx(1.0)
    assert np.unravel_index(np.argmax(psf), psf.shape) == (12, 12)
    assert np.abs(psf - reference).max() < 2e-3 * reference.max()


def test_source_counts_follow_the_zero_point():
    # AB photometry: counts = 10^(-0.4 (m - MAGZERO)) with MAGZERO = ZP + 2.5 log10(t / gain) (common
    # practice).  A compact 20th-magnitude source in a large noiseless cutout keeps its counts through
    # the PSF stage to 1 % (the PSF stamp's truncated wings).
    conditions = band()
    counts = conditions.counts_from_magnitude(20.0)
    assert counts == pytest.approx(10 ** (-0.4 * (20.0 - 26.8)) * 900.0 / 4.0)
    assert conditions.magnitude_from_counts(counts) == pytest.approx(20.0)
    for star in (Sersic(flux=counts, half_light_radius=0.05, sersic_index=0.5), PointSource(flux=counts, center=(0.33, -0.21))):
        observed = observe_profile(conditions, star, EMPTY, size=80)
        assert observed.lens_light.sum() == pytest.approx(counts, rel=0.01)


def test_noise_is_seeded():
    conditions = band()
    a = observe_profile(conditions, None, EMPTY, size=32, seed=11)
    b = observe_profile(conditions, None, EMPTY, size=32, seed=11)
    c = observe_profile(conditions, None, EMPTY, size=32, seed=12)
    np.testing.assert_array_equal(a.image, b.image)
    assert not np.array_equal(a.image, c.image)


def test_arc_snr_matches_its_definition():
    # The matched-filter S/N of a template S in Gaussian noise: sqrt(sum S^2 / var) (common practice).
    conditions = band()
    source = Sersic(flux=conditions.counts_from_magnitude(22.0), half_light_radius=0.2, center=(0.3, 0.0))
    observed = observe_profile(conditions, None, source, size=48, lens_mass=SIS(einstein_radius=1.0))
    var = (conditions.sky_level * conditions.gain + observed.lensed_source * conditions.gain
           + conditions.read_noise**2) / conditions.gain**2
    assert observed.arc_snr == pytest.approx(math.sqrt(np.sum(observed.lensed_source**2 / var)))
    assert observed.arc_snr > 10


def test_circular_convolution_equals_linear_convolution_inside_the_cutout():
    # scipy.signal.fftconvolve (linear, zero-padded) is the reference; the circular FFT used by the
    # GalSim stage must agree on every pixel of the cutout, i.e. inside the padding, to single
    # precision (it runs in float32, as the images are written; wrap-around would show at ~1e-3).
    from scipy.signal import fftconvolve

    from simlens.imaging.observe import _FFTConvolver, psf_kernel

    conditions = band(psf_fwhm=0.9)
    grid = PixelGrid(size=24, pixel_scale=0.2, supersampling=3, padding=padding_for(0.9, 0.2))
    kernel = psf_kernel(conditions, grid.fine_scale)
    image = np.random.default_rng(2).uniform(size=(grid.fine_size, grid.fine_size))
    ours = _FFTConvolver(image.shape, kernel, exact_margin=grid.padding * grid.supersampling)(image)
    reference = fftconvolve(image, kernel, mode="same")
    m = grid.padding * grid.supersampling
    np.testing.assert_allclose(ours[m:-m, m:-m], reference[m:-m, m:-m], rtol=0, atol=2e-6 * reference.max())


@pytest.mark.parametrize("profile, size", [("moffat", 48), ("kolmogorov", 48), ("moffat", 160)])
def test_unlensed_scene_matches_galsim_drawing_it_directly(profile, size, monkeypatch):
    # Reference: GalSim renders Convolve(Sersic_lens + Sersic_source, PSF) with exact pixel response in
    # Fourier space.  simlens's route (supersampled scene, centre refinement, fine PSF kernel, FFT,
    # block sum) must agree: flux within 0.3 %, worst pixel within 0.5 % of the peak (the figures of
    # bench/bench_psf_stage.py are 0.06 % and 0.2 %).
    import galsim

    # (the compact source is convolved on the box holding its light, not the whole field)
    from simlens.imaging import observe

    boxes = []
    monkeypatch.setattr(observe, "_light_box", lambda *a, f=observe._light_box: boxes.append(f(*a)) or boxes[-1])
    conditions = band(psf_profile=profile, psf_fwhm=0.8)
    lens = Sersic(flux=2e5, half_light_radius=0.6, sersic_index=4.0, q=0.7, angle=40.0)
    source = Sersic(flux=2e4, half_light_radius=0.25, sersic_index=1.0, q=0.5, angle=-20.0, center=(0.8, -0.4))
    ours = observe_profile(conditions, lens, source, size=size)
    assert boxes[0] is not None
    ours_total = ours.lens_light + ours.lensed_source

    def gs(p):
        return galsim.Sersic(n=p.sersic_index, half_light_radius=p.half_light_radius, flux=p.flux).shear(
            q=p.q, beta=p.angle * galsim.degrees).shift(*p.center)

    from simlens.imaging.observe import psf_profile

    big = galsim.GSParams(maximum_fft_size=16384)
    reference = galsim.Convolve(gs(lens) + gs(source), psf_profile(conditions), gsparams=big).drawImage(
        nx=size, ny=size, scale=0.2).array
    assert ours_total.sum() == pytest.approx(reference.sum(), rel=3e-3)
    assert np.abs(ours_total - reference).max() < 5e-3 * reference.max()

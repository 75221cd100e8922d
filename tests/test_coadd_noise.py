"""Correlated coadd noise (simlens.imaging.coadd): dithered exposures resampled onto the image grid.

References: for bilinear interpolation at a shift u uniform in [0, 1), the 1-D weights (1 - u, u)
have E[(1-u)^2 + u^2] = 2/3 and E[u (1-u)] = 1/6, so a coadd of many such exposures has pixel
variance (2/3)^2 = 4/9 of the unresampled one and lag-(1, 0) covariance (2/3)(1/6) = 1/9 (the
expectation of separable kernels; common practice, derived here by hand).  The measured noise of
an empty cutout is estimated with GalSim's CorrelatedNoise (its variance) and numpy lag products;
the per-pixel variance of the unresampled noise is the CCD equation (Howell 2006, Handbook of CCD
Astronomy).
"""

from __future__ import annotations

import numpy as np
import pytest
import galsim
from astropy.io import fits

import simlens
from simlens.imaging.coadd import coadd_kernel, resampling_weights
from simlens.imaging.observe import add_noise, unresampled_variance
from simlens.truth.conditions import BandConditions


def band(**changes) -> BandConditions:
    values = dict(name="r", pixel_scale=0.2, zero_point=26.8, sky_brightness=21.2, exposure_time=900.0,
                  gain=4.0, read_noise=7.0, psf_profile="moffat", psf_fwhm=0.8, psf_beta=3.0,
                  exposures=6, resampling="lanczos3")
    values.update(changes)
    return BandConditions(**values)


@pytest.mark.parametrize("kind", ["bilinear", "lanczos3"])
@pytest.mark.parametrize("shift", [0.0, 0.3, 0.5, 0.85])
def test_resampling_weights_conserve_flux_and_interpolate(kind, shift):
    weights = resampling_weights(kind, shift)
    assert weights.sum() == pytest.approx(1.0, abs=1e-12)  # flux kept
    reach = len(weights) // 2
    taps = np.arange(1 - reach, reach + 1)
    # a straight line is interpolated exactly by bilinear weights, sum w_j (a + b j) = a + b shift;
    # by Lanczos-3 to about 0.02 pixel (its known departure from linearity; common practice)
    assert np.sum(weights * taps) == pytest.approx(shift, abs=0.025 if kind == "lanczos3" else 1e-12)
    if shift == 0.0:  # on the grid: the sample itself
        assert weights[taps == 0][0] == pytest.approx(1.0)


def test_bilinear_dithers_give_the_closed_form_correlation():
    kernel = coadd_kernel("bilinear", 20000, np.random.default_rng(3))
    assert kernel.variance_factor == pytest.approx(4 / 9, rel=0.01)
    assert kernel.covariance(0, 1) == pytest.approx(1 / 9, rel=0.02)
    assert kernel.covariance(1, 0) == pytest.approx(1 / 9, rel=0.02)
    assert kernel.covariance(1, 1) == pytest.approx(1 / 36, rel=0.03)
    assert kernel.covariance(0, 2) == 0.0  # beyond the kernel


@pytest.mark.parametrize("kind, exposures", [("bilinear", 3), ("lanczos3", 8)])
def test_empty_coadd_noise_has_the_kernels_correlation(kind, exposures):
    conditions = band(resampling=kind, exposures=exposures)
    size, seed = 400, 11
    noise, factor = add_noise(np.zeros((size, size)), conditions, seed)
    kernel = coadd_kernel(kind, exposures, np.random.default_rng(seed))  # the same dithers
    assert factor == pytest.approx(kernel.variance_factor)
    white = conditions.background_sigma**2  # CCD equation
    assert unresampled_variance(conditions, np.zeros(1))[0] == pytest.approx(white)
    # GalSim's estimate of the variance of the noise field
    measured = galsim.CorrelatedNoise(galsim.Image(noise, scale=1.0)).getVariance()
    assert measured == pytest.approx(white * factor, rel=0.03)
    assert factor < 0.9  # really reduced: the test would fail on white noise
    for dy, dx in [(0, 1), (1, 0), (1, 1), (0, 2), (2, 1)]:
        product = np.mean(noise[dy:, dx:] * noise[:size - dy, :size - dx])
        expected = white * kernel.covariance(dy, dx)
        # a lag product's standard error is about sqrt(3) / size of the variance (its samples are
        # correlated over a few pixels): 0.0043 here, so 0.02 is about 4.5 errors
        assert abs(product - expected) < 0.02 * white * factor, (dy, dx, product, expected)


def test_white_noise_is_unchanged_by_no_resampling():
    conditions = band(resampling="none", exposures=4)
    image, factor = add_noise(np.zeros((200, 200)), conditions, 5)
    assert factor == 1.0
    neighbours = np.mean(image[:, 1:] * image[:, :-1]) / np.var(image)
    assert abs(neighbours) < 0.02  # white


def test_coadd_runs_write_the_variance_plane_and_header(small_recipe_text, tmp_path):
    text = small_recipe_text.replace('[survey.bands.r]\n', '[survey.bands.r]\nexposures = 5\nresampling = "lanczos3"\n')
    assert "per_system_files = true" in text
    recipe = simlens.parse_recipe(text)
    simlens.run(recipe, tmp_path / "run")
    shard = next((tmp_path / "run" / "shards").glob("*.fits"))
    with fits.open(shard) as hdul:
        variance, images, truth = hdul["VARIANCE"].data, hdul["IMAGES"].data, hdul["TRUTH"].data
        lens, source = hdul["LENS"].data, hdul["SOURCE"].data
    g, r = 0, 1
    gain, read_noise = 4.0, 7.0
    white = {b: (truth[f"sky_level_{b}"] * gain + read_noise**2) / gain**2 for b in "gr"}  # the CCD equation
    # g is white: its empty-pixel variance is the CCD equation's; r is resampled, its variance lower
    assert np.allclose(truth["sky_variance_g"], white["g"], rtol=1e-5)
    factor = truth["sky_variance_r"] / white["r"]
    assert np.all(factor < 0.9)
    # the variance planes follow the signal: Poisson of sky + light, times the resampling factor
    signal = np.clip(lens + source, 0, None)
    for b, f in ((g, np.ones_like(factor)), (r, factor)):
        expected = (white["gr"[b]][:, None, None] + signal[:, b] / gain) * f[:, None, None]
        assert np.allclose(variance[:, b], expected, rtol=1e-4)
    assert np.all(np.isfinite(images))
    cutout = next((tmp_path / "run" / "cutouts").glob("*.fits"))
    with fits.open(cutout) as hdul:
        header = hdul["r"].header
        assert header["NEXPOSE"] == 5 and header["RESAMPLE"] == "lanczos3"
        assert header["VARFACT"] < 0.9
        assert header["SKYVAR"] == pytest.approx(header["VARFACT"] * (header["SKYLEVEL"] * 4.0 + 49.0) / 16.0)
        assert hdul["r_VAR"].header["BUNIT"] == "adu2"

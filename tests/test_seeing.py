"""Survey PSFs: one seeing for all bands scaled with wavelength ([survey.seeing],
simlens.truth.psf), and a drawn PSF ellipticity (psf.ellipticity).

References: Kolmogorov turbulence gives a seeing FWHM proportional to lambda^(-1/5) (common practice;
e.g. Roddier 1981); GalSim's Bandpass.effective_wavelength (the throughput-weighted mean wavelength)
for each filter; GalSim's Image.calculateFWHM and FindAdaptiveMom (adaptive moments) to measure the
PSF the renderer convolves with.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from simlens.errors import RecipeError
from simlens.recipe import parse_recipe
from simlens.truth.sampler import PopulationSampler

from .conftest import PHYSICAL_RECIPE

I_BAND = """
[survey.bands.i]
filter = "LSST_i"
zero_point = 26.6
sky_brightness = 20.4
exposure_time = 900.0
gain = 4.0
read_noise = 7.0
psf = { profile = "moffat", beta = 3.0 }
"""


def seeing_recipe(seeing: str = "fwhm = { uniform = [0.6, 1.1] }\nwavelength = 500.0\n", count: int = 40) -> str:
    text = PHYSICAL_RECIPE.replace("count = 6", f"count = {count}")
    text = text.replace(', fwhm = 0.9 }', ' }').replace(', fwhm = 0.8 }', ' }')
    assert "\n[cosmology]" in text
    text = text.replace("\n[cosmology]", I_BAND + "\n[cosmology]")
    return text + "\n[survey.seeing]\n" + seeing


def effective_wavelength(band: str) -> float:
    import galsim

    return galsim.Bandpass(f"LSST_{band}.dat", "nm").effective_wavelength


def test_every_band_follows_one_seeing_by_the_kolmogorov_law():
    import galsim

    from simlens.imaging.observe import psf_kernel

    recipe = parse_recipe(seeing_recipe())
    systems = PopulationSampler(recipe).draw_many(range(12))
    lam = {b: effective_wavelength(b) for b in "gri"}
    for system in systems:
        fwhm = {b.name: b.psf_fwhm for b in system.bands}
        # lambda^(-1/5) between the bands, exactly (no band scatter)
        for band in "gi":
            assert fwhm[band] / fwhm["r"] == pytest.approx((lam[band] / lam["r"]) ** -0.2, rel=1e-3)
        # and the PSF the renderer uses has that width: GalSim measures it on the kernel
        measured = {b.name: galsim.Image(psf_kernel(b, 0.01), scale=0.01).calculateFWHM() for b in system.bands}
        slope = np.polyfit(np.log([lam[b] for b in "gri"]), np.log([measured[b] for b in "gri"]), 1)[0]
        assert slope == pytest.approx(-0.2, abs=0.01)
    # the drawn seeing at 500 nm is the recipe's: g's FWHM scaled back lies in [0.6, 1.1]
    at_500 = np.array([s.band("g").psf_fwhm / (lam["g"] / 500.0) ** -0.2 for s in systems])
    assert at_500.min() >= 0.6 - 1e-9 and at_500.max() <= 1.1 + 1e-9 and at_500.std() > 0.05


def test_the_band_scatter_about_the_law():
    recipe = parse_recipe(seeing_recipe("fwhm = 0.8\nband_scatter = 0.05\n"), origin="seeing.toml")
    systems = PopulationSampler(recipe).draw_many(range(300))
    lam = {b: effective_wavelength(b) for b in "gr"}
    ratio = np.array([s.band("g").psf_fwhm / s.band("r").psf_fwhm for s in systems]) / (lam["g"] / lam["r"]) ** -0.2
    # (1 + 0.05 a) / (1 + 0.05 b) for independent standard normals a, b: scatter 0.05 sqrt(2) to first order
    assert np.std(ratio) == pytest.approx(0.05 * math.sqrt(2), rel=0.15)
    assert abs(np.mean(ratio) - 1.0) < 0.01


def test_seeing_and_band_fwhm_are_one_or_the_other():
    with pytest.raises(RecipeError, match="together with"):
        parse_recipe(seeing_recipe().replace(' beta = 3.0 }', ' beta = 3.0, fwhm = 0.8 }', 1))
    with pytest.raises(RecipeError, match=r"psf.fwhm: required"):
        parse_recipe(seeing_recipe().split("\n[survey.seeing]")[0])
    with pytest.raises(RecipeError, match="filter"):
        parse_recipe(seeing_recipe().replace('filter = "LSST_i"\n', ''))


def test_a_drawn_psf_ellipticity_is_the_shape_galsim_measures():
    import galsim

    from simlens.imaging.observe import effective_psf_image, psf_kernel

    text = PHYSICAL_RECIPE.replace("fwhm = 0.8 }", "fwhm = 0.8, ellipticity = 0.08, ellipticity_angle = 30.0 }")
    recipe = parse_recipe(text)
    system = PopulationSampler(recipe).draw(0)
    r, g = system.band("r"), system.band("g")
    # g (cos 2a, sin 2a) with |g| = 0.08 at 30 degrees; the g band is round
    assert (r.psf_g1, r.psf_g2) == pytest.approx((0.04, 0.08 * math.sin(math.radians(60.0))), abs=1e-12)
    assert (g.psf_g1, g.psf_g2) == (0.0, 0.0)
    # GalSim's adaptive moments of the PSF the renderer convolves with (finely sampled): that shear
    shape = galsim.Image(psf_kernel(r, 0.02), scale=0.02).FindAdaptiveMom().observed_shape
    assert (shape.g1, shape.g2) == pytest.approx((r.psf_g1, r.psf_g2), abs=1e-3)
    # and the written effective PSF (with the pixel, which dilutes it a little)
    written = galsim.Image(effective_psf_image(r), scale=0.2).FindAdaptiveMom().observed_shape
    assert written.g / 0.08 == pytest.approx(1.0, abs=0.1) and written.beta.deg == pytest.approx(30.0, abs=1.0)
    # the stamp reaches 5 FWHM along the major axis
    assert psf_kernel(r, 0.02).shape[0] > psf_kernel(dataclasses.replace(r, psf_g1=0.0, psf_g2=0.0), 0.02).shape[0]


def test_optics_convolve_galsims_optical_psf_with_the_atmosphere():
    import galsim

    from simlens.imaging.observe import psf_kernel

    def with_optics(fwhm: str, optics: str) -> str:
        return PHYSICAL_RECIPE.replace("fwhm = 0.8 }", f"fwhm = {fwhm}, optics = {{ {optics} }} }}")

    text = with_optics("0.01", "diameter = 2.4")
    r = PopulationSampler(parse_recipe(text)).draw(0).band("r")
    wavelength = effective_wavelength("r")  # the filter's mean wavelength by default
    assert r.psf_optics[:3] == pytest.approx((wavelength, 2.4, 0.0), rel=1e-3)
    # diffraction-limited: the FWHM of an Airy pattern, 1.029 lambda / D (Born & Wolf), within 3 %
    # (the 0.01" atmosphere adds in quadrature)
    measured = galsim.Image(psf_kernel(r, 0.004), scale=0.004).calculateFWHM()
    airy = 1.029 * wavelength * 1e-9 / 2.4 * 180 * 3600 / math.pi
    assert measured == pytest.approx(math.hypot(airy, 0.01), rel=0.03)
    # defocus widens it (common practice)
    blurred = PopulationSampler(parse_recipe(with_optics("0.01", "diameter = 2.4, defocus = 0.5"))).draw(0).band("r")
    assert galsim.Image(psf_kernel(blurred, 0.004), scale=0.004).calculateFWHM() > 1.2 * measured
    # a seeing-limited survey's PSF is barely changed by a 4 m aperture
    wide = PopulationSampler(parse_recipe(with_optics("0.8", "diameter = 4.0"))).draw(0).band("r")
    fwhm = galsim.Image(psf_kernel(wide, 0.02), scale=0.02).calculateFWHM()
    assert fwhm == pytest.approx(0.8, rel=0.03)
    with pytest.raises(RecipeError, match="optics.wavelength"):
        parse_recipe(text.replace('filter = "LSST_r"\n', ""))

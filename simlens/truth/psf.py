"""Each band's PSF settings as drawn for one system: one seeing for all bands scaled with
wavelength (the recipe's ``[survey.seeing]``), and the optics of ``psf.optics``.

Atmospheric seeing narrows towards the red: for Kolmogorov turbulence the FWHM scales as
``lambda^(-1/5)`` (common practice; e.g. Roddier 1981, Progress in Optics 19, 281).  With a
``[survey.seeing]`` table one FWHM is drawn per system at ``wavelength`` and each band's is

    FWHM_band = FWHM (lambda_band / wavelength)^exponent (1 + band_scatter N(0, 1)),

``lambda_band`` the throughput-weighted mean wavelength of the band's filter and N(0, 1) a
standard normal of the system's ``seeing`` stream, one per band in survey order (drawn only when
``band_scatter`` > 0).  Without the table each band draws its own ``psf.fwhm``.

A band's ``psf.optics`` (fixed per survey) becomes the tuple ``BandConditions.psf_optics``: the
wavelength (given, or the filter's mean), the diameter, the obscuration and the Zernike
coefficients, which :func:`simlens.imaging.observe.psf_profile` turns into GalSim's OpticalPSF.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from ..cosmology import ARCSEC_PER_RADIAN
from ..populations.photometry import load_filter
from ..recipe import Recipe
from .conditions import BandConditions

__all__ = ["seeing_factors", "band_fwhm", "band_optics", "psf_shear", "psf_fwhm_range", "major_axis_fwhm",
           "padding_for", "FWHM_LIMITS", "SCATTER_REACH", "PSF_RADIUS_IN_FWHM"]

# The PSF stamp reaches this many major-axis FWHM (simlens.imaging.observe), and so does the
# padding of the cutouts and the margin in which neighbours are drawn.
PSF_RADIUS_IN_FWHM = 5.0


FWHM_LIMITS = (0.01, 10.0)  # arcsec: the range of psf.fwhm in the recipe schema
SCATTER_REACH = 4.0  # the scatter's reach (sigma) in the ranges given to resource estimates


def seeing_factors(recipe: Recipe) -> dict[str, float]:
    """``band -> (lambda_band / wavelength)^exponent`` of ``[survey.seeing]`` (empty without it)."""
    seeing = recipe.survey.seeing
    if seeing is None:
        return {}
    base = str(Path(recipe.origin).parent) if recipe.origin != "<recipe>" else "."
    return {b.name: (load_filter(b.filter, base).mean_wavelength / seeing.wavelength) ** seeing.exponent
            for b in recipe.survey.bands}


def band_fwhm(recipe: Recipe, factors: dict, seeing_fwhm: float, rng) -> dict[str, float]:
    """Each band's PSF FWHM (arcsec) from the drawn ``seeing_fwhm`` (see the module docstring)."""
    scatter = recipe.survey.seeing.band_scatter
    out = {}
    for band in recipe.survey.bands:
        wobble = 1.0 + scatter * float(rng.standard_normal()) if scatter > 0 else 1.0
        out[band.name] = float(np.clip(seeing_fwhm * factors[band.name] * wobble, *FWHM_LIMITS))
    return out


def psf_fwhm_range(recipe: Recipe, band: str) -> tuple[float, float]:
    """The range a band's PSF FWHM can take (arcsec): its ``psf.fwhm``'s support, or the seeing's
    scaled to the band, widened by SCATTER_REACH times the band scatter."""
    seeing = recipe.survey.seeing
    if seeing is None:
        low, high = recipe.survey.band(band).psf.fwhm.support
        return float(low), float(high)
    factor = seeing_factors(recipe)[band]
    low, high = (float(v) * factor for v in seeing.fwhm.support)
    spread = SCATTER_REACH * seeing.band_scatter
    return max(low * (1.0 - spread), FWHM_LIMITS[0]), min(high * (1.0 + spread), FWHM_LIMITS[1])


def band_optics(recipe: Recipe) -> dict[str, tuple]:
    """``band -> BandConditions.psf_optics`` (an empty tuple for a band without ``psf.optics``)."""
    base = str(Path(recipe.origin).parent) if recipe.origin != "<recipe>" else "."
    out = {}
    for band in recipe.survey.bands:
        optics = band.psf.optics
        if optics is None:
            out[band.name] = ()
            continue
        wavelength = optics.wavelength if optics.wavelength is not None else load_filter(band.filter, base).mean_wavelength
        out[band.name] = (float(wavelength), optics.diameter, optics.obscuration, optics.defocus, optics.astigmatism_1,
                          optics.astigmatism_2, optics.coma_1, optics.coma_2, optics.spherical)
    return out


def psf_shear(band, values: dict) -> dict:
    """``psf_g1, psf_g2`` of a band (``BandSettings``) whose PSF has an ellipticity |g| at an angle a,
    ``g (cos 2a, sin 2a)``, from the system's drawn parameter ``values`` (none: round)."""
    if band.psf.ellipticity is None:
        return {}
    prefix = f"survey.bands.{band.name}.psf."
    g = values[prefix + "ellipticity"]
    angle = math.radians(values[prefix + "ellipticity_angle"]) if band.psf.ellipticity_angle is not None else 0.0
    return {"psf_g1": g * math.cos(2.0 * angle), "psf_g2": g * math.sin(2.0 * angle)}


AIRY_FWHM = 1.029  # FWHM of an unobscured circular aperture's diffraction pattern, in lambda / D


def major_axis_fwhm(band: BandConditions) -> float:
    """The PSF's FWHM along its major axis (arcsec), what the PSF stamp and the padding reach from:
    ``psf_fwhm sqrt((1 + |g|) / (1 - |g|))`` for a PSF sheared by ``g`` (area-preserving), added in
    quadrature to the diffraction FWHM ``AIRY_FWHM lambda / D`` of any optics."""
    g = math.hypot(band.psf_g1, band.psf_g2)
    atmosphere = band.psf_fwhm * math.sqrt((1.0 + g) / (1.0 - g))
    if not band.psf_optics:
        return atmosphere
    wavelength, diameter = band.psf_optics[0], band.psf_optics[1]
    return math.hypot(atmosphere, AIRY_FWHM * wavelength * 1e-9 / diameter * ARCSEC_PER_RADIAN)


def padding_for(fwhm_max: float, pixel_scale: float) -> int:
    """Pixels of padding so that light within the PSF stamp's reach of the cutout is rendered."""
    return int(math.ceil(PSF_RADIUS_IN_FWHM * fwhm_max / pixel_scale))

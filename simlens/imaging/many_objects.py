"""Many unlensed objects drawn together: one image per band, convolved with the PSF once.

A field holds thousands of faint galaxies and stars, too many to draw one by one with GalSim;
here every object's light is instead sampled on shared planes, one per band, which are
convolved once with the band's PSF and summed to pixels, as a cutout's scene is
(:mod:`simlens.imaging.observe`).  A fine plane at the PSF stage's sampling
(:data:`~simlens.imaging.observe.CONVOLUTION_SAMPLING` per pixel side) holds the stars and the small
galaxies, and the cores of the large ones, whose outskirts go to a coarse plane sampled once per
pixel (:data:`LARGE_HALF_LIGHT_PIXELS`, :data:`CORE_HALF_WIDTH`).

- A galaxy (an elliptical Sersic) is sampled once for all bands, on a stamp reaching far enough
  that the light beyond is at most 0.5 % of it and fainter than 1e-3 of the noise per pixel, or
  0.1 % of it (:func:`stamp_radius`), with its centre re-integrated
  (:func:`~simlens.imaging.rays.refine_centre`); the stamp is scaled to unit sum (flux conserved)
  and each band adds it with its own flux.
- A star is deposited by cloud-in-cell weights (flux-conserving) and becomes the PSF.

The PSF kernel reaches 5 FWHM (the wings beyond, 0.1-0.2 % of the light, are dropped, as in the
cutouts), so an object bright enough that the kernel's edge would show in the noise belongs to the
caller's per-object route (:func:`drawn_together` says which).  Against GalSim drawing each object
alone, the flux agrees within 0.5 % and each pixel within 1 % of the peak (tests/test_field.py);
bench/bench_field.py compares whole fields both ways.
"""

from __future__ import annotations

import math

import galsim
import numpy as np
from scipy import special

from ..populations.background import BackgroundObjects
from ..truth.conditions import BandConditions
from .light import Sersic
from .observe import (CONVOLUTION_SAMPLING, PSF_RADIUS_IN_FWHM, _block_sum, _convolver, major_axis_fwhm, padding_for,
                      psf_profile)
from .rays import cloud_in_cell, refine_centre

__all__ = ["draw_objects", "draw_together", "draw_alone", "draw_beyond", "drawn_together", "light_reach",
           "stamp_radius", "EDGE_NOISE_FRACTION"]

# GalSim sizes a stamp so that about folding_threshold of the flux falls outside it (default 5e-3).
# A bright star would then end in a visible square edge, so the threshold is lowered until the lost
# flux is at most about one pixel's noise sigma (powers of ten, so GalSim's profile caches hold).
# GalSim refuses FFTs above 8192 by default; big bright galaxies may need more.
FOLDING_THRESHOLDS = tuple(galsim.GSParams(maximum_fft_size=16384, folding_threshold=t)
                           for t in (5e-3, 1e-3, 1e-4, 1e-5, 1e-6))


def gsparams_for(flux: float, noise_sigma: float) -> galsim.GSParams:
    """The largest folding threshold that loses no more than ``noise_sigma`` of ``flux``."""
    for gsparams in FOLDING_THRESHOLDS:
        if gsparams.folding_threshold * flux <= noise_sigma:
            return gsparams
    return FOLDING_THRESHOLDS[-1]

# A galaxy's stamp reaches the radius enclosing MAX_ENCLOSED_FLUX of its light, or less where the
# light beyond is fainter than WING_SURFACE_BRIGHTNESS of one pixel's noise sigma per pixel, but never
# less than the radius enclosing MIN_ENCLOSED_FLUX; the stamp is then scaled to unit sum (the
# light beyond the stamp, at most 1 %, is spread over it).
MIN_ENCLOSED_FLUX = 0.995
MAX_ENCLOSED_FLUX = 0.999
WING_SURFACE_BRIGHTNESS = 1e-3
# The PSF kernel ends at PSF_RADIUS_IN_FWHM FWHM; an object is drawn together when the PSF's light
# per pixel there, where the kernel cuts it, is at most EDGE_NOISE_FRACTION of one pixel's noise
# sigma (the light beyond, 0.13 % of the flux for a Moffat beta = 3 and 0.22 % for a Kolmogorov
# PSF, is dropped, as in the cutouts).
EDGE_NOISE_FRACTION = 0.05
# Galaxy centres are re-integrated over this many samples each way, at 16 sub-samples per pixel side
# (cheaper than the cutouts' refinement: these objects are faint and many).
CENTRE_HALF_WIDTH = 2
CENTRE_PER_PIXEL = 16
# Galaxies whose minor-axis half-light radius spans this many pixels are sampled once per pixel
# (their light varies slowly) beyond the CORE_HALF_WIDTH pixels around their centre, which stay at
# the PSF stage's sampling (a cusp sampled per pixel is off by 1 % of the peak after the PSF).
LARGE_HALF_LIGHT_PIXELS = 1.0
CORE_HALF_WIDTH = 3


def drawn_together(objects: BackgroundObjects, bands: tuple[BandConditions, ...]) -> np.ndarray:
    """Which objects may be drawn together: those whose PSF, where the kernel ends, stays below
    EDGE_NOISE_FRACTION of one pixel's noise sigma in every band (no visible edge)."""
    together = np.ones(len(objects), bool)
    for band in bands:
        per_pixel = _edge_per_pixel(band)  # of unit flux
        flux = band.counts_from_magnitude(np.asarray(objects.magnitudes[band.name], float))
        together &= per_pixel * flux <= EDGE_NOISE_FRACTION * band.background_sigma
    return together


def draw_alone(image: galsim.Image, objects: BackgroundObjects, band: BandConditions) -> None:
    """Add ``objects`` to ``image`` one by one with GalSim (each profile convolved with the band's PSF
    and the pixel; ADU; 0-based object positions): the route of the objects too bright to be drawn
    together."""
    psfs = {id(g): psf_profile(band).withGSParams(g) for g in FOLDING_THRESHOLDS}
    sigma = band.background_sigma
    for k in range(len(objects)):
        flux = band.counts_from_magnitude(float(objects.magnitudes[band.name][k]))
        gsparams = gsparams_for(flux, sigma)
        psf = psfs[id(gsparams)]
        if objects.kind[k] == "star":
            profile = psf.withFlux(flux)
        else:
            galaxy = galsim.Sersic(n=float(objects.sersic_index[k]), half_light_radius=float(objects.half_light_radius[k]),
                                   flux=flux, gsparams=gsparams)
            galaxy = galaxy.shear(q=float(objects.q[k]), beta=float(objects.angle[k]) * galsim.degrees)
            profile = galsim.Convolve(galaxy, psf, gsparams=gsparams)
        # GalSim pixels are 1-based: the 0-based pixel centre x sits at x + 1
        stamp = profile.drawImage(scale=band.pixel_scale, center=galsim.PositionD(objects.x[k] + 1.0, objects.y[k] + 1.0))
        overlap = stamp.bounds & image.bounds
        if overlap.isDefined():
            image[overlap] += stamp[overlap]


def draw_objects(objects: BackgroundObjects, bands: tuple[BandConditions, ...], size: int,
                 pixel_scale: float) -> list[np.ndarray]:
    """The noiseless images (ADU, ``size x size``, one per band) of ``objects``: the faint together
    (:func:`draw_together`), the bright one by one (:func:`draw_alone`)."""
    together = drawn_together(objects, bands)
    images = draw_together(objects.subset(together), bands, size, pixel_scale)
    alone = objects.subset(~together)
    if len(alone):
        for b, band in enumerate(bands):
            canvas = galsim.Image(images[b], scale=pixel_scale)
            draw_alone(canvas, alone, band)
            images[b] = canvas.array
    return images


def _edge_per_pixel(band: BandConditions) -> float:
    """The light per pixel of a unit-flux PSF where its kernel ends (PSF_RADIUS_IN_FWHM major-axis
    FWHM from the centre, along +x)."""
    edge = PSF_RADIUS_IN_FWHM * major_axis_fwhm(band)
    profile = psf_profile(band)
    if not band.psf_optics:
        return profile.xValue(galsim.PositionD(edge, 0.0)) * band.pixel_scale**2
    # GalSim evaluates a convolution with the optics only by drawing it: one pixel at the edge
    pixel = profile.shift(-edge, 0.0).drawImage(nx=1, ny=1, scale=band.pixel_scale, method="no_pixel")
    return float(pixel.array[0, 0])


def enclosed_radius(half_light_radius: float, sersic_index: float, fraction: float) -> float:
    """The radius enclosing ``fraction`` of a Sersic profile's light: ``R_e (x / b_n)^n`` with
    ``gamma(2n, x) / Gamma(2n) = fraction`` (the Sersic law's enclosed light, e.g. Graham & Driver
    2005, eq. 2)."""
    two_n = 2.0 * sersic_index
    x = special.gammaincinv(two_n, fraction)
    b = special.gammaincinv(two_n, 0.5)
    return half_light_radius * (x / b) ** sersic_index


def stamp_radius(profile: Sersic, faint: float) -> float:
    """The circularised radius (arcsec) of ``profile``'s stamp: where its surface brightness falls
    to ``faint`` (same units), kept between the radii enclosing MIN_ and MAX_ENCLOSED_FLUX."""
    r_e, n = profile.half_light_radius, profile.sersic_index
    ratio = profile.intensity_at_half_light_radius / faint
    # the Sersic law inverted: I(R) = I_e exp(-b_n [(R / R_e)^(1/n) - 1]) = faint
    faint_radius = r_e * (1.0 + math.log(ratio) / profile.b_n) ** n if ratio > 1.0 else 0.0
    inner, outer = (enclosed_radius(r_e, n, f) for f in (MIN_ENCLOSED_FLUX, MAX_ENCLOSED_FLUX))
    return min(outer, max(inner, faint_radius))


def draw_together(objects: BackgroundObjects, bands: tuple[BandConditions, ...], size: int,
                  pixel_scale: float) -> list[np.ndarray]:
    """The noiseless images (ADU, ``size x size`` pixels, one per band) of ``objects`` (0-based
    pixel positions), PSF and pixel response applied."""
    margin = padding_for(max(major_axis_fwhm(b) for b in bands), pixel_scale)
    fluxes = [band.counts_from_magnitude(np.asarray(objects.magnitudes[band.name], float)) for band in bands]
    brightest = np.max(fluxes, axis=0) if fluxes else np.zeros(0)
    galaxy = (objects.kind == "galaxy") & (brightest > 0)
    minor_axis = objects.half_light_radius * np.sqrt(objects.q)
    large = galaxy & (minor_axis >= LARGE_HALF_LIGHT_PIXELS * pixel_scale)
    fine = _Planes(len(bands), size, margin, pixel_scale, CONVOLUTION_SAMPLING)
    coarse = _Planes(len(bands), size, margin, pixel_scale, 1)
    for k in np.flatnonzero(galaxy):
        profile = Sersic(flux=float(brightest[k]), half_light_radius=float(objects.half_light_radius[k]),
                         sersic_index=float(objects.sersic_index[k]), q=float(objects.q[k]),
                         angle=float(objects.angle[k]))
        band_fluxes = [flux[k] for flux in fluxes]
        reach = light_reach(profile, bands, pixel_scale) * pixel_scale  # arcsec
        if not large[k]:
            stamp = fine.stamp(profile, objects.x[k], objects.y[k], reach)
            total = float(stamp[0].sum())
            if total > 0:
                fine.add(stamp, band_fluxes, 1.0 / total)
            else:  # far smaller than a sample (its light underflows the stamp): a point
                fine.add_points(objects.x[k:k + 1], objects.y[k:k + 1], [flux[k:k + 1] for flux in fluxes])
            continue
        _add_large(fine, coarse, profile, objects.x[k], objects.y[k], reach, band_fluxes)
    stars = objects.kind == "star"
    fine.add_points(objects.x[stars], objects.y[stars], [flux[stars] for flux in fluxes])
    return [fine.image(b, band) + coarse.image(b, band) for b, band in enumerate(bands)]


def _add_large(fine: "_Planes", coarse: "_Planes", profile: Sersic, x: float, y: float, reach: float, fluxes: list,
               core: bool = True) -> None:
    """Add a large galaxy at pixel ``(x, y)``: its core (the CORE_HALF_WIDTH pixels around its
    centre's pixel) on the ``fine`` plane (only if ``core``), the rest once per pixel on ``coarse``;
    both scaled so that the whole stamp has unit sum."""
    outer = coarse.stamp(profile, x, y, reach, hole=CORE_HALF_WIDTH)
    centre = coarse.nearest(x), coarse.nearest(y)
    s = fine.sampling // coarse.sampling
    inner = fine.stamp(profile, x, y, box=[(s * (c - CORE_HALF_WIDTH), s * (c + CORE_HALF_WIDTH + 1)) for c in centre])
    scale = 1.0 / (outer[0].sum() + inner[0].sum())
    coarse.add(outer, fluxes, scale)
    if core:
        fine.add(inner, fluxes, scale)


def draw_beyond(shape: Sersic, fluxes: list, bands: tuple[BandConditions, ...], size: int, pixel_scale: float,
                half_width: float) -> list[np.ndarray]:
    """One galaxy of ``shape`` with total ``fluxes`` (one per band) at the centre of ``size x size``
    images (one per band), drawn as :func:`draw_together` draws a large galaxy but only outside the
    central square of ``half_width`` pixels (left zero): a field lens's light beyond its stamp."""
    margin = padding_for(max(major_axis_fwhm(b) for b in bands), pixel_scale)
    fine = _Planes(len(bands), size, margin, pixel_scale, CONVOLUTION_SAMPLING)
    coarse = _Planes(len(bands), size, margin, pixel_scale, 1)
    centre = 0.5 * (size - 1)
    reach = light_reach(shape, bands, pixel_scale) * pixel_scale
    # the core's light, spread by the PSF, reaches CORE_HALF_WIDTH + margin + 1 pixels from the centre
    _add_large(fine, coarse, shape, centre, centre, reach, fluxes, core=CORE_HALF_WIDTH + margin + 1 > half_width)
    images = [fine.image(b, band) + coarse.image(b, band) for b, band in enumerate(bands)]
    lo, hi = int(math.ceil(centre - half_width)), int(math.floor(centre + half_width)) + 1
    for image in images:
        image[max(lo, 0):hi, max(lo, 0):hi] = 0.0
    return images


def light_reach(shape: Sersic, bands: tuple[BandConditions, ...], pixel_scale: float) -> float:
    """How far (pixels, along the major axis) a galaxy of ``shape`` (its flux the brightest band's)
    is drawn: :func:`stamp_radius` at the fields' faintest surface brightness."""
    faint = WING_SURFACE_BRIGHTNESS * min(b.background_sigma for b in bands) / pixel_scale**2
    return stamp_radius(shape, faint) / math.sqrt(shape.q) / pixel_scale


class _Planes:
    """One sample plane per band over the image and its margin, ``sampling`` samples per pixel side:
    sample j (either axis) is centred at pixel coordinate ``(j + 0.5) / sampling - margin - 0.5``."""

    def __init__(self, n_bands: int, size: int, margin: int, pixel_scale: float, sampling: int):
        self.size, self.margin, self.sampling = size, margin, sampling
        self.n = (size + 2 * margin) * sampling
        self.step = pixel_scale / sampling
        self.planes = [np.zeros((self.n, self.n), np.float32) for _ in range(n_bands)]
        self.empty = True

    def sample_index(self, pixel):
        return (np.asarray(pixel, float) + self.margin + 0.5) * self.sampling - 0.5

    def nearest(self, pixel: float) -> int:
        return int(round(float(self.sample_index(pixel))))

    def stamp(self, profile: Sersic, x: float, y: float, reach: float = 0.0, box=None, hole: int = 0) -> tuple:
        """``profile`` centred at pixel ``(x, y)``, times each sample's area: on the samples within
        ``reach`` arcsec of the nearest sample (or the index ranges ``box``, ``[(x0, x1), (y0, y1)]``),
        the ``hole`` samples around that nearest sample left out, the centre re-integrated.
        Returns ``(values, (x0, y0))``, the first sample indices (not clipped to the plane)."""
        step, centre = self.step, (float(self.sample_index(x)), float(self.sample_index(y)))
        if box is None:
            half = int(math.ceil(reach / step))
            box = [(int(round(c)) - half, int(round(c)) + half + 1) for c in centre]
        axes = tuple(((np.arange(*span) - c) * step).astype(np.float32) for span, c in zip(box, centre))
        values = profile.surface_brightness(*np.meshgrid(*axes)) * (step * step)  # as refine_centre writes
        if hole:
            (x0, _), (y0, _) = box
            cx, cy = (int(round(c)) for c in centre)
            values[max(cy - hole - y0, 0):cy + hole + 1 - y0, max(cx - hole - x0, 0):cx + hole + 1 - x0] = 0.0
        else:
            refine_centre(values, profile, axes, step, self.sampling, half_width=CENTRE_HALF_WIDTH,
                          per_pixel=CENTRE_PER_PIXEL)
        return values, (box[0][0], box[1][0])

    def add(self, stamp: tuple, fluxes: list, scale: float) -> None:
        """Add ``stamp`` (from :meth:`stamp`) times ``scale`` with each band's flux, clipped to the plane."""
        values, (x0, y0) = stamp
        ny, nx = values.shape
        c0, c1, r0, r1 = max(x0, 0), min(x0 + nx, self.n), max(y0, 0), min(y0 + ny, self.n)
        if c0 >= c1 or r0 >= r1:
            return
        part = values[r0 - y0:r1 - y0, c0 - x0:c1 - x0] * np.float32(scale)
        for plane, flux in zip(self.planes, fluxes):
            plane[r0:r1, c0:c1] += flux * part
        self.empty = False

    def add_points(self, x: np.ndarray, y: np.ndarray, fluxes: list) -> None:
        """Add point sources by cloud-in-cell weights (flux-conserving)."""
        if not np.size(x):
            return
        for plane, flux in zip(self.planes, fluxes):
            cloud_in_cell(plane, self.sample_index(x), self.sample_index(y), flux)
        self.empty = False

    def image(self, b: int, band: BandConditions) -> np.ndarray:
        """Band ``b``'s plane convolved with ``band``'s PSF and summed to pixels (ADU)."""
        s, size, margin = self.sampling, self.size, self.margin
        if self.empty:
            return np.zeros((size, size))
        # each sample stands for its cell's mean (the pixel response comes from the block sum)
        convolved = _convolver(band, self.step, self.n, margin * s)(self.planes[b])
        first, last = margin * s, (margin + size) * s
        return _block_sum(convolved[first:last, first:last], s).astype(float)

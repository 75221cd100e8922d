"""Sources from images: a user's catalogue of high-resolution galaxy stamps.

A stamp catalogue is a FITS file whose first table has one row per galaxy:

==============  =======  ==============================================================
column          unit     content
==============  =======  ==============================================================
``stamp``       --       the image (a 2-d array column), sky-subtracted, any units
``pixel_scale`` arcsec   its pixel scale
``magnitude``   mag      its AB magnitude (recorded in the truth)
``band``        --       the band of that magnitude (recorded)
``redshift``    --       optional; nan where unknown
==============  =======  ==============================================================

Instead of the ``stamp`` column the file may hold an image cube HDU named ``STAMPS`` of shape
(rows, ny, nx).  With ``format = "galsim_real"`` the file is instead GalSim's real-galaxy
catalogue (its galaxy and PSF images in files beside it), read by ``galsim.RealGalaxyCatalog``:
the stamps are its galaxy images, their magnitudes and bands its ``mag`` and ``band``.

The stamp gives the source's shape; its flux in every band, its redshift and its colours are the
recipe's (``[source]``), the stamp turned by ``source.angle``.  The stamp's own PSF stays in it
as a stated resolution limit (``psf_fwhm``, recorded in the truth), or with ``deconvolve_to``
it is removed, with the pixel, and the stamp re-convolved with a Gaussian of that FWHM (so that
what is left is band-limited): ``InterpolatedImage(stamp) * Deconvolve(PSF) * Gaussian`` drawn
without a pixel, the method of GalSim's ``RealGalaxy`` (Mandelbaum et al. 2012), whose own
deconvolution (by the catalogue's PSF images) the real-galaxy format uses.  Table stamps take a
Gaussian PSF of ``psf_fwhm``.  Deconvolution amplifies the stamps' noise at high frequencies;
choose ``deconvolve_to`` no smaller than the detail the survey resolves in the source plane.
The file is read once per process and never changed.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
from astropy.io import fits

from ..errors import SimlensError
from ..user_tables import number_column, read_user_table

__all__ = ["StampCatalogue", "load_stamps", "half_light_radius"]


def half_light_radius(image: np.ndarray, pixel_scale: float) -> float:
    """The circular radius (arcsec) about the stamp's centre holding half its light: the
    cumulative light of the pixels sorted by distance (circularised; common practice)."""
    ny, nx = image.shape
    y, x = np.indices(image.shape)
    r = np.hypot(x - 0.5 * (nx - 1), y - 0.5 * (ny - 1)).ravel()
    order = np.argsort(r)
    cumulative = np.cumsum(image.ravel()[order])
    return float(r[order][np.searchsorted(cumulative, 0.5 * cumulative[-1])] * pixel_scale)


@dataclass(frozen=True, eq=False)
class StampCatalogue:
    """The stamps of one catalogue file, with their pixel scales, magnitudes, bands and redshifts."""

    path: str
    stamps: tuple  # of read-only 2-d float arrays
    pixel_scale: np.ndarray
    magnitude: np.ndarray
    band: tuple
    redshift: np.ndarray
    half_light_radius: np.ndarray  # arcsec, measured

    def __len__(self) -> int:
        return len(self.stamps)

    def choose(self, rng, z_source: float, rule: str) -> int:
        """A stamp for a source at ``z_source``: uniform (``random``), or uniform among those of the
        nearest known redshift (``nearest_redshift``)."""
        if rule == "nearest_redshift":
            known = np.isfinite(self.redshift)
            if known.any():
                distance = np.where(known, np.abs(self.redshift - z_source), np.inf)
                candidates = np.flatnonzero(distance == distance.min())
                return int(candidates[rng.integers(candidates.size)])
        return int(rng.integers(len(self)))


@functools.lru_cache(maxsize=4)
def load_stamps(path: str, format: str = "table", psf_fwhm: float = 0.0,
                deconvolve_to: float | None = None) -> StampCatalogue:
    """Read and check a stamp catalogue (see the module docstring); one line names any problem."""
    if format == "galsim_real":
        return _real_galaxy_catalogue(path, deconvolve_to)
    table = read_user_table(path, "stamp catalogue", required=("pixel_scale", "magnitude", "band"))
    if "stamp" in table.colnames:
        cube = np.asarray(table["stamp"], dtype=float)
    else:
        try:
            with fits.open(path, memmap=False) as hdul:
                cube = np.asarray(hdul["STAMPS"].data, dtype=float) if "STAMPS" in hdul else None
        except (OSError, ValueError, TypeError):  # not FITS (a CSV or ECSV table)
            cube = None
        if cube is None:
            raise SimlensError(f"{path}: needs a 'stamp' column or an image HDU named STAMPS")
    if cube.ndim != 3 or cube.shape[0] != len(table):
        raise SimlensError(f"{path}: the stamps must be {len(table)} 2-d images (one per row); got shape {cube.shape}")
    if min(cube.shape[1:]) < 4:
        raise SimlensError(f"{path}: stamps of {cube.shape[1]} x {cube.shape[2]} pixels are too small (at least 4 x 4)")
    scale = number_column(path, table, "pixel_scale")
    magnitude = number_column(path, table, "magnitude")
    redshift = (number_column(path, table, "redshift", finite=False) if "redshift" in table.colnames
                else np.full(len(table), math.nan))
    stamps = []
    for row, image in enumerate(cube):
        if not (scale[row] > 0 and np.all(np.isfinite(image)) and image.sum() > 0):
            raise SimlensError(f"{path}: row {row + 1} needs pixel_scale > 0 and a finite stamp with positive light")
        image = np.array(image)
        if deconvolve_to is not None:
            import galsim

            psf = galsim.Convolve(galsim.Gaussian(fwhm=psf_fwhm), galsim.Pixel(float(scale[row])))
            image = _deconvolved(galsim.Convolve(galsim.InterpolatedImage(galsim.Image(image, scale=float(scale[row]))),
                                                 galsim.Deconvolve(psf)), image.shape, float(scale[row]), deconvolve_to)
        image.flags.writeable = False
        stamps.append(image)
    radii = np.array([half_light_radius(image, s) for image, s in zip(stamps, scale)])
    return StampCatalogue(path=str(path), stamps=tuple(stamps), pixel_scale=scale, magnitude=magnitude,
                          band=tuple(str(b).strip() for b in table["band"]), redshift=redshift, half_light_radius=radii)


def _deconvolved(galaxy, shape: tuple, scale: float, fwhm: float) -> np.ndarray:
    """The deconvolved ``galaxy`` (a GalSim profile) convolved with a Gaussian of ``fwhm`` and
    sampled at the stamp's pixel centres (no pixel response: a surface brightness)."""
    import galsim

    smooth = galsim.Convolve(galaxy, galsim.Gaussian(fwhm=fwhm))
    return np.array(smooth.drawImage(nx=shape[1], ny=shape[0], scale=scale, method="no_pixel").array, dtype=float)


def _real_galaxy_catalogue(path: str, deconvolve_to: float | None) -> StampCatalogue:
    """The stamps of GalSim's real-galaxy catalogue at ``path`` (its images in the same folder):
    the galaxy images as they are, or deconvolved by their PSF images (``galsim.RealGalaxy``)."""
    import os

    import galsim

    try:
        catalogue = galsim.RealGalaxyCatalog(path, dir=os.path.dirname(os.path.abspath(path)))
        stamps, scales = [], []
        for index in range(catalogue.nobjects):
            image = catalogue.getGalImage(index)
            scale = float(image.scale)
            pixels = np.array(image.array, dtype=float)
            if deconvolve_to is not None:
                pixels = _deconvolved(galsim.RealGalaxy(catalogue, index=index), pixels.shape, scale, deconvolve_to)
            pixels.flags.writeable = False
            stamps.append(pixels)
            scales.append(scale)
        magnitude = np.asarray(catalogue.cat.field("mag"), dtype=float)
        band = tuple(str(b).strip() for b in catalogue.cat.field("band"))
    except (OSError, KeyError, ValueError, TypeError, galsim.GalSimError) as exc:
        raise SimlensError(f"{path}: not a readable GalSim real-galaxy catalogue ({type(exc).__name__}: "
                           f"{str(exc)[:120]}); see galsim.RealGalaxyCatalog for its columns") from None
    if not stamps:
        raise SimlensError(f"{path}: the real-galaxy catalogue holds no galaxy")
    for row, image in enumerate(stamps):
        if not (np.all(np.isfinite(image)) and image.sum() > 0):
            raise SimlensError(f"{path}: galaxy {row} has no finite positive light")
    scale = np.array(scales)
    radii = np.array([half_light_radius(image, s) for image, s in zip(stamps, scale)])
    return StampCatalogue(path=str(path), stamps=tuple(stamps), pixel_scale=scale, magnitude=magnitude, band=band,
                          redshift=np.full(len(stamps), math.nan), half_light_radius=radii)

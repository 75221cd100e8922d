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
(rows, ny, nx).  The stamp gives the source's shape; its flux in every band, its redshift and its
colours are the recipe's (``[source]``), the stamp turned by ``source.angle``.  The stamp's own PSF
stays in it: a stated resolution limit (``psf_fwhm``, recorded in the truth), not deconvolved.
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
def load_stamps(path: str) -> StampCatalogue:
    """Read and check a stamp catalogue (see the module docstring); one line names any problem."""
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
        image.flags.writeable = False
        stamps.append(image)
    radii = np.array([half_light_radius(image, s) for image, s in zip(stamps, scale)])
    return StampCatalogue(path=str(path), stamps=tuple(stamps), pixel_scale=scale, magnitude=magnitude,
                          band=tuple(str(b).strip() for b in table["band"]), redshift=redshift, half_light_radius=radii)

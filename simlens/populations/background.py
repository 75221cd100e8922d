"""The unlensed sky of a field image: background galaxies and stars drawn from number counts.

Galaxies (``[field.galaxies]``):

* counts ``N(<m) = density 10^(slope (m - pivot))`` per arcmin^2 in the counts band (default: the
  i-band relation of the LSST Science Book 2009, eq. 3.7, 46 arcmin^-2 at i = 25, slope 0.31; from
  memory; fitted to faint counts, so the bright end is approximate), Poisson in number;
* redshifts from ``p(z | m)`` (LSST Science Book eq. 3.8, the source relation of
  :mod:`simlens.scaling_relations`);
* a share ``early_type_fraction`` of early types: de Vaucouleurs profiles (Sersic n = 4), the CWW
  elliptical template, sizes from the early-type size-luminosity relation of Shen et al. (2003,
  MNRAS 343, 978, eq. 14: ``log10 R_50/kpc = -0.4 a M + b``, a = 0.65, b = -5.06, ln-scatter 0.3;
  from memory); the rest exponential disks (n = 1) with the star-forming template and the late-type
  relation of Shen et al. (2003, eq. 18).  Axis ratios are uniform in [0.5, 1] (early) and [0.2, 1]
  (disks, seen at random inclinations) and angles uniform: common practice, illustrative;
* sizes are capped at ``max_half_light_radius``; galaxies whose centre falls within
  ``lens_clearance`` Einstein radii of a lens are not drawn (they would be lensed, and are not).

Stars (``[field.stars]``): counts of the same power-law form in the reference band (the defaults,
0.4 arcmin^-2 brighter than 21 and slope 0.12, are an illustrative high-Galactic-latitude value from
memory: set them for your field), black-body colours for temperatures uniform in a range.

All positions are uniform over the field (or a cutout and its margin: ``[neighbours]``), apart
from the clearances around the lenses.  :class:`BackgroundModel` returns plain arrays (one row an
object); :mod:`simlens.imaging.many_objects` draws them.
"""

from __future__ import annotations

import copy
import dataclasses
import math
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

import numpy as np

from ..cosmology import ARCSEC_PER_RADIAN
from ..cosmology import DistanceTable
from .photometry import Template, ab_magnitude_offset, kcorrection, load_filter
from ..recipe import Recipe
from .scaling_relations import NumberCounts, RedshiftGivenMagnitude, SizeLuminosity

__all__ = ["BackgroundObjects", "BackgroundModel", "EarlyTypeSizes"]

LATE_TYPE_SERSIC_INDEX = 1.0  # exponential disks (common practice)
EARLY_TYPE_SERSIC_INDEX = 4.0  # de Vaucouleurs (common practice)
STAR_TEMPERATURE_GRID = np.linspace(1000.0, 50000.0, 981)  # K, every 50 K; colours interpolated


@dataclass(frozen=True)
class EarlyTypeSizes:
    """``log10 R_50/kpc = -0.4 a M + b`` with log-normal scatter (Shen et al. 2003, eq. 14, early
    types; a = 0.65, b = -5.06 from memory; the ln-scatter 0.3 is illustrative)."""

    a: float = 0.65
    b: float = -5.06
    scatter_ln: float = 0.3

    def mean_log_radius(self, absolute_magnitude) -> np.ndarray:
        return -0.4 * self.a * np.asarray(absolute_magnitude, dtype=float) + self.b


@dataclass(frozen=True, eq=False)
class BackgroundObjects:
    """Galaxies and stars of one field or cutout, one array entry per object (positions in 0-based
    pixels of the image, angles in degrees CCW from +x; stars have nan shapes and redshifts)."""

    kind: np.ndarray  # "galaxy" or "star"
    x: np.ndarray
    y: np.ndarray
    magnitudes: dict  # band -> AB magnitudes
    redshift: np.ndarray
    half_light_radius: np.ndarray  # arcsec, circularised
    sersic_index: np.ndarray
    q: np.ndarray
    angle: np.ndarray
    temperature: np.ndarray  # K (stars)

    def __len__(self) -> int:
        return int(self.x.size)

    def __eq__(self, other) -> bool:
        if not isinstance(other, BackgroundObjects) or self.magnitudes.keys() != other.magnitudes.keys():
            return NotImplemented if not isinstance(other, BackgroundObjects) else False
        pairs = [(getattr(self, f.name), getattr(other, f.name)) for f in dataclasses.fields(self) if f.name != "magnitudes"]
        pairs += [(m, other.magnitudes[b]) for b, m in self.magnitudes.items()]
        return all(np.array_equal(a, b, equal_nan=a.dtype.kind == "f") for a, b in pairs)

    __hash__ = None

    def subset(self, keep: np.ndarray) -> "BackgroundObjects":
        """The objects where the boolean array ``keep`` is true."""
        arrays = {f.name: getattr(self, f.name)[keep] for f in dataclasses.fields(self) if f.name != "magnitudes"}
        return BackgroundObjects(magnitudes={b: np.asarray(m)[keep] for b, m in self.magnitudes.items()}, **arrays)

    def rows(self, owner_id: int, wcs, owner: str = "field_id") -> list[dict]:
        """One row per object for the objects table of a field (or, ``owner = "system_id"``, a
        cutout's neighbours table); sky positions through ``wcs``."""
        ra, dec = wcs.wcs_pix2world(self.x, self.y, 0) if len(self) else (np.empty(0), np.empty(0))
        rows = []
        for k in range(len(self)):
            row = {owner: int(owner_id), "object_id": k, "kind": str(self.kind[k]),
                   "x_pixel": float(self.x[k]), "y_pixel": float(self.y[k]),
                   "ra": float(ra[k]), "dec": float(dec[k])}
            row.update({f"mag_{b}": float(m[k]) for b, m in self.magnitudes.items()})
            row.update({"redshift": float(self.redshift[k]), "half_light_radius": float(self.half_light_radius[k]),
                        "sersic_index": float(self.sersic_index[k]), "q": float(self.q[k]),
                        "angle": float(self.angle[k]), "temperature": float(self.temperature[k])})
            rows.append(row)
        return rows


@lru_cache(maxsize=32)
def black_body_offsets(filter_name: str, base_folder: str) -> np.ndarray:
    """AB magnitude offsets of black bodies at STAR_TEMPERATURE_GRID through one filter (kept: every
    field of a run needs the same)."""
    filt = load_filter(filter_name, base_folder)
    offsets = np.array([ab_magnitude_offset(Template.black_body(t), filt) for t in STAR_TEMPERATURE_GRID])
    offsets.flags.writeable = False
    return offsets


class BackgroundModel:
    """Draws the :class:`BackgroundObjects` of a field from the recipe's ``[field]`` settings, or of a
    cutout from ``[neighbours]``: any ``settings`` with ``galaxies`` and ``stars`` tables, over an
    image of ``size`` pixels (default: the field's) widened by ``margin`` pixels on each side."""

    def __init__(self, recipe: Recipe, distances: DistanceTable, settings=None, size: int | None = None,
                 margin: int = 0):
        settings = settings if settings is not None else recipe.field
        self.galaxies, self.stars = settings.galaxies, settings.stars
        self.distances = distances
        self.pixel_scale = recipe.survey.pixel_scale
        self.size = settings.size if size is None else int(size)
        self.margin = int(margin)
        self.bands = recipe.survey.band_names
        self.reference = recipe.reference_band
        counts = recipe.source.counts
        self.counts_band = self.galaxies.band or (counts.band if counts is not None and counts.band else self.reference)
        base = str(Path(recipe.origin).parent) if recipe.origin != "<recipe>" else "."
        filters = {b.name: b.filter for b in recipe.survey.bands}
        rest = counts.rest_filter if counts is not None else "LSST_r"
        self.galaxy_counts = NumberCounts(self.galaxies.density, self.galaxies.pivot, self.galaxies.slope)
        self.redshifts = (RedshiftGivenMagnitude(counts.z0_slope, counts.z0_intercept) if counts is not None
                          else RedshiftGivenMagnitude())
        self.late_sizes, self.early_sizes = SizeLuminosity(), EarlyTypeSizes()
        self.star_counts = NumberCounts(self.stars.density, self.stars.pivot, self.stars.slope)
        self._k = {}
        if self.galaxies.density > 0:
            self._k = {kind: {b: kcorrection(template, f, rest, base) for b, f in filters.items()}
                       for kind, template in (("early", "elliptical"), ("late", "spiral"))}
        self._star_colours = {}
        if self.stars.density > 0:
            offsets = {b: black_body_offsets(f, base) for b, f in filters.items()}
            self._star_colours = {b: offsets[b] - offsets[self.reference] for b in self.bands}

    def with_margin(self, margin: int) -> "BackgroundModel":
        """The same model drawing over the image widened by ``margin`` pixels on each side."""
        model = copy.copy(self)
        model.margin = int(margin)
        return model

    @property
    def area_arcmin2(self) -> float:
        """The area objects are drawn over: the image and its margin."""
        return ((self.size + 2 * self.margin) * self.pixel_scale / 60.0) ** 2

    def expected_galaxies(self) -> float:
        return self.galaxy_counts.between(*self.galaxies.magnitude_range) * self.area_arcmin2 if self.galaxies.density > 0 else 0.0

    def expected_stars(self) -> float:
        return self.star_counts.between(*self.stars.magnitude_range) * self.area_arcmin2 if self.stars.density > 0 else 0.0

    def draw(self, rng, lenses: list[tuple[float, float, float]] = (), clearance: float = 0.0) -> BackgroundObjects:
        """Poisson numbers of galaxies and stars, then their properties; ``lenses`` holds
        ``(x_pixel, y_pixel, einstein_radius_arcsec)`` of the image's lenses.  No galaxy centre
        lies within ``galaxies.lens_clearance`` Einstein radii of a lens, and no object within
        ``clearance`` arcsec."""
        galaxies = self._draw_galaxies(rng, lenses, clearance)
        stars = self._draw_stars(rng, lenses, clearance)
        return BackgroundObjects(**{name: (np.concatenate([galaxies[name], stars[name]]) if name != "magnitudes" else
                                           {b: np.concatenate([galaxies[name][b], stars[name][b]]) for b in self.bands})
                                    for name in galaxies})

    def _positions(self, rng, n: int) -> tuple[np.ndarray, np.ndarray]:
        # uniform over the image and its margin: pixel centres run from 0 to size - 1, edges at -0.5, size - 0.5
        lo, hi = -0.5 - self.margin, self.size - 0.5 + self.margin
        return rng.uniform(lo, hi, size=n), rng.uniform(lo, hi, size=n)

    def _clear(self, x: np.ndarray, y: np.ndarray, lenses, reach_of) -> np.ndarray:
        """Which of the objects at ``(x, y)`` lie beyond ``reach_of(einstein_radius)`` arcsec of every lens."""
        keep = np.ones(x.size, dtype=bool)
        for lx, ly, theta_e in lenses:
            keep &= np.hypot(x - lx, y - ly) >= reach_of(theta_e) / self.pixel_scale
        return keep

    def _draw_galaxies(self, rng, lenses, clearance: float = 0.0) -> dict:
        g = self.galaxies
        n = int(rng.poisson(self.expected_galaxies()))
        x, y = self._positions(rng, n)
        m = self.galaxy_counts.draw(*g.magnitude_range, rng.uniform(size=n)) if n else np.empty(0)
        z = self.redshifts.draw(m, *g.redshift_range, rng.uniform(size=n)) if n else np.empty(0)
        early = rng.uniform(size=n) < g.early_type_fraction
        k_early = {b: k(z) for b, k in self._k.get("early", {}).items()} if n else {}
        k_late = {b: k(z) for b, k in self._k.get("late", {}).items()} if n else {}
        mags, absolute = {}, np.empty(n)
        if n:
            k_anchor = np.where(early, k_early[self.counts_band], k_late[self.counts_band])
            absolute = m - self.distances.distmod(z) - k_anchor
            for b in self.bands:
                mags[b] = m + np.where(early, k_early[b], k_late[b]) - k_anchor
        else:
            mags = {b: np.empty(0) for b in self.bands}
        log_r = np.where(early, self.early_sizes.mean_log_radius(absolute),
                         self.late_sizes.mean_log_radius(absolute, z)) if n else np.empty(0)
        scatter = np.where(early, self.early_sizes.scatter_ln, self.late_sizes.scatter_ln(absolute)) if n else np.empty(0)
        r_kpc = 10.0**log_r * np.exp(scatter * rng.standard_normal(size=n))
        r_arcsec = r_kpc / (self.distances.angular_diameter_distance(z) * 1e3) * ARCSEC_PER_RADIAN if n else np.empty(0)
        r_arcsec = np.minimum(r_arcsec, g.max_half_light_radius)
        q = np.where(early, rng.uniform(0.5, 1.0, size=n), rng.uniform(0.2, 1.0, size=n))
        angle = rng.uniform(0.0, 180.0, size=n)
        keep = self._clear(x, y, lenses, lambda theta_e: max(g.lens_clearance * theta_e, clearance))
        return dict(kind=np.full(n, "galaxy")[keep], x=x[keep], y=y[keep],
                    magnitudes={b: v[keep] for b, v in mags.items()}, redshift=z[keep],
                    half_light_radius=r_arcsec[keep],
                    sersic_index=np.where(early, EARLY_TYPE_SERSIC_INDEX, LATE_TYPE_SERSIC_INDEX)[keep],
                    q=q[keep], angle=angle[keep], temperature=np.full(n, math.nan)[keep])

    def _draw_stars(self, rng, lenses=(), clearance: float = 0.0) -> dict:
        s = self.stars
        n = int(rng.poisson(self.expected_stars()))
        x, y = self._positions(rng, n)
        m = self.star_counts.draw(*s.magnitude_range, rng.uniform(size=n)) if n else np.empty(0)
        t = rng.uniform(*s.temperature_range, size=n)
        mags = {b: m + (np.interp(t, STAR_TEMPERATURE_GRID, self._star_colours[b]) if n else 0.0) for b in self.bands}
        keep = self._clear(x, y, lenses, lambda theta_e: clearance)
        nan = np.full(int(keep.sum()), math.nan)
        return dict(kind=np.full(nan.size, "star"), x=x[keep], y=y[keep], magnitudes={b: v[keep] for b, v in mags.items()},
                    redshift=nan, half_light_radius=nan, sersic_index=nan, q=nan, angle=nan, temperature=t[keep])

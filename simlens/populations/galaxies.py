"""Galaxy physics for the sampler: lens light from the velocity dispersion, source photometry and
sizes from number counts, and point-source colours -- all magnitudes through the survey's filters.

Each model is built once per run from the recipe (the K-correction tables cost a few tens of
milliseconds each) and then draws one galaxy from a random generator in microseconds.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping

import numpy as np

from ..cosmology import ARCSEC_PER_RADIAN, DistanceTable
from .photometry import kcorrection
from .scaling_relations import (SUN_ABSOLUTE_MAGNITUDE_R, EarlyTypeJointDistribution, FaberJackson, FundamentalPlane, NumberCounts,
                                RedshiftGivenMagnitude, SizeLuminosity, UVSizeLuminosity)

__all__ = ["LensLight", "LensLightModel", "SourcePhotometry", "SourceModel", "PointSourceColours",
           "core_half_light_radius", "split_core_and_envelope"]

MIN_LIGHT_AXIS_RATIO = 0.2
MIN_AXIS_RATIO_RATIO = 0.05  # q_mass / q_light, kept positive


class _BandK:
    """K-corrections of one template for all bands at once (the tables share one redshift grid)."""

    def __init__(self, tables: Mapping):
        self.bands = tuple(tables)
        first = tables[self.bands[0]]
        self._z = first._z
        self._k = np.stack([tables[b]._k for b in self.bands])
        self._step = self._z[1] - self._z[0]
        self.z_max = float(self._z[-1])

    def at(self, z: float) -> dict:
        if not 0.0 <= z <= self.z_max:
            raise ValueError(f"K-correction table covers 0 <= z <= {self.z_max:g}; got {z}")
        f = z / self._step
        i = min(int(f), self._z.size - 2)
        w = f - i
        values = self._k[:, i] * (1.0 - w) + self._k[:, i + 1] * w
        return dict(zip(self.bands, values.tolist()))

    def at_many(self, z: np.ndarray) -> np.ndarray:
        """K of every band (rows) at every redshift (columns): :meth:`at` on arrays."""
        z = np.asarray(z, dtype=float)
        if np.any(z < 0.0) or np.any(z > self.z_max):
            raise ValueError(f"K-correction table covers 0 <= z <= {self.z_max:g}; got {z.min():g}..{z.max():g}")
        f = z / self._step
        i = np.minimum(f.astype(np.int64), self._z.size - 2)
        w = f - i
        return self._k[:, i] * (1.0 - w) + self._k[:, i + 1] * w


def core_half_light_radius(half_light_radius: float, fraction: float, ratio: float, n_core: float,
                           n_envelope: float) -> float:
    """The core's R_e of a two-Sersic galaxy whose envelope (share ``fraction`` of the light, R_e
    ``ratio`` times the core's) and core together have half their light within ``half_light_radius``.

    A Sersic profile holds the share P(2n, b_n (R / R_e)^(1/n)) of its light within R (P the
    regularised lower incomplete gamma function; Graham & Driver 2005, eq. 2), in circularised radii,
    so exactly so in ellipses where both share one axis ratio.  The root lies between R_e / ratio
    (the envelope alone encloses half) and R_e (the core alone does)."""
    from scipy import optimize, special

    b_core, b_env = special.gammaincinv(2.0 * n_core, 0.5), special.gammaincinv(2.0 * n_envelope, 0.5)

    def excess(log_core):
        core = math.exp(log_core)
        inner = special.gammainc(2.0 * n_core, b_core * (half_light_radius / core) ** (1.0 / n_core))
        outer = special.gammainc(2.0 * n_envelope, b_env * (half_light_radius / (ratio * core)) ** (1.0 / n_envelope))
        return (1.0 - fraction) * inner + fraction * outer - 0.5

    if ratio == 1.0:
        return half_light_radius
    low, high = math.log(half_light_radius / ratio), math.log(half_light_radius)
    return math.exp(optimize.brentq(excess, low, high, xtol=1e-12, rtol=1e-12))


def split_core_and_envelope(magnitudes: Mapping[str, float], reference: str, fraction: float,
                            offsets: Mapping[str, float]) -> tuple[dict, dict]:
    """``(core, envelope)`` magnitudes per band: the envelope holds ``fraction`` of the light in
    ``reference`` and its colour is the core's plus ``offsets[band]``, the two adding up to
    ``magnitudes`` in every band (the galaxy's total colours unchanged)."""
    core, envelope = {}, {}
    for band, total in magnitudes.items():
        # envelope / core flux ratio in this band: f / (1 - f) * 10^(-0.4 offset)
        ratio = fraction / (1.0 - fraction) * 10 ** (-0.4 * (0.0 if band == reference else offsets[band]))
        core[band] = total + 2.5 * math.log10(1.0 + ratio)
        envelope[band] = core[band] - 2.5 * math.log10(ratio)
    return core, envelope


def _arcsec(size_kpc: float, d_a_mpc: float) -> float:
    return size_kpc / (d_a_mpc * 1e3) * ARCSEC_PER_RADIAN


@dataclass(frozen=True)
class LensLight:
    absolute_magnitude: float  # rest-frame, AB, in the rest filter
    luminosity: float  # L_sun in the rest filter
    stellar_mass: float  # M_sun (nan without a mass-to-light ratio)
    magnitudes: Mapping[str, float]  # observed, AB, per band
    half_light_radius: float  # arcsec
    half_light_radius_kpc: float
    q: float
    angle: float


class LensLightModel:
    """Luminosity and size from sigma (Bernardi et al. 2003's joint law, or Faber-Jackson then the
    fundamental plane) and colours from an early-type template."""

    def __init__(self, settings, distances: DistanceTable, band_filters: Mapping[str, str], base: str):
        self.settings = settings
        self.distances = distances
        self.faber_jackson = FaberJackson(settings.faber_jackson_slope, settings.faber_jackson_magnitude,
                                          settings.faber_jackson_sigma, settings.faber_jackson_scatter)
        self.plane = FundamentalPlane(settings.plane_a, settings.plane_b, settings.plane_c, settings.plane_scatter)
        self.joint = EarlyTypeJointDistribution() if settings.relations == "bernardi2003" else None
        self.k = _BandK({b: kcorrection(settings.template, f, settings.rest_filter, base)
                         for b, f in band_filters.items()})

    NORMALS = 4  # standard normals per galaxy: luminosity, size, axis ratio, angle

    def draw(self, sigma: float, z: float, mass_q: float, mass_angle: float, rng) -> LensLight:
        return self.draw_many([sigma], [z], [mass_q], [mass_angle], rng.standard_normal(size=(1, self.NORMALS)))[0]

    def draw_many(self, sigma, z, mass_q, mass_angle, normals: np.ndarray) -> list[LensLight]:
        """One galaxy per entry, from NORMALS standard normals each (``normals`` of shape (n, 4)):
        the same galaxies as :meth:`draw` given a generator that yields those normals."""
        s = self.settings
        sigma, z = np.asarray(sigma, dtype=float), np.asarray(z, dtype=float)
        if self.joint is not None:  # the z = 0 relations'
            today, log_r = self.joint.draw_given_sigma(sigma, normals[:, :2])
        else:
            fj, plane = self.faber_jackson, self.plane
            today = fj.mean_magnitude(sigma) + fj.scatter * normals[:, 0]
            log_r = plane.mean_log_radius(sigma, today) + plane.scatter * normals[:, 1]
        r_kpc = 10 ** log_r
        absolute = today - s.luminosity_evolution * z  # passive brightening; size and mass as today
        modulus = self.distances.distmod(z)
        k = self.k.at_many(z)
        ratio = np.maximum(1.0 + s.q_scatter * normals[:, 2], MIN_AXIS_RATIO_RATIO)  # q_mass / q_light
        q = np.clip(np.asarray(mass_q, dtype=float) / ratio, MIN_LIGHT_AXIS_RATIO, 1.0)
        angle = np.asarray(mass_angle, dtype=float) + s.angle_scatter * normals[:, 3]
        luminosity = 10 ** (-0.4 * (absolute - SUN_ABSOLUTE_MAGNITUDE_R))
        # the stars' mass is today's luminosity times today's M/L (passive evolution changes M/L, not M)
        stellar = (10 ** (-0.4 * (today - SUN_ABSOLUTE_MAGNITUDE_R)) * s.mass_to_light if s.mass_to_light is not None
                   else np.full(z.shape, math.nan))
        radius = _arcsec(r_kpc, self.distances.angular_diameter_distance(z))
        mags = absolute + modulus + k  # (bands, n)
        return [LensLight(absolute_magnitude=float(absolute[j]), luminosity=float(luminosity[j]),
                          stellar_mass=float(stellar[j]), magnitudes=dict(zip(self.k.bands, mags[:, j].tolist())),
                          half_light_radius=float(radius[j]), half_light_radius_kpc=float(r_kpc[j]), q=float(q[j]),
                          angle=float(angle[j])) for j in range(z.size)]


@dataclass(frozen=True)
class SourcePhotometry:
    redshift: float
    anchor_magnitude: float  # total magnitude in the counts band
    absolute_magnitude: float  # rest filter, AB
    disk_colors: Mapping[str, float]  # m_band - m_anchor (0 for the anchor band)
    clump_colors: Mapping[str, float]
    half_light_radius: float  # arcsec
    half_light_radius_kpc: float


class SourceModel:
    """Number counts, p(z | m), size-luminosity relations (Shen et al. 2003 in rest-frame r, and
    Shibuya et al. 2015 in the rest-frame UV where the sources are star-forming galaxies seen in
    their UV) and templates."""

    def __init__(self, settings, distances: DistanceTable, band_filters: Mapping[str, str], anchor_band: str,
                 clump_template: str | None, base: str, bulge_template: str | None = None):
        self.settings = settings
        self.distances = distances
        self.anchor_band = anchor_band
        self.counts = NumberCounts(settings.density, settings.pivot, settings.slope)
        self.redshifts = RedshiftGivenMagnitude(settings.z0_slope, settings.z0_intercept)
        self.sizes = SizeLuminosity()
        self.uv_sizes = UVSizeLuminosity()
        self.k_disk = _BandK({b: kcorrection(settings.template, f, settings.rest_filter, base)
                              for b, f in band_filters.items()})
        clumps = clump_template or settings.template
        self.k_clump = _BandK({b: kcorrection(clumps, f, settings.rest_filter, base) for b, f in band_filters.items()})
        self.k_bulge = (_BandK({b: kcorrection(bulge_template, f, settings.rest_filter, base)
                                for b, f in band_filters.items()}) if bulge_template else None)

    def bulge_colors(self, z: float) -> dict:
        """``m_band - m_anchor`` of the bulge's template at redshift ``z``."""
        k = self.k_bulge.at(z)
        return {b: value - k[self.anchor_band] for b, value in k.items()}

    @property
    def sky_density(self) -> float:
        """Sources per arcmin^2 in the magnitude range."""
        return self.counts.between(*self.settings.magnitude_range)

    def draw_magnitudes_and_redshifts(self, rng, n: int) -> tuple[np.ndarray, np.ndarray]:
        """``n`` (anchor magnitude, redshift) pairs: the part of a source that decides whether it
        lies behind the lens, drawn in bulk for rejection sampling."""
        s = self.settings
        m = self.counts.draw(*s.magnitude_range, rng.uniform(size=n))
        return m, self.redshifts.draw(m, *s.redshift_range, rng.uniform(size=n))

    def draw(self, rng) -> SourcePhotometry:
        m, z = self.draw_magnitudes_and_redshifts(rng, 1)
        return self.complete(float(m[0]), float(z[0]), rng)

    @property
    def normals(self) -> int:
        """Standard normals per source: one for the size scatter, or none."""
        return 1 if self.settings.size_scatter else 0

    def complete(self, m: float, z: float, rng) -> SourcePhotometry:
        """The rest of a source of anchor magnitude ``m`` at redshift ``z``: size and colours."""
        return self.complete_many([m], [z], rng.standard_normal(size=(1, self.normals)))[0]

    def complete_many(self, m, z, normals: np.ndarray) -> list[SourcePhotometry]:
        """:meth:`complete` for many sources, from ``normals`` (shape (n, self.normals))."""
        m, z = np.asarray(m, dtype=float), np.asarray(z, dtype=float)
        k_disk, k_clump = self.k_disk.at_many(z), self.k_clump.at_many(z)
        anchor = self.k_disk.bands.index(self.anchor_band)
        k_anchor, clump_anchor = k_disk[anchor], k_clump[anchor]
        modulus = self.distances.distmod(z)
        absolute = m - modulus - k_anchor
        # rest-frame UV: the anchor band's light at lambda / (1 + z), f_nu flat (a UV slope of -2,
        # typical of star-forming galaxies at z > 1; common practice)
        uv_absolute = m - modulus + 2.5 * np.log10(1.0 + z)
        relation = self.settings.size_relation
        use_uv = np.full(z.shape, relation == "shibuya2015") | ((relation == "mixed") & (z >= self.settings.size_redshift))
        log_r = np.where(use_uv, self.uv_sizes.mean_log_radius(uv_absolute, z), self.sizes.mean_log_radius(absolute, z))
        r_kpc = 10 ** log_r
        if self.normals:
            scatter = np.where(use_uv, self.uv_sizes.scatter_ln(uv_absolute), self.sizes.scatter_ln(absolute))
            r_kpc = r_kpc * np.exp(scatter * normals[:, 0])
        radius = _arcsec(r_kpc, self.distances.angular_diameter_distance(z))
        disk, clump = k_disk - k_anchor, k_clump - clump_anchor
        bands = self.k_disk.bands
        return [SourcePhotometry(redshift=float(z[j]), anchor_magnitude=float(m[j]),
                                 absolute_magnitude=float(absolute[j]),
                                 disk_colors=dict(zip(bands, disk[:, j].tolist())),
                                 clump_colors=dict(zip(bands, clump[:, j].tolist())),
                                 half_light_radius=float(radius[j]), half_light_radius_kpc=float(r_kpc[j]))
                for j in range(z.size)]


class PointSourceColours:
    """Colours of a power-law continuum ``f_nu ~ nu^index`` at the source redshift."""

    def __init__(self, spectral_index: float, band_filters: Mapping[str, str], reference_band: str, base: str):
        ref_filter = band_filters[reference_band]
        self.reference_band = reference_band
        self.k = _BandK({b: kcorrection("", f, ref_filter, base, spectral_index=spectral_index)
                         for b, f in band_filters.items()})

    def colors(self, z: float) -> dict:
        k = self.k.at(z)
        return {b: value - k[self.reference_band] for b, value in k.items()}

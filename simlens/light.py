"""Surface-brightness profiles: elliptical Sersic components and their sums.

Conventions: positions in arcsec (as for the mass models); ``angle`` in degrees counter-clockwise
from +x along the major axis; ``q`` = minor/major axis ratio in (0, 1]; ``flux`` is the total flux
in image counts (ADU) and ``surface_brightness`` returns counts per arcsec^2.

The elliptical radius is ``R = sqrt(q x'^2 + y'^2 / q)``: the isophote through ``R`` encloses the
area ``pi R^2`` whatever ``q`` is, so ``half_light_radius`` is the circularised half-light radius
(the same convention as galsim.Sersic sheared by a shape of axis ratio q).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from scipy import special

__all__ = ["LightProfile", "Sersic", "PointSource", "CompositeLight", "sersic_b", "split_points"]

SERSIC_INDEX_RANGE = (0.3, 8.0)


def sersic_b(n: float) -> float:
    """``b_n`` such that the Sersic half-light radius encloses half the flux:
    ``gamma(2n, b_n) = Gamma(2n) / 2``, solved exactly with scipy's inverse regularised incomplete
    gamma function (Ciotti & Bertin 1999 give the asymptotic expansion used in the tests)."""
    return float(special.gammaincinv(2.0 * n, 0.5))


class LightProfile:
    """Base class: ``surface_brightness(x, y)``, ``flux``, ``with_flux``, ``+``."""

    flux: float

    def surface_brightness(self, x, y) -> np.ndarray:
        raise NotImplementedError

    def with_flux(self, flux: float) -> "LightProfile":
        raise NotImplementedError

    def scaled(self, factor: float) -> "LightProfile":
        """The same shape with ``factor`` times the flux."""
        return self.with_flux(self.flux * factor)

    def __add__(self, other: "LightProfile") -> "CompositeLight":
        if not isinstance(other, LightProfile):
            return NotImplemented
        return CompositeLight(_components(self) + _components(other))


@dataclass(frozen=True)
class Sersic(LightProfile):
    """Elliptical Sersic profile (Sersic 1963),

        I(R) = I_e exp(-b_n [(R / R_e)^(1/n) - 1]),

    normalised analytically to the total ``flux``:
    ``flux = 2 pi n I_e R_e^2 exp(b_n) b_n^(-2n) Gamma(2n)`` (e.g. Graham & Driver 2005, eq. 4).

    Parameters
    ----------
    flux : float
        total flux (counts), >= 0.
    half_light_radius : float
        circularised half-light radius R_e (arcsec), > 0.
    sersic_index : float
        n in [0.3, 8] (n = 0.5 Gaussian, 1 exponential, 4 de Vaucouleurs).
    q, angle, center : axis ratio in (0, 1], degrees CCW from +x, arcsec.
    """

    flux: float
    half_light_radius: float
    sersic_index: float = 1.0
    q: float = 1.0
    angle: float = 0.0
    center: tuple = (0.0, 0.0)

    def __post_init__(self):
        flux = float(self.flux)
        if not (np.isfinite(flux) and flux >= 0):
            raise ValueError(f"Sersic: flux must be finite and >= 0, got {flux}")
        r_e = float(self.half_light_radius)
        if not (np.isfinite(r_e) and r_e > 0):
            raise ValueError(f"Sersic: half_light_radius must be > 0 arcsec, got {r_e}")
        n = float(self.sersic_index)
        if not (SERSIC_INDEX_RANGE[0] <= n <= SERSIC_INDEX_RANGE[1]):
            raise ValueError(f"Sersic: sersic_index must be in {list(SERSIC_INDEX_RANGE)}, got {n}")
        q = float(self.q)
        if not (0.0 < q <= 1.0):
            raise ValueError(f"Sersic: q must be in (0, 1], got {q}")
        cx, cy = (float(v) for v in self.center)
        for name, value in (("flux", flux), ("half_light_radius", r_e), ("sersic_index", n), ("q", q),
                            ("angle", float(self.angle)), ("center", (cx, cy))):
            object.__setattr__(self, name, value)

    @property
    def b_n(self) -> float:
        return sersic_b(self.sersic_index)

    @property
    def intensity_at_half_light_radius(self) -> float:
        """``I_e`` in counts per arcsec^2."""
        n, b = self.sersic_index, self.b_n
        norm = 2.0 * math.pi * n * self.half_light_radius**2 * math.exp(b) * b ** (-2.0 * n) * math.gamma(2.0 * n)
        return self.flux / norm

    def elliptical_radius_squared(self, x, y) -> np.ndarray:
        """``R^2 = q x'^2 + y'^2 / q`` (arcsec^2) in the frame of the major axis."""
        c, s = math.cos(math.radians(self.angle)), math.sin(math.radians(self.angle))
        dx = np.asarray(x, dtype=float) - self.center[0]
        dy = np.asarray(y, dtype=float) - self.center[1]
        xp = c * dx + s * dy
        yp = c * dy - s * dx
        return self.q * (xp * xp) + (yp * yp) / self.q

    def elliptical_radius(self, x, y) -> np.ndarray:
        return np.sqrt(self.elliptical_radius_squared(x, y))

    def surface_brightness(self, x, y) -> np.ndarray:
        if self.flux == 0.0:
            return np.zeros(np.broadcast(np.asarray(x), np.asarray(y)).shape)
        n, b = self.sersic_index, self.b_n
        # (R / R_e)^(1/n) computed from R^2 without a square root.
        scaled = (self.elliptical_radius_squared(x, y) / self.half_light_radius**2) ** (0.5 / n)
        return self.intensity_at_half_light_radius * np.exp(-b * (scaled - 1.0))

    def with_flux(self, flux: float) -> "Sersic":
        return replace(self, flux=flux)


@dataclass(frozen=True)
class PointSource(LightProfile):
    """An unresolved source (a star, or a quasar's image) of total ``flux`` (counts) at ``center``.

    Its surface brightness is a delta function, so it cannot be sampled by rays: the renderer
    deposits its flux on the supersampled grid instead (cloud-in-cell, flux-conserving), and the PSF
    stage turns it into the PSF.  ``surface_brightness`` returns zero everywhere."""

    flux: float
    center: tuple = (0.0, 0.0)

    def __post_init__(self):
        flux = float(self.flux)
        if not (np.isfinite(flux) and flux >= 0):
            raise ValueError(f"PointSource: flux must be finite and >= 0, got {flux}")
        cx, cy = (float(v) for v in self.center)
        object.__setattr__(self, "flux", flux)
        object.__setattr__(self, "center", (cx, cy))

    def surface_brightness(self, x, y) -> np.ndarray:
        return np.zeros(np.broadcast(np.asarray(x), np.asarray(y)).shape)

    def with_flux(self, flux: float) -> "PointSource":
        return replace(self, flux=flux)


@dataclass(frozen=True)
class CompositeLight(LightProfile):
    """A sum of light components (for example a disk plus compact star-forming clumps)."""

    components: tuple

    def __post_init__(self):
        if not self.components:
            raise ValueError("CompositeLight needs at least one component")

    @property
    def flux(self) -> float:  # type: ignore[override]
        return float(sum(c.flux for c in self.components))

    def surface_brightness(self, x, y) -> np.ndarray:
        total = self.components[0].surface_brightness(x, y)
        for c in self.components[1:]:
            total = total + c.surface_brightness(x, y)
        return total

    def with_flux(self, flux: float) -> "CompositeLight":
        current = self.flux
        factor = flux / current if current > 0 else 0.0
        return CompositeLight(tuple(c.scaled(factor) for c in self.components))


def split_points(profile: LightProfile | None) -> tuple[LightProfile | None, tuple]:
    """``(extended part or None, point sources)`` of a profile."""
    if profile is None:
        return None, ()
    parts = _components(profile)
    points = tuple(p for p in parts if isinstance(p, PointSource))
    extended = tuple(p for p in parts if not isinstance(p, PointSource))
    if not extended:
        return None, points
    return (extended[0] if len(extended) == 1 else CompositeLight(extended)), points


def _components(profile: LightProfile) -> tuple:
    return profile.components if isinstance(profile, CompositeLight) else (profile,)

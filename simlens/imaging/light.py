"""Surface-brightness profiles: elliptical Sersic components and their sums.

Conventions: positions in arcsec (as for the mass models); ``angle`` in degrees counter-clockwise
from +x along the major axis; ``q`` = minor/major axis ratio in (0, 1]; ``flux`` is the total flux
in image counts (ADU) and ``surface_brightness`` returns counts per arcsec^2.

The elliptical radius is ``R = sqrt(q x'^2 + y'^2 / q)``: the isophote through ``R`` encloses the
area ``pi R^2`` whatever ``q`` is, so ``half_light_radius`` is the circularised half-light radius
(the same convention as galsim.Sersic sheared by a shape of axis ratio q).
"""

from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass, field, replace

import numpy as np
from scipy import ndimage, special

__all__ = ["LightProfile", "Sersic", "PointSource", "CompositeLight", "GaussianRing", "SpiralArms", "ImageLight",
           "sersic_b", "split_points"]

SERSIC_INDEX_RANGE = (0.3, 8.0)

# Where a lensed profile counts as faint (relative to its typical surface brightness: I_e for a
# Sersic), the renderer samples it at the PSF stage's sampling alone (see imaging/rays.py).  For
# an exponential disk this is 6.5 R_e, holding all but 0.01 % of the flux.
FAINT_SURFACE_BRIGHTNESS = 1e-4


def sersic_b(n: float) -> float:
    """``b_n`` such that the Sersic half-light radius encloses half the flux:
    ``gamma(2n, b_n) = Gamma(2n) / 2``, solved exactly with scipy's inverse regularised incomplete
    gamma function (Ciotti & Bertin 1999 give the asymptotic expansion used in the tests)."""
    return float(special.gammaincinv(2.0 * n, 0.5))


def _floats(values) -> np.ndarray:
    """``values`` as a float array: single-precision arrays stay single (the renderer samples smooth
    image-plane light in float32), everything else becomes float64."""
    values = np.asarray(values)
    return values if values.dtype == np.float32 else values.astype(float, copy=False)


class LightProfile:
    """Base class: ``surface_brightness(x, y)``, ``flux``, ``with_flux``, ``+``."""

    flux: float

    def surface_brightness(self, x, y) -> np.ndarray:
        raise NotImplementedError

    def with_flux(self, flux: float) -> "LightProfile":
        raise NotImplementedError

    def near_light(self, x, y, reach) -> np.ndarray:
        """True where a disc of radius ``reach`` (arcsec, an array like ``x``) around ``(x, y)`` may
        hold light brighter than :data:`FAINT_SURFACE_BRIGHTNESS` of the profile's typical surface
        brightness; the renderer samples only there at full resolution.  By default everywhere."""
        return np.ones(np.broadcast(np.asarray(x), np.asarray(y), np.asarray(reach)).shape, bool)

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
        dx = _floats(x) - self.center[0]
        dy = _floats(y) - self.center[1]
        xp = c * dx + s * dy
        yp = c * dy - s * dx
        return self.q * (xp * xp) + (yp * yp) / self.q

    def elliptical_radius(self, x, y) -> np.ndarray:
        return np.sqrt(self.elliptical_radius_squared(x, y))

    @property
    def faint_radius(self) -> float:
        """The elliptical radius beyond which ``I < FAINT_SURFACE_BRIGHTNESS * I_e``:
        ``R_e (1 + ln(1 / FAINT_SURFACE_BRIGHTNESS) / b_n)^n``, from the Sersic law."""
        return self.half_light_radius * (1.0 - math.log(FAINT_SURFACE_BRIGHTNESS) / self.b_n) ** self.sersic_index

    def near_light(self, x, y, reach) -> np.ndarray:
        # A disc of radius r around a point reaches elliptical radii at most r / sqrt(q) further.
        limit = self.faint_radius + np.asarray(reach) / math.sqrt(self.q)
        return self.elliptical_radius_squared(x, y) < limit * limit

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


def _stretched_polar(x, y, center, q, angle):
    """Polar coordinates ``(R, phi)`` in the area-preserving frame ``(sqrt(q) x', y' / sqrt(q))``:
    ``R`` is the elliptical radius of the module docstring and ``dA = R dR dphi``."""
    c, s = math.cos(math.radians(angle)), math.sin(math.radians(angle))
    dx = np.asarray(x, dtype=float) - center[0]
    dy = np.asarray(y, dtype=float) - center[1]
    u = math.sqrt(q) * (c * dx + s * dy)
    v = (-s * dx + c * dy) / math.sqrt(q)
    return np.hypot(u, v), np.arctan2(v, u)


@dataclass(frozen=True)
class GaussianRing(LightProfile):
    """An elliptical ring of Gaussian cross-section, whole or an arc segment (for ring galaxies,
    tidal shells and streams):

        I = I_0 exp(-(R - radius)^2 / (2 width^2)) exp(-dphi^2 / (2 arc_width^2)),

    ``dphi`` the angle from ``arc_angle`` (degrees, in the ring's frame); ``arc_width=None`` is the
    whole ring.  Normalised analytically (the stretched frame preserves area):
    ``flux = I_0 [w^2 exp(-r0^2 / 2w^2) + r0 w sqrt(pi/2) (1 + erf(r0 / (sqrt(2) w)))] A`` with
    ``A = 2 pi`` for the whole ring, else ``sqrt(2 pi) s erf(pi / (sqrt(2) s))`` (``s`` in radians)."""

    flux: float
    radius: float
    width: float
    q: float = 1.0
    angle: float = 0.0
    arc_angle: float = 0.0
    arc_width: float | None = None
    center: tuple = (0.0, 0.0)

    def __post_init__(self):
        if not (self.radius >= 0 and self.width > 0 and 0 < self.q <= 1 and self.flux >= 0):
            raise ValueError(f"GaussianRing: needs radius >= 0, width > 0, 0 < q <= 1, flux >= 0; got {self}")
        if self.arc_width is not None and not self.arc_width > 0:
            raise ValueError(f"GaussianRing: arc_width must be > 0 degrees, got {self.arc_width}")
        object.__setattr__(self, "center", tuple(float(v) for v in self.center))

    @property
    def _norm(self) -> float:
        r0, w = self.radius, self.width
        radial = w * w * math.exp(-r0 * r0 / (2 * w * w)) + r0 * w * math.sqrt(math.pi / 2) * (
            1 + math.erf(r0 / (math.sqrt(2) * w)))
        if self.arc_width is None:
            angular = 2 * math.pi
        else:
            sig = math.radians(self.arc_width)
            angular = math.sqrt(2 * math.pi) * sig * math.erf(math.pi / (math.sqrt(2) * sig))
        return radial * angular

    def surface_brightness(self, x, y) -> np.ndarray:
        r, phi = _stretched_polar(x, y, self.center, self.q, self.angle)
        sb = np.exp(-((r - self.radius) ** 2) / (2 * self.width**2))
        if self.arc_width is not None:
            dphi = np.angle(np.exp(1j * (phi - math.radians(self.arc_angle))))
            sb = sb * np.exp(-(dphi**2) / (2 * math.radians(self.arc_width) ** 2))
        return self.flux / self._norm * sb

    def with_flux(self, flux: float) -> "GaussianRing":
        return replace(self, flux=flux)


@dataclass(frozen=True)
class SpiralArms(LightProfile):
    """Logarithmic spiral arms on an exponential disk (spiral-arm look-alikes of arcs):

        I = I_0 exp(-R / h) [1 + cos(m (phi - ln(R / h) / tan(pitch)))]^2 / 4,

    ``m`` arms of pitch angle ``pitch`` (degrees).  At fixed ``R`` the bracket averages to 3/8 over
    ``phi`` for any integer ``m``, so ``flux = I_0 (3/8) 2 pi h^2`` exactly."""

    flux: float
    scale_radius: float
    pitch: float = 15.0
    arms: int = 2
    q: float = 1.0
    angle: float = 0.0
    phase: float = 0.0
    center: tuple = (0.0, 0.0)

    def __post_init__(self):
        if not (self.scale_radius > 0 and 0 < self.pitch < 90 and int(self.arms) == self.arms >= 1
                and 0 < self.q <= 1 and self.flux >= 0):
            raise ValueError(f"SpiralArms: invalid parameters {self}")
        object.__setattr__(self, "center", tuple(float(v) for v in self.center))

    def surface_brightness(self, x, y) -> np.ndarray:
        r, phi = _stretched_polar(x, y, self.center, self.q, self.angle)
        h = self.scale_radius
        wind = np.log(np.maximum(r, 1e-9) / h) / math.tan(math.radians(self.pitch))
        pattern = (1 + np.cos(self.arms * (phi - wind) - math.radians(self.phase))) ** 2 / 4
        return self.flux / (0.375 * 2 * math.pi * h * h) * np.exp(-r / h) * pattern

    def with_flux(self, flux: float) -> "SpiralArms":
        return replace(self, flux=flux)


@dataclass(frozen=True)
class ImageLight(LightProfile):
    """The light of an image stamp (a high-resolution galaxy image): its pixel values are samples
    of the surface brightness at the pixel centres, interpolated by cubic splines
    (``scipy.ndimage.map_coordinates``, order 3, zero beyond the stamp).  The interpolant's
    integral is the sum of the samples times the pixel area, so scaling the samples by ``flux /
    (sum x area)`` conserves the flux.  The stamp (``ny x nx``, pixel ``pixel_scale`` arcsec) is
    centred on ``center`` and turned by ``angle`` degrees CCW; its column axis is +x before that.

    Equal stamps compare (and hash) equal by a digest of their pixels, so the renderer's caches
    evaluate each shape once."""

    flux: float
    image: np.ndarray = field(compare=False, repr=False)
    pixel_scale: float = 0.03
    angle: float = 0.0
    center: tuple = (0.0, 0.0)
    digest: str = field(default="", repr=False)  # set from the pixels (with ``total`` and the spline)
    total: float = field(default=math.nan, compare=False, repr=False)

    def __post_init__(self):
        if self.digest:  # a copy (with_flux): the spline and the sums are already made
            return
        image = np.asarray(self.image, dtype=float)
        total = float(image.sum())
        if image.ndim != 2 or min(image.shape) < 4 or not np.all(np.isfinite(image)) or not total > 0:
            raise ValueError("ImageLight: the stamp must be a finite 2-d image, at least 4 x 4, with a positive sum")
        if not (self.pixel_scale > 0 and np.isfinite(self.flux) and self.flux >= 0):
            raise ValueError(f"ImageLight: needs pixel_scale > 0 and flux >= 0, got {self.pixel_scale}, {self.flux}")
        digest = hashlib.sha1(np.ascontiguousarray(image).tobytes() + str(image.shape).encode()).hexdigest()
        coefficients = ndimage.spline_filter(image, order=3, mode="constant")
        coefficients.flags.writeable = False
        for name, value in (("digest", digest), ("image", coefficients), ("total", total),
                            ("center", tuple(float(v) for v in self.center))):
            object.__setattr__(self, name, value)

    @property
    def half_diagonal(self) -> float:
        ny, nx = self.image.shape
        return 0.5 * math.hypot(nx, ny) * self.pixel_scale

    def _pixels(self, x, y):
        c, s = math.cos(math.radians(self.angle)), math.sin(math.radians(self.angle))
        dx, dy = _floats(x) - self.center[0], _floats(y) - self.center[1]
        ny, nx = self.image.shape
        column = (c * dx + s * dy) / self.pixel_scale + 0.5 * (nx - 1)
        row = (c * dy - s * dx) / self.pixel_scale + 0.5 * (ny - 1)
        return row, column

    def surface_brightness(self, x, y) -> np.ndarray:
        shape = np.broadcast(np.asarray(x), np.asarray(y)).shape
        if self.flux == 0.0:
            return np.zeros(shape)
        row, column = (np.broadcast_to(v, shape).ravel() for v in self._pixels(x, y))
        values = ndimage.map_coordinates(self.image, [row, column], order=3, mode="constant", cval=0.0,
                                         prefilter=False)
        scale = self.flux / (self.total * self.pixel_scale**2)
        return (values * scale).reshape(shape)

    def near_light(self, x, y, reach) -> np.ndarray:
        dx, dy = _floats(x) - self.center[0], _floats(y) - self.center[1]
        limit = self.half_diagonal + np.asarray(reach)
        return dx * dx + dy * dy < limit * limit

    def with_flux(self, flux: float) -> "ImageLight":
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

    def near_light(self, x, y, reach) -> np.ndarray:
        near = self.components[0].near_light(x, y, reach)
        for c in self.components[1:]:
            near = near | c.near_light(x, y, reach)
        return near

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

"""Navarro-Frenk-White haloes: spherical (analytic) and elliptical (elliptical potential)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .base import MassModel, check_center, check_positive, rotate_back, rotate_into_frame

CENTRAL_FLOOR = 1e-9  # in units of the scale radius
# The convergence within |x^2 - 1| < NEAR_SCALE_RADIUS is summed as a series of SERIES_TERMS terms
# (the first term left out is below 0.1^20 / 43 ~ 2e-22 of the sum).
NEAR_SCALE_RADIUS = 0.1
SERIES_TERMS = 20


def _f_function(x: np.ndarray) -> np.ndarray:
    """``F(x)`` of the projected NFW profile: arccosh(1/x)/sqrt(1-x^2) (x < 1),
    arccos(1/x)/sqrt(x^2-1) (x > 1), 1 at x = 1 (Bartelmann 1996; Wright & Brainerd 2000)."""
    x = np.asarray(x, dtype=float)
    out = np.ones_like(x)
    lo = x < 1.0 - 1e-6
    hi = x > 1.0 + 1e-6
    near = ~(lo | hi)
    xl = x[lo]
    out[lo] = np.arccosh(1.0 / xl) / np.sqrt(1.0 - xl * xl)
    xh = x[hi]
    out[hi] = np.arccos(1.0 / xh) / np.sqrt(xh * xh - 1.0)
    # Series about x = 1: F = 1 - 2(x-1)/3 + 7(x-1)^2/15 (Taylor expansion; smooth through x = 1).
    d = x[near] - 1.0
    out[near] = 1.0 - 2.0 * d / 3.0 + 7.0 * d * d / 15.0
    return out


def _g_function(x: np.ndarray) -> np.ndarray:
    """``ln(x/2) + F(x)``: the enclosed projected mass in units of 4 pi rho_s r_s^3."""
    return np.log(0.5 * x) + _f_function(x)


def _h_function(x: np.ndarray) -> np.ndarray:
    """Potential shape: ln^2(x/2) - arccosh^2(1/x) (x < 1), ln^2(x/2) + arccos^2(1/x) (x >= 1)."""
    x = np.asarray(x, dtype=float)
    out = np.log(0.5 * x) ** 2
    lo = x < 1.0
    out[lo] -= np.arccosh(1.0 / x[lo]) ** 2
    out[~lo] += np.arccos(np.minimum(1.0 / x[~lo], 1.0)) ** 2
    return out


@dataclass(frozen=True)
class NFW(MassModel):
    """NFW halo, ``rho = rho_s / ((r / r_s)(1 + r / r_s)^2)`` (Navarro, Frenk & White 1997).

    In the lens plane, with ``x = r / scale_radius`` and ``kappa_s = rho_s r_s / Sigma_cr``
    (Bartelmann 1996; Wright & Brainerd 2000; Golse & Kneib 2002):

        kappa(x) = 2 kappa_s (1 - F(x)) / (x^2 - 1)
        alpha(x) = 4 kappa_s r_s (ln(x/2) + F(x)) / x          (radial)
        psi(x)   = 2 kappa_s r_s^2 h(x)

    ``ellipticity`` e > 0 makes the *potential* elliptical, ``psi(x_e)`` with
    ``x_e^2 = ((1 - e) x'^2 + (1 + e) y'^2) / r_s^2`` (Golse & Kneib 2002), with the major axis of the
    potential along ``angle``; the convergence is then computed exactly from it.  Elliptical
    potentials give dumbbell-shaped, locally negative convergence at large e: the approximation is
    good for e <= 0.25 (isodensity axis ratios down to about 0.5), which the constructor enforces.
    Use :func:`simlens.cosmology.nfw_lens_parameters` to get ``kappa_s`` and ``scale_radius`` from a
    halo mass and concentration.

    Parameters
    ----------
    kappa_s : > 0, the characteristic convergence.   scale_radius : arcsec, > 0.
    ellipticity : potential ellipticity in [0, 0.25].   angle : degrees CCW from +x.   center : arcsec.
    """

    kappa_s: float
    scale_radius: float
    ellipticity: float = 0.0
    angle: float = 0.0
    center: tuple = (0.0, 0.0)

    def __post_init__(self):
        object.__setattr__(self, "kappa_s", check_positive(self.kappa_s, "kappa_s", "NFW"))
        object.__setattr__(self, "scale_radius", check_positive(self.scale_radius, "scale_radius", "NFW"))
        e = float(self.ellipticity)
        if not (0.0 <= e <= 0.25):
            raise ValueError(f"NFW: ellipticity (of the potential) must be in [0, 0.25], got {e}")
        object.__setattr__(self, "ellipticity", e)
        object.__setattr__(self, "angle", float(self.angle))
        object.__setattr__(self, "center", check_center(self.center, "NFW"))

    def _scaled(self, x, y):
        xp, yp, c, s = rotate_into_frame(x, y, self.center, self.angle)
        e, rs = self.ellipticity, self.scale_radius
        xe = np.maximum(np.sqrt((1.0 - e) * xp * xp + (1.0 + e) * yp * yp) / rs, CENTRAL_FLOOR)
        return xp, yp, xe, c, s

    def radial_deflection(self, x_scaled) -> np.ndarray:
        """``alpha(x)`` of the spherical profile at ``x = r / r_s`` (arcsec)."""
        return 4.0 * self.kappa_s * self.scale_radius * _g_function(x_scaled) / x_scaled

    def _spherical_convergence(self, xs):
        """``kappa = 2 kappa_s (1 - F(x)) / (x^2 - 1)`` (Bartelmann 1996).  Near x = 1 the ratio
        cancels (1e-5 relative at |x - 1| ~ 1e-6), so there it is summed as the series in
        ``u = x^2 - 1`` that both branches share: with ``F = arctanh(s)/s``, ``s^2 = -u`` (x < 1)
        and ``F = arctan(t)/t``, ``t^2 = u`` (x > 1), ``(1 - F) / u = sum_k (-u)^k / (2k + 3)``."""
        u = xs * xs - 1.0
        near = np.abs(u) < NEAR_SCALE_RADIUS
        safe = np.where(near, 1.0, u)
        ratio = (1.0 - _f_function(xs)) / safe
        series = np.zeros_like(u)
        for k in range(SERIES_TERMS - 1, -1, -1):  # Horner in -u
            series = 1.0 / (2 * k + 3) - u * series
        return 2.0 * self.kappa_s * np.where(near, series, ratio)

    def deflection(self, x, y):
        xp, yp, xe, c, s = self._scaled(x, y)
        e, rs = self.ellipticity, self.scale_radius
        # grad psi(x_e): psi'(r_e) = alpha(x_e); d r_e / dx' = (1 - e) x' / r_e, with r_e = rs x_e.
        a = self.radial_deflection(xe) / (rs * xe)
        return rotate_back(a * (1.0 - e) * xp, a * (1.0 + e) * yp, c, s)

    def convergence(self, x, y):
        xp, yp, xe, _, _ = self._scaled(x, y)
        e, rs = self.ellipticity, self.scale_radius
        if e == 0.0:
            return self._spherical_convergence(xe)
        r = rs * xe
        alpha = self.radial_deflection(xe)
        second = 2.0 * self._spherical_convergence(xe) - alpha / r  # psi''(r) = 2 kappa - alpha / r
        ux, uy = (1.0 - e) * xp / r, (1.0 + e) * yp / r  # d r_e / dx', d r_e / dy'
        laplacian = (second * (ux * ux + uy * uy)
                     + alpha * ((1.0 - e) + (1.0 + e) - (ux * ux + uy * uy)) / r)
        return 0.5 * laplacian

    def potential(self, x, y):
        _, _, xe, _, _ = self._scaled(x, y)
        return 2.0 * self.kappa_s * self.scale_radius**2 * _h_function(xe)

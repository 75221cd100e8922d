"""Singular isothermal deflectors: the sphere (SIS) and the ellipsoid (SIE)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .base import HomogeneousIsothermal, MassModel, check_axis_ratio, check_center, check_positive, rotate_back, rotate_into_frame

# Radii below this (arcsec) are raised to it, so the centre gives finite values without warnings.
# 1e-9 arcsec is far below any pixel; the singular profiles are unphysical there anyway.
CENTRAL_FLOOR = 1e-9

__all__ = ["SIS", "SIE", "sie_deflection_in_frame", "sie_convergence_in_frame"]


def sie_deflection_in_frame(einstein_radius, q, xp, yp):
    """The SIE deflection ``(alpha_x', alpha_y')`` in the frame of its major axis (the formula of
    :class:`SIE`), broadcasting over every argument, so one call serves one lens on many points or
    many lenses (one a row) on their own points.  ``q == 1`` gives the SIS."""
    b, q = np.asarray(einstein_radius, dtype=float), np.asarray(q, dtype=float)
    sphere = q == 1.0
    with np.errstate(divide="ignore", invalid="ignore"):
        e = np.sqrt(1.0 - q * q)
        w = np.maximum(np.sqrt(q * q * xp * xp + yp * yp), CENTRAL_FLOOR)
        pre = b * np.sqrt(q) / e
        # |e y'/w| <= e < 1, so arctanh stays finite.
        axp, ayp = pre * np.arctan(e * xp / w), pre * np.arctanh(e * yp / w)
    if np.any(sphere):
        r = np.maximum(np.hypot(xp, yp), CENTRAL_FLOOR)
        axp, ayp = np.where(sphere, b * xp / r, axp), np.where(sphere, b * yp / r, ayp)
    return axp, ayp


def sie_convergence_in_frame(einstein_radius, q, xp, yp):
    """``kappa = (b / 2) / sqrt(q x'^2 + y'^2 / q)``, broadcasting like :func:`sie_deflection_in_frame`."""
    q = np.asarray(q, dtype=float)
    return 0.5 * np.asarray(einstein_radius, dtype=float) / np.maximum(np.sqrt(q * xp * xp + yp * yp / q), CENTRAL_FLOOR)


@dataclass(frozen=True)
class SIS(HomogeneousIsothermal, MassModel):
    """Singular isothermal sphere.

    ``kappa = einstein_radius / (2 r)``, ``alpha = einstein_radius * (x, y) / r``,
    ``psi = einstein_radius * r`` (Schneider, Ehlers & Falco 1992, sect. 8.1.4).

    Parameters
    ----------
    einstein_radius : float
        arcsec, > 0.  From a velocity dispersion: see :func:`simlens.cosmology.einstein_radius_sis`.
    center : (float, float)
        arcsec, default (0, 0).
    """

    einstein_radius: float
    center: tuple = (0.0, 0.0)

    def __post_init__(self):
        object.__setattr__(self, "einstein_radius", check_positive(self.einstein_radius, "einstein_radius", "SIS"))
        object.__setattr__(self, "center", check_center(self.center, "SIS"))

    def _offsets(self, x, y):
        dx = np.asarray(x, dtype=float) - self.center[0]
        dy = np.asarray(y, dtype=float) - self.center[1]
        r = np.maximum(np.hypot(dx, dy), CENTRAL_FLOOR)
        return dx, dy, r

    def deflection(self, x, y):
        dx, dy, r = self._offsets(x, y)
        return self.einstein_radius * dx / r, self.einstein_radius * dy / r

    def convergence(self, x, y):
        _, _, r = self._offsets(x, y)
        return 0.5 * self.einstein_radius / r

    def potential(self, x, y):
        _, _, r = self._offsets(x, y)
        return self.einstein_radius * r


@dataclass(frozen=True)
class SIE(HomogeneousIsothermal, MassModel):
    """Singular isothermal ellipsoid.

    In the frame rotated by ``angle`` (major axis along x'):

        kappa = (einstein_radius / 2) / sqrt(q x'^2 + y'^2 / q)

    so the Einstein radius equals that of the SIS with the same velocity dispersion
    (the "intermediate-axis" normalisation).  Deflection in closed form
    (Kormann, Schneider & Bartelmann 1994, A&A 284, 285), with
    ``s = sqrt(1 - q^2)`` and ``w = sqrt(q^2 x'^2 + y'^2)``:

        alpha_x' = einstein_radius sqrt(q) / s * arctan(s x' / w)
        alpha_y' = einstein_radius sqrt(q) / s * arctanh(s y' / w)

    and ``psi = x' alpha_x' + y' alpha_y'`` (isothermal profiles are homogeneous of degree one).
    ``q = 1`` exactly gives the SIS; the centre gives finite values.

    Parameters
    ----------
    einstein_radius : float
        arcsec, > 0.
    q : float
        axis ratio (minor / major) in (0, 1].
    angle : float
        degrees counter-clockwise from +x; the major axis lies along it.
    center : (float, float)
        arcsec, default (0, 0).
    """

    einstein_radius: float
    q: float = 1.0
    angle: float = 0.0
    center: tuple = (0.0, 0.0)

    def __post_init__(self):
        object.__setattr__(self, "einstein_radius", check_positive(self.einstein_radius, "einstein_radius", "SIE"))
        q = check_axis_ratio(self.q, "SIE")
        object.__setattr__(self, "q", q)
        object.__setattr__(self, "angle", float(self.angle))
        object.__setattr__(self, "center", check_center(self.center, "SIE"))

    def _frame(self, x, y):
        xp, yp, c, s = rotate_into_frame(x, y, self.center, self.angle)
        return xp, yp, c, s

    def deflection(self, x, y):
        xp, yp, c, s = self._frame(x, y)
        return rotate_back(*sie_deflection_in_frame(self.einstein_radius, self.q, xp, yp), c, s)

    def convergence(self, x, y):
        xp, yp, _, _ = self._frame(x, y)
        return sie_convergence_in_frame(self.einstein_radius, self.q, xp, yp)


    def potential(self, x, y):
        ax, ay = self.deflection(x, y)
        dx = np.asarray(x, dtype=float) - self.center[0]
        dy = np.asarray(y, dtype=float) - self.center[1]
        return dx * ax + dy * ay

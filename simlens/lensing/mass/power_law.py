"""Elliptical power-law deflector (EPL), closed form of Tessore & Metcalf (2015)."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .base import MassModel, check_axis_ratio, check_center, check_positive, rotate_back, rotate_into_frame

CENTRAL_FLOOR = 1e-9  # arcsec
SERIES_TOLERANCE = 1e-14


@dataclass(frozen=True)
class PowerLaw(MassModel):
    """Elliptical power-law mass distribution.

    In the frame rotated by ``angle`` (major axis along x'), with ``R = sqrt(q^2 x'^2 + y'^2)``,
    ``t = slope - 1`` and ``b = einstein_radius * sqrt(q)``:

        kappa = (2 - t) / 2 * (b / R)^t

    (Tessore & Metcalf 2015, A&A 580, A79, eq. 1).  ``slope`` is the logarithmic slope of the 3D
    density (``rho ~ r^-slope``); ``slope = 2`` is the isothermal case and equals
    :class:`~simlens.mass.SIE` exactly.  The isodensity ellipse ``R = b`` encloses mean convergence
    one and the area ``pi einstein_radius^2`` (the intermediate-axis Einstein radius, as for the SIE).

    Deflection (their eqs. 13 and 29), with the elliptical angle ``phi`` (``R e^{i phi} = q x' + i y'``)
    and ``f = (1 - q) / (1 + q)``:

        alpha = 2 b / (1 + q) * (b / R)^(t - 1) * Omega(phi),
        Omega = sum_n Omega_n,  Omega_0 = e^{i phi},
        Omega_n = -f (2n - (2 - t)) / (2n + (2 - t)) e^{2 i phi} Omega_{n-1},

    summed until the terms fall below 1e-14 (at most a few hundred terms for q >= 0.05).
    ``psi = (x' alpha_x' + y' alpha_y') / (2 - t)`` (the potential is homogeneous of degree 2 - t).

    Parameters
    ----------
    einstein_radius : arcsec, > 0.
    slope : 3D logarithmic density slope in (1, 3); 2 is isothermal.
    q : axis ratio in (0, 1].   angle : degrees CCW from +x.   center : arcsec.
    """

    einstein_radius: float
    slope: float = 2.0
    q: float = 1.0
    angle: float = 0.0
    center: tuple = (0.0, 0.0)

    def __post_init__(self):
        object.__setattr__(self, "einstein_radius", check_positive(self.einstein_radius, "einstein_radius", "PowerLaw"))
        slope = float(self.slope)
        if not (1.0 < slope < 3.0):
            raise ValueError(f"PowerLaw: slope must be in (1, 3), got {slope}")
        q = check_axis_ratio(self.q, "PowerLaw")
        object.__setattr__(self, "slope", slope)
        object.__setattr__(self, "q", q)
        object.__setattr__(self, "angle", float(self.angle))
        object.__setattr__(self, "center", check_center(self.center, "PowerLaw"))

    @property
    def _b(self) -> float:
        return self.einstein_radius * math.sqrt(self.q)

    def _elliptical(self, xp, yp):
        r = np.maximum(np.sqrt(self.q**2 * xp * xp + yp * yp), CENTRAL_FLOOR)
        return r, np.arctan2(yp, self.q * xp)

    def _omega(self, phi) -> np.ndarray:
        t, q = self.slope - 1.0, self.q
        f = (1.0 - q) / (1.0 + q)
        term = np.exp(1j * phi)
        total = term.copy()
        rotation = np.exp(2j * phi)
        n = 1
        while True:
            term = -f * (2 * n - (2 - t)) / (2 * n + (2 - t)) * rotation * term
            total += term
            if f == 0.0 or np.max(np.abs(term), initial=0.0) < SERIES_TOLERANCE:
                return total
            n += 1

    def deflection(self, x, y):
        xp, yp, c, s = rotate_into_frame(x, y, self.center, self.angle)
        r, phi = self._elliptical(xp, yp)
        t, b = self.slope - 1.0, self._b
        alpha = 2.0 * b / (1.0 + self.q) * (b / r) ** (t - 1.0) * self._omega(phi)
        return rotate_back(alpha.real, alpha.imag, c, s)

    def convergence(self, x, y):
        xp, yp, _, _ = rotate_into_frame(x, y, self.center, self.angle)
        r, _ = self._elliptical(xp, yp)
        t = self.slope - 1.0
        return (2.0 - t) / 2.0 * (self._b / r) ** t

    def potential(self, x, y):
        ax, ay = self.deflection(x, y)
        dx = np.asarray(x, dtype=float) - self.center[0]
        dy = np.asarray(y, dtype=float) - self.center[1]
        return (dx * ax + dy * ay) / (3.0 - self.slope)

"""Point-mass deflector."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .base import MassModel, check_center, check_positive

CENTRAL_FLOOR = 1e-9  # arcsec: below this the deflection is set to zero (finite at the centre)


@dataclass(frozen=True)
class PointMass(MassModel):
    """Point mass (Schneider, Ehlers & Falco 1992, sect. 8.1.2).

    ``alpha = einstein_radius^2 * (x, y) / r^2``, ``psi = einstein_radius^2 ln r``;
    the convergence is a delta function at the centre and is returned as zero everywhere.
    ``einstein_radius^2 = (4 G M / c^2) D_ls / (D_l D_s)``.

    Parameters
    ----------
    einstein_radius : float
        arcsec, > 0.
    center : (float, float)
        arcsec, default (0, 0).
    """

    einstein_radius: float
    center: tuple = (0.0, 0.0)

    def __post_init__(self):
        object.__setattr__(self, "einstein_radius", check_positive(self.einstein_radius, "einstein_radius", "PointMass"))
        object.__setattr__(self, "center", check_center(self.center, "PointMass"))

    def _offsets(self, x, y):
        dx = np.asarray(x, dtype=float) - self.center[0]
        dy = np.asarray(y, dtype=float) - self.center[1]
        return dx, dy, dx * dx + dy * dy

    def deflection(self, x, y):
        dx, dy, r2 = self._offsets(x, y)
        safe = r2 > CENTRAL_FLOOR**2
        factor = np.where(safe, self.einstein_radius**2 / np.where(safe, r2, 1.0), 0.0)
        return factor * dx, factor * dy

    def convergence(self, x, y):
        dx, _, _ = self._offsets(x, y)
        return np.zeros_like(dx)

    def potential(self, x, y):
        _, _, r2 = self._offsets(x, y)
        return 0.5 * self.einstein_radius**2 * np.log(np.maximum(r2, CENTRAL_FLOOR**2))

"""Isothermal multipole perturbations (boxy and disky isodensities, lopsidedness)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .base import HomogeneousIsothermal, MassModel, check_center

CENTRAL_FLOOR = 1e-9  # arcsec


@dataclass(frozen=True)
class Multipole(HomogeneousIsothermal, MassModel):
    """An isothermal multipole of order ``m``:

        kappa = (strength * einstein_radius / (2 r)) * cos(m (phi - angle))

    a perturbation added to a main deflector (its convergence alone is negative in places).  The
    potential is homogeneous of degree one, ``psi = r A cos(m (phi - angle))`` with
    ``A = strength * einstein_radius / (1 - m^2)`` (from ``laplacian(psi) = 2 kappa``; the same form as
    e.g. Van de Vyvere et al. 2022, A&A 659, A127).  For ``m = 4`` an angle along the main lens's
    major axis makes disky isodensities and one 45 degrees away boxy ones; ``m = 3`` is lopsided.

    Parameters
    ----------
    order : m, an integer >= 2 (m = 1 is a translation, not a shape).
    strength : a_m, dimensionless (a few per cent for real galaxies).
    einstein_radius : arcsec, the main lens's (sets the scale).   angle : degrees CCW from +x.
    """

    order: int
    strength: float
    einstein_radius: float
    angle: float = 0.0
    center: tuple = (0.0, 0.0)

    def __post_init__(self):
        if int(self.order) != self.order or self.order < 2:
            raise ValueError(f"Multipole: order must be an integer >= 2, got {self.order}")
        object.__setattr__(self, "order", int(self.order))
        object.__setattr__(self, "strength", float(self.strength))
        if not self.einstein_radius > 0:
            raise ValueError(f"Multipole: einstein_radius must be > 0, got {self.einstein_radius}")
        object.__setattr__(self, "einstein_radius", float(self.einstein_radius))
        object.__setattr__(self, "angle", float(self.angle))
        object.__setattr__(self, "center", check_center(self.center, "Multipole"))

    def _polar(self, x, y):
        dx = np.asarray(x, dtype=float) - self.center[0]
        dy = np.asarray(y, dtype=float) - self.center[1]
        r = np.maximum(np.hypot(dx, dy), CENTRAL_FLOOR)
        return r, np.arctan2(dy, dx)

    @property
    def _amplitude(self) -> float:
        return self.strength * self.einstein_radius / (1.0 - self.order**2)

    def deflection(self, x, y):
        r, phi = self._polar(x, y)
        m, a = self.order, self._amplitude
        f = a * np.cos(m * (phi - np.radians(self.angle)))
        df = -a * m * np.sin(m * (phi - np.radians(self.angle)))
        c, s = np.cos(phi), np.sin(phi)
        return c * f - s * df, s * f + c * df


    def convergence(self, x, y):
        r, phi = self._polar(x, y)
        return 0.5 * self.strength * self.einstein_radius / r * np.cos(self.order * (phi - np.radians(self.angle)))

    def potential(self, x, y):
        r, phi = self._polar(x, y)
        return r * self._amplitude * np.cos(self.order * (phi - np.radians(self.angle)))

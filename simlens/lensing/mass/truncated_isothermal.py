"""Truncated singular isothermal sphere (pseudo-Jaffe), the usual subhalo model."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .base import MassModel, check_center, check_positive

CENTRAL_FLOOR = 1e-9  # arcsec


@dataclass(frozen=True)
class TruncatedSIS(MassModel):
    """SIS truncated at ``truncation_radius`` a (pseudo-Jaffe; e.g. Keeton 2001, sect. 3.3):

        kappa = (b / 2) (1 / r - 1 / sqrt(r^2 + a^2))
        alpha = b (r + a - sqrt(r^2 + a^2)) / r          (radial)
        psi   = b (r - sqrt(r^2 + a^2) + a ln(a + sqrt(r^2 + a^2)))

    with finite total mass: far away it deflects as a point mass of Einstein radius ``sqrt(b a)``.

    Parameters
    ----------
    einstein_radius : b, arcsec, > 0 (of the untruncated SIS).
    truncation_radius : a, arcsec, > 0.   center : arcsec.
    """

    einstein_radius: float
    truncation_radius: float
    center: tuple = (0.0, 0.0)

    def __post_init__(self):
        object.__setattr__(self, "einstein_radius", check_positive(self.einstein_radius, "einstein_radius", "TruncatedSIS"))
        object.__setattr__(self, "truncation_radius",
                           check_positive(self.truncation_radius, "truncation_radius", "TruncatedSIS"))
        object.__setattr__(self, "center", check_center(self.center, "TruncatedSIS"))

    def _r(self, x, y):
        dx = np.asarray(x, dtype=float) - self.center[0]
        dy = np.asarray(y, dtype=float) - self.center[1]
        return dx, dy, np.maximum(np.hypot(dx, dy), CENTRAL_FLOOR)

    def deflection(self, x, y):
        dx, dy, r = self._r(x, y)
        b, a = self.einstein_radius, self.truncation_radius
        s = np.sqrt(r * r + a * a)
        factor = b * (r + a - s) / (r * r)  # = alpha(r) / r
        return factor * dx, factor * dy

    def convergence(self, x, y):
        _, _, r = self._r(x, y)
        a = self.truncation_radius
        return 0.5 * self.einstein_radius * (1.0 / r - 1.0 / np.sqrt(r * r + a * a))

    def potential(self, x, y):
        _, _, r = self._r(x, y)
        b, a = self.einstein_radius, self.truncation_radius
        s = np.sqrt(r * r + a * a)
        return b * (r - s + a * np.log(a + s))

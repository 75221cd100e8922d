"""Cored (softened) isothermal ellipsoid."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .base import MassModel, check_axis_ratio, check_center, check_positive, rotate_back, rotate_into_frame


@dataclass(frozen=True)
class CoredIsothermal(MassModel):
    """Isothermal ellipsoid with a core (non-singular isothermal ellipsoid).

    In the frame rotated by ``angle``, with ``b = einstein_radius sqrt(q)``, core radius ``s`` and
    ``w = sqrt(q^2 (s^2 + x'^2) + y'^2)``:

        kappa = (b / 2) / w

    which is the :class:`~simlens.mass.SIE` for ``s = 0``.  Deflection in closed form
    (Kormann, Schneider & Bartelmann 1994; Keeton & Kochanek 1998), ``e = sqrt(1 - q^2)``:

        alpha_x' = b / e * arctan(e x' / (w + s))
        alpha_y' = b / e * arctanh(e y' / (w + q^2 s))

    and the potential ``psi = x' alpha_x' + y' alpha_y' - b s ln((w + s)^2 + e^2 x'^2)^(1/2)
    + b s ln((1 + q) s)`` (Keeton 2001, astro-ph/0102341, eq. for the softened isothermal).
    ``einstein_radius`` is that of the singular model with the same normalisation; the core makes
    the true Einstein radius smaller.

    Parameters
    ----------
    einstein_radius : arcsec, > 0.   core_radius : arcsec, > 0.
    q : (0, 1].   angle : degrees CCW from +x.   center : arcsec.
    """

    einstein_radius: float
    core_radius: float
    q: float = 1.0
    angle: float = 0.0
    center: tuple = (0.0, 0.0)

    def __post_init__(self):
        object.__setattr__(self, "einstein_radius",
                           check_positive(self.einstein_radius, "einstein_radius", "CoredIsothermal"))
        object.__setattr__(self, "core_radius", check_positive(self.core_radius, "core_radius", "CoredIsothermal"))
        q = check_axis_ratio(self.q, "CoredIsothermal")
        object.__setattr__(self, "q", q)
        object.__setattr__(self, "angle", float(self.angle))
        object.__setattr__(self, "center", check_center(self.center, "CoredIsothermal"))

    def _frame(self, x, y):
        xp, yp, c, s = rotate_into_frame(x, y, self.center, self.angle)
        q, sc = self.q, self.core_radius
        w = np.sqrt(q * q * (sc * sc + xp * xp) + yp * yp)
        return xp, yp, w, c, s

    def deflection(self, x, y):
        xp, yp, w, c, s = self._frame(x, y)
        q, sc, b = self.q, self.core_radius, self.einstein_radius * math.sqrt(self.q)
        if q == 1.0:
            # Circular limit: alpha = b (sqrt(s^2 + r^2) - s) / r along r.
            r2 = xp * xp + yp * yp
            factor = np.where(r2 > 0, b / (w + sc), 0.0)  # (w - s) / r^2 = 1 / (w + s)
            return rotate_back(factor * xp, factor * yp, c, s)
        e = math.sqrt(1.0 - q * q)
        axp = b / e * np.arctan(e * xp / (w + sc))
        ayp = b / e * np.arctanh(e * yp / (w + q * q * sc))
        return rotate_back(axp, ayp, c, s)

    def convergence(self, x, y):
        _, _, w, _, _ = self._frame(x, y)
        return 0.5 * self.einstein_radius * math.sqrt(self.q) / w

    def potential(self, x, y):
        xp, yp, w, c, s = self._frame(x, y)
        ax, ay = self.deflection(x, y)
        axp, ayp = c * ax + s * ay, -s * ax + c * ay
        q, sc, b = self.q, self.core_radius, self.einstein_radius * math.sqrt(self.q)
        e2 = 1.0 - q * q
        return (xp * axp + yp * ayp - b * sc * 0.5 * np.log((w + sc) ** 2 + e2 * xp * xp)
                + b * sc * math.log((1.0 + q) * sc))

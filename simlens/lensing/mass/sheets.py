"""Perturbations without a centre of mass of their own: external shear and a convergence sheet."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .base import MassModel, check_center, check_positive

__all__ = ["ExternalShear", "ConvergenceSheet", "shear_components"]


def shear_components(gamma, angle):
    """``(g1, g2) = gamma (cos 2 angle, sin 2 angle)`` (angle in degrees), broadcasting."""
    two_phi = 2.0 * np.radians(angle)
    return gamma * np.cos(two_phi), gamma * np.sin(two_phi)


@dataclass(frozen=True)
class ExternalShear(MassModel):
    """External shear of strength ``gamma`` at position angle ``angle``.

    ``psi = (gamma / 2) r^2 cos 2(phi - angle)``, i.e. with ``g1 = gamma cos 2 angle`` and
    ``g2 = gamma sin 2 angle``: ``psi = (g1 (x^2 - y^2) + 2 g2 x y) / 2`` and
    ``alpha = (g1 x + g2 y, g2 x - g1 y)``; zero convergence (SEF 1992, sect. 8.1.7).
    The Jacobian ``[[1 - g1, -g2], [-g2, 1 + g1]]`` has eigenvalue ``1 - gamma`` along ``angle``, so
    images are stretched along ``angle``.

    Parameters
    ----------
    gamma : float
        shear strength, >= 0.
    angle : float
        degrees counter-clockwise from +x.
    center : (float, float)
        arcsec, origin of the expansion, default (0, 0).
    """

    gamma: float
    angle: float = 0.0
    center: tuple = (0.0, 0.0)

    def __post_init__(self):
        object.__setattr__(self, "gamma", check_positive(self.gamma, "gamma", "ExternalShear", allow_zero=True))
        object.__setattr__(self, "angle", float(self.angle))
        object.__setattr__(self, "center", check_center(self.center, "ExternalShear"))

    @property
    def components_g1_g2(self) -> tuple[float, float]:
        return shear_components(self.gamma, self.angle)

    def _offsets(self, x, y):
        return (np.asarray(x, dtype=float) - self.center[0], np.asarray(y, dtype=float) - self.center[1])

    def deflection(self, x, y):
        dx, dy = self._offsets(x, y)
        g1, g2 = self.components_g1_g2
        return g1 * dx + g2 * dy, g2 * dx - g1 * dy

    uniform_hessian = True  # the same Hessian everywhere: see simlens.caustics

    def deflection_and_hessian(self, x, y, step: float = 0.0):
        """Analytic: ``psi_xx = g1``, ``psi_xy = g2``, ``psi_yy = -g1``."""
        ax, ay = self.deflection(x, y)
        g1, g2 = self.components_g1_g2
        return ax, ay, np.full_like(ax, g1), np.full_like(ax, g2), np.full_like(ax, -g1)

    def convergence(self, x, y):
        dx, _ = self._offsets(x, y)
        return np.zeros_like(dx)

    def potential(self, x, y):
        dx, dy = self._offsets(x, y)
        g1, g2 = self.components_g1_g2
        return 0.5 * (g1 * (dx * dx - dy * dy) + 2.0 * g2 * dx * dy)


@dataclass(frozen=True)
class ConvergenceSheet(MassModel):
    """A uniform sheet of convergence ``kappa``: ``alpha = kappa (x, y)``, ``psi = kappa r^2 / 2``.

    Used for the mass-sheet degeneracy and for the mean convergence of the line of sight.
    ``kappa`` may be negative (an under-dense line of sight)."""

    kappa: float
    center: tuple = (0.0, 0.0)

    def __post_init__(self):
        kappa = float(self.kappa)
        if not np.isfinite(kappa):
            raise ValueError(f"ConvergenceSheet: kappa must be finite, got {kappa}")
        object.__setattr__(self, "kappa", kappa)
        object.__setattr__(self, "center", check_center(self.center, "ConvergenceSheet"))

    def deflection(self, x, y):
        dx = np.asarray(x, dtype=float) - self.center[0]
        dy = np.asarray(y, dtype=float) - self.center[1]
        return self.kappa * dx, self.kappa * dy

    def convergence(self, x, y):
        return np.full_like(np.asarray(x, dtype=float), self.kappa)

    uniform_hessian = True

    def deflection_and_hessian(self, x, y, step: float = 0.0):
        """Analytic: ``psi_xx = psi_yy = kappa``, ``psi_xy = 0``."""
        ax, ay = self.deflection(x, y)
        k = np.full_like(ax, self.kappa)
        return ax, ay, k, np.zeros_like(ax), k.copy()

    def potential(self, x, y):
        dx = np.asarray(x, dtype=float) - self.center[0]
        dy = np.asarray(y, dtype=float) - self.center[1]
        return 0.5 * self.kappa * (dx * dx + dy * dy)

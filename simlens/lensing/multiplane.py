"""Deflectors at several redshifts: the recursive multi-plane lens equation.

Each plane's model is given, as every simlens deflector, as the *scaled* deflection for the final
source redshift, ``alpha_i = (D_is / D_s) alpha_hat_i``.  The ray reaching plane ``j`` is then
(e.g. Schneider, Ehlers & Falco 1992, ch. 9; Petters, Levine & Wambsganss 2001)

    theta_j = theta_1 - sum_{i < j} (D_ij D_s) / (D_j D_is) alpha_i(theta_i)

and ``beta = theta_{source}``, for which the factor is 1: with one plane this is the single-plane
lens equation.  Distances are angular-diameter distances from astropy.cosmology.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..cosmology import angular_diameter_distance_between
from .mass.base import MassModel

__all__ = ["MultiPlaneLens"]


@dataclass(frozen=True)
class MultiPlaneLens(MassModel):
    """Deflectors at ``redshifts`` (ascending), each normalised for ``z_source``.

    ``deflection`` returns the effective ``theta - beta``; ``ray_shoot``, ``hessian`` and
    ``magnification`` work as for single planes, so the renderer and the image finder take it as it
    is.  Multi-plane lensing has no single potential (the effective deflection has a curl), so
    ``potential`` raises, and ``convergence`` is the effective one, ``1 - trace(A) / 2``.
    """

    planes: tuple  # of MassModel
    redshifts: tuple
    z_source: float
    cosmology: object

    def __post_init__(self):
        if len(self.planes) != len(self.redshifts) or not self.planes:
            raise ValueError("MultiPlaneLens: give one redshift per plane, at least one plane")
        z = [float(v) for v in self.redshifts]
        if any(b <= a for a, b in zip(z, z[1:])):
            raise ValueError(f"MultiPlaneLens: redshifts must increase, got {z}")
        if not z[-1] < self.z_source:
            raise ValueError(f"MultiPlaneLens: the source (z = {self.z_source}) must lie behind every plane")
        object.__setattr__(self, "redshifts", tuple(z))
        d_s = angular_diameter_distance_between(self.cosmology, 0.0, self.z_source)
        factors = {}
        for j in range(len(z) + 1):
            z_j = self.z_source if j == len(z) else z[j]
            d_j = angular_diameter_distance_between(self.cosmology, 0.0, z_j)
            for i in range(j):
                d_ij = angular_diameter_distance_between(self.cosmology, z[i], z_j)
                d_is = angular_diameter_distance_between(self.cosmology, z[i], self.z_source)
                factors[(i, j)] = d_ij * d_s / (d_j * d_is)
        object.__setattr__(self, "_factors", factors)

    def ray_shoot(self, x, y):
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        n = len(self.planes)
        positions = [(x, y)]
        deflections = []
        for j in range(1, n + 1):
            if j - 1 < n:
                deflections.append(self.planes[j - 1].deflection(*positions[j - 1]))
            tx, ty = x.copy(), y.copy()
            for i in range(j):
                f = self._factors[(i, j)]
                tx = tx - f * deflections[i][0]
                ty = ty - f * deflections[i][1]
            positions.append((tx, ty))
        return positions[-1]

    def deflection(self, x, y):
        bx, by = self.ray_shoot(x, y)
        return np.asarray(x, dtype=float) - bx, np.asarray(y, dtype=float) - by

    def convergence(self, x, y):
        psi_xx, _, psi_yy = self.hessian(x, y)
        return 0.5 * (psi_xx + psi_yy)

    def potential(self, x, y):
        raise TypeError("a multi-plane lens has no single lensing potential; use ray_shoot or deflection")

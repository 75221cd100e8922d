"""A deflector rescaled to another source redshift."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .base import MassModel


@dataclass(frozen=True)
class ScaledDeflector(MassModel):
    """``factor`` times the scaled deflection, convergence and potential of ``model``.

    simlens models are normalised for one source redshift (``alpha = D_ls / D_s alpha_hat``); the
    same lens for a source at another redshift is this one with
    ``factor = (D_ls' / D_s') / (D_ls / D_s)`` (Schneider, Ehlers & Falco 1992, eq. 5.7)."""

    model: MassModel
    factor: float

    def __post_init__(self):
        if not (np.isfinite(self.factor) and self.factor >= 0):
            raise ValueError(f"ScaledDeflector: factor must be finite and >= 0, got {self.factor}")

    def deflection(self, x, y):
        ax, ay = self.model.deflection(x, y)
        return self.factor * ax, self.factor * ay

    def convergence(self, x, y):
        return self.factor * self.model.convergence(x, y)

    def potential(self, x, y):
        return self.factor * self.model.potential(x, y)

    def deflection_and_hessian(self, x, y, step: float = 1e-4):
        return tuple(self.factor * t for t in self.model.deflection_and_hessian(x, y, step))

"""The deflector interface shared by every mass model, composition with ``+``, and the lensing
Jacobian / magnification derived once for all models.

Conventions (all models):

- Positions ``x, y`` are image-plane angles in arcsec on numpy arrays (any broadcastable shape);
  ``+x`` runs along increasing image column, ``+y`` along increasing row.
- ``deflection(x, y) -> (alpha_x, alpha_y)`` in arcsec (the scaled deflection, so the lens equation
  is ``beta = theta - alpha(theta)``).
- ``convergence(x, y)`` is dimensionless, ``potential(x, y)`` is in arcsec^2 and satisfies
  ``grad(potential) = alpha`` and ``laplacian(potential) = 2 * convergence``
  (Schneider, Ehlers & Falco 1992, ch. 5).
- Orientation ``angle`` is in degrees counter-clockwise from ``+x``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Tuple

import numpy as np

ArrayPair = Tuple[np.ndarray, np.ndarray]

# Finite-difference step (arcsec) for the Jacobian.  Central differences with h = 1e-4 arcsec give
# relative errors ~1e-8 for profiles varying on arcsec scales (truncation h^2, round-off eps/h).
JACOBIAN_STEP = 1e-4


class MassModel:
    """Base class of all deflectors.  Subclasses are frozen dataclasses implementing
    ``deflection``, ``convergence`` and ``potential``."""

    def deflection(self, x, y) -> ArrayPair:
        raise NotImplementedError

    def convergence(self, x, y) -> np.ndarray:
        raise NotImplementedError

    def potential(self, x, y) -> np.ndarray:
        raise NotImplementedError

    # -- composition -------------------------------------------------------------------------
    def __add__(self, other: "MassModel") -> "CompositeMass":
        if not isinstance(other, MassModel):
            return NotImplemented
        return CompositeMass(_components(self) + _components(other))

    # -- derived quantities (shared by all models) -------------------------------------------
    def ray_shoot(self, x, y) -> ArrayPair:
        """Source-plane position ``beta = theta - alpha(theta)`` (arcsec)."""
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        ax, ay = self.deflection(x, y)
        return x - ax, y - ay

    def hessian(self, x, y, step: float = JACOBIAN_STEP):
        """Second derivatives of the potential ``(psi_xx, psi_xy, psi_yy)``, by central differences
        of the deflection (symmetrised in the mixed term)."""
        return self.deflection_and_hessian(x, y, step)[2:]

    def deflection_and_hessian(self, x, y, step: float = JACOBIAN_STEP):
        """``(alpha_x, alpha_y, psi_xx, psi_xy, psi_yy)`` from one call of ``deflection`` on the
        five stencil points stacked together (cheaper than five calls for small arrays)."""
        x, y = np.broadcast_arrays(np.asarray(x, dtype=float), np.asarray(y, dtype=float))
        xs = np.stack([x, x + step, x - step, x, x])
        ys = np.stack([y, y, y, y + step, y - step])
        ax, ay = self.deflection(xs, ys)
        psi_xx = (ax[1] - ax[2]) / (2 * step)
        psi_yy = (ay[3] - ay[4]) / (2 * step)
        psi_xy = 0.5 * ((ay[1] - ay[2]) + (ax[3] - ax[4])) / (2 * step)
        return ax[0], ay[0], psi_xx, psi_xy, psi_yy

    def jacobian_determinant(self, x, y) -> np.ndarray:
        """``det(d beta / d theta) = (1 - psi_xx)(1 - psi_yy) - psi_xy^2``."""
        psi_xx, psi_xy, psi_yy = self.hessian(x, y)
        return (1.0 - psi_xx) * (1.0 - psi_yy) - psi_xy**2

    def magnification(self, x, y) -> np.ndarray:
        """Signed point-source magnification ``1 / det(A)`` (negative for saddle images)."""
        det = self.jacobian_determinant(x, y)
        with np.errstate(divide="ignore"):
            return np.where(det != 0, 1.0 / np.where(det != 0, det, 1.0), np.inf)


@dataclass(frozen=True)
class CompositeMass(MassModel):
    """The sum of several deflectors in one lens plane (``a + b``): deflections, convergences and
    potentials add."""

    components: tuple

    def __post_init__(self):
        if not self.components:
            raise ValueError("CompositeMass needs at least one component")
        for c in self.components:
            if not isinstance(c, MassModel):
                raise TypeError(f"CompositeMass components must be mass models, got {c!r}")

    def deflection(self, x, y) -> ArrayPair:
        ax, ay = self.components[0].deflection(x, y)
        ax, ay = np.array(ax, dtype=float), np.array(ay, dtype=float)
        for c in self.components[1:]:
            bx, by = c.deflection(x, y)
            ax += bx
            ay += by
        return ax, ay

    def convergence(self, x, y) -> np.ndarray:
        return sum(c.convergence(x, y) for c in self.components)

    def potential(self, x, y) -> np.ndarray:
        return sum(c.potential(x, y) for c in self.components)

    def deflection_and_hessian(self, x, y, step: float = JACOBIAN_STEP):
        """The sum of the components' (each analytic where the model has it, else differenced)."""
        total = [np.array(t, dtype=float) for t in self.components[0].deflection_and_hessian(x, y, step)]
        for c in self.components[1:]:
            for t, part in zip(total, c.deflection_and_hessian(x, y, step)):
                t += part
        return tuple(total)


class HomogeneousIsothermal:
    """Mixin for deflectors whose potential is homogeneous of degree one about ``center``
    (``psi = r F(phi)``: the SIE, isothermal multipoles).  Their Hessian has a zero eigenvalue along
    the radius and ``F + F'' = 2 kappa r`` along the tangent ``t``: ``H = 2 kappa t t^T``, i.e.
    ``psi_xx = 2 kappa sin^2 phi``, ``psi_xy = -2 kappa sin phi cos phi``, ``psi_yy = 2 kappa cos^2 phi``
    (for the SIE: its shear equals its convergence; Kormann, Schneider & Bartelmann 1994).  The flag
    lets :mod:`simlens.caustics` take its closed-form route."""

    homogeneous_isothermal = True
    central_floor = 1e-9  # arcsec

    def deflection_and_hessian(self, x, y, step: float = 0.0):
        """Analytic (see the class docstring); ``step`` is ignored."""
        ax, ay = self.deflection(x, y)
        dx = np.asarray(x, dtype=float) - self.center[0]
        dy = np.asarray(y, dtype=float) - self.center[1]
        return (ax, ay) + isothermal_hessian(self.convergence(x, y), dx, dy)


def isothermal_hessian(kappa, dx, dy, floor: float = HomogeneousIsothermal.central_floor):
    """``(psi_xx, psi_xy, psi_yy) = 2 kappa t t^T`` of a potential homogeneous of degree one, at
    offsets ``(dx, dy)`` from its centre (see :class:`HomogeneousIsothermal`); broadcasting."""
    r2 = np.maximum(dx * dx + dy * dy, floor**2)
    two_kappa = 2.0 * kappa
    return two_kappa * dy * dy / r2, -two_kappa * dx * dy / r2, two_kappa * dx * dx / r2


def _components(model: MassModel) -> tuple:
    return model.components if isinstance(model, CompositeMass) else (model,)


def rotate_into_frame(x, y, center, angle_deg):
    """Coordinates relative to ``center`` in the frame whose x' axis lies along ``angle_deg``.

    Returns ``(x', y', cos, sin)`` so callers can rotate vectors back."""
    c, s = np.cos(np.radians(angle_deg)), np.sin(np.radians(angle_deg))
    dx = np.asarray(x, dtype=float) - center[0]
    dy = np.asarray(y, dtype=float) - center[1]
    return c * dx + s * dy, -s * dx + c * dy, c, s


def rotate_back(vx, vy, c, s) -> ArrayPair:
    """Rotate a vector from the model frame back to the image frame."""
    return c * vx - s * vy, s * vx + c * vy


def check_center(center, model: str) -> tuple:
    try:
        cx, cy = (float(v) for v in center)
    except (TypeError, ValueError):
        raise ValueError(f"{model}: center must be a pair (x, y) in arcsec, got {center!r}") from None
    if not (np.isfinite(cx) and np.isfinite(cy)):
        raise ValueError(f"{model}: center must be finite, got {center!r}")
    return (cx, cy)


def check_axis_ratio(q, model: str) -> float:
    q = float(q)
    if not (0.0 < q <= 1.0):
        raise ValueError(f"{model}: q must be in (0, 1], got {q}")
    return q


def check_positive(value, name: str, model: str, allow_zero: bool = False) -> float:
    value = float(value)
    ok = value >= 0 if allow_zero else value > 0
    if not (ok and np.isfinite(value)):
        bound = ">= 0" if allow_zero else "> 0"
        raise ValueError(f"{model}: {name} must be finite and {bound}, got {value}")
    return value

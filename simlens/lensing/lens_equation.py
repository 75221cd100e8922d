"""Solving the lens equation for a point source: image positions and magnifications.

Method: the image plane is covered by a square mesh cut into triangles; each triangle is mapped to
the source plane with the lens equation and every triangle whose image contains the source position
gives a candidate (the standard triangle-mapping method, e.g. Schneider, Ehlers & Falco 1992,
sect. 11.2).  Candidates are then polished with Newton's method on ``beta(theta) = beta_s`` and
merged; a candidate that does not converge (such as the spurious one at the centre of a singular
isothermal profile, which maps to a whole cut) is dropped.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from .mass import MassModel

__all__ = ["ImageSet", "find_images", "fermat_potential", "time_delays"]

NEWTON_ITERATIONS = 40
SOLUTION_TOLERANCE = 1e-9  # arcsec, in the source plane
MERGE_DISTANCE = 1e-5  # arcsec: two solutions closer than this are one image
MAX_MAGNIFICATION = 1e6  # |mu| of an image on a critical curve


@dataclass(frozen=True)
class ImageSet:
    """Images of a point source: positions (arcsec) and signed magnifications."""

    x: np.ndarray
    y: np.ndarray
    magnification: np.ndarray

    def __len__(self) -> int:
        return int(self.x.size)


def _candidates(mass: MassModel, sx: float, sy: float, half_size: float, step: float, center):
    n = max(2, int(np.ceil(2 * half_size / step)) + 1)
    axis = np.linspace(-half_size, half_size, n)
    gx, gy = np.meshgrid(axis + center[0], axis + center[1])
    bx, by = mass.ray_shoot(gx, gy)
    bx -= sx
    by -= sy
    # Cell corners: 00 (i, j), 10 (i, j+1), 11 (i+1, j+1), 01 (i+1, j); two triangles per cell.
    c00 = (bx[:-1, :-1], by[:-1, :-1])
    c10 = (bx[:-1, 1:], by[:-1, 1:])
    c11 = (bx[1:, 1:], by[1:, 1:])
    c01 = (bx[1:, :-1], by[1:, :-1])
    px, py = [], []
    for a, b, c, tri in ((c00, c10, c11, 0), (c00, c11, c01, 1)):
        # The origin lies in triangle (a, b, c) iff the three edge cross products share a sign.
        d1 = a[0] * b[1] - a[1] * b[0]
        d2 = b[0] * c[1] - b[1] * c[0]
        d3 = c[0] * a[1] - c[1] * a[0]
        inside = ((d1 >= 0) & (d2 >= 0) & (d3 >= 0)) | ((d1 <= 0) & (d2 <= 0) & (d3 <= 0))
        rows, cols = np.nonzero(inside)
        # Start Newton at the image-plane centroid of the triangle.
        x0, y0 = gx[rows, cols], gy[rows, cols]
        dx = axis[1] - axis[0]
        if tri == 0:
            px.append(x0 + dx * 2 / 3)
            py.append(y0 + dx / 3)
        else:
            px.append(x0 + dx / 3)
            py.append(y0 + dx * 2 / 3)
    return np.concatenate(px), np.concatenate(py)


def find_images(mass: MassModel, source_x: float, source_y: float,
                windows: Sequence[tuple[float, float]], center=(0.0, 0.0)) -> ImageSet:
    """All images of the point source at ``(source_x, source_y)`` found inside the given windows.

    Parameters
    ----------
    mass : the deflector.
    source_x, source_y : source-plane position (arcsec).
    windows : ``(half_size, step)`` pairs (arcsec): square meshes centred on ``center``; use a
        coarse wide one and a fine one around the Einstein radius.  Images closer together than
        about one step near a critical curve may be missed.
    """
    xs, ys = [], []
    for half_size, step in windows:
        x, y = _candidates(mass, source_x, source_y, half_size, step, center)
        xs.append(x)
        ys.append(y)
    x = np.concatenate(xs)
    y = np.concatenate(ys)
    if x.size == 0:
        return ImageSet(np.empty(0), np.empty(0), np.empty(0))
    limit = max(h for h, _ in windows)
    active = np.ones(x.size, dtype=bool)  # candidates still being iterated
    for _ in range(NEWTON_ITERATIONS):
        if not active.any():
            break
        xa, ya = x[active], y[active]
        ax, ay, psi_xx, psi_xy, psi_yy = mass.deflection_and_hessian(xa, ya)
        fx, fy = xa - ax - source_x, ya - ay - source_y
        a11, a12, a22 = 1.0 - psi_xx, -psi_xy, 1.0 - psi_yy
        det = a11 * a22 - a12 * a12
        safe = np.abs(det) > 1e-12
        det = np.where(safe, det, 1.0)
        step_x = np.where(safe, (a22 * fx - a12 * fy) / det, 0.0)
        step_y = np.where(safe, (-a12 * fx + a11 * fy) / det, 0.0)
        x[active] = xa - step_x
        y[active] = ya - step_y
        done = np.hypot(step_x, step_y) < 1e-3 * SOLUTION_TOLERANCE
        active[np.flatnonzero(active)[done]] = False
    bx, by = mass.ray_shoot(x, y)
    residual = np.hypot(bx - source_x, by - source_y)
    ok = (residual < SOLUTION_TOLERANCE) & (np.abs(x - center[0]) <= limit) & (np.abs(y - center[1]) <= limit)
    x, y = x[ok], y[ok]
    # Merge duplicates (the same image found from neighbouring triangles or windows).
    keep_x, keep_y = [], []
    for xi, yi in sorted(zip(x.tolist(), y.tolist())):
        if not any(abs(xi - kx) < MERGE_DISTANCE and abs(yi - ky) < MERGE_DISTANCE for kx, ky in zip(keep_x, keep_y)):
            keep_x.append(xi)
            keep_y.append(yi)
    x, y = np.array(keep_x), np.array(keep_y)
    mu = mass.magnification(x, y) if x.size else np.empty(0)
    # An image exactly on a critical curve (a source exactly on a caustic, e.g. the centre of an
    # SIS, whose image is the Einstein ring) has infinite point magnification: capped, sign kept.
    mu = np.clip(np.asarray(mu, dtype=float), -MAX_MAGNIFICATION, MAX_MAGNIFICATION)
    return ImageSet(x=x, y=y, magnification=mu)


def fermat_potential(mass: MassModel, x, y, source_x: float, source_y: float) -> np.ndarray:
    """``tau = |theta - beta|^2 / 2 - psi(theta)`` (arcsec^2; Schneider, Ehlers & Falco 1992, eq. 5.45)."""
    x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    return 0.5 * ((x - source_x) ** 2 + (y - source_y) ** 2) - mass.potential(x, y)


def time_delays(mass: MassModel, images: ImageSet, source_x: float, source_y: float,
                days_per_arcsec2: float) -> np.ndarray:
    """Arrival times of the images in days after the first one:
    ``Delta t = (1 + z_l)/c D_l D_s / D_ls Delta tau`` (``days_per_arcsec2`` from
    :meth:`simlens.distances.DistanceTable.fermat_to_days`)."""
    if len(images) == 0:
        return np.empty(0)
    tau = fermat_potential(mass, images.x, images.y, source_x, source_y)
    return (tau - tau.min()) * days_per_arcsec2

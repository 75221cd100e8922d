"""Critical curves and caustics of any mass model, and which source positions are multiply imaged.

Method: along ``n_angles`` rays from the lens centre the Jacobian determinant ``det A`` is sampled
on logarithmically spaced radii; each sign change is refined by bisection to a point of a critical
curve.  The outermost crossing of every ray forms the tangential critical curve, the next one (where
every ray has one) the radial curve.  The lens equation maps them to the caustics.  A singular centre
(isothermal and steeper profiles keep ``|alpha| > 0`` as ``theta -> 0``) has no radial curve; the
image of a tiny circle around the centre, the *cut* (pseudo-caustic), takes its place: crossing it a
source gains or loses one image.  The curves are star-shaped about the centre for the galaxy-scale
lenses simlens makes (one tangential and at most one radial curve); off-centre structure such as a
massive subhalo's own small critical curve is not traced.

Isothermal lenses in external fields -- a sum of models whose potential is homogeneous of degree
one about one centre (SIE, isothermal multipoles) and of models with a uniform Hessian (external
shear, convergence sheet) -- take a closed-form route: along each ray ``det A`` is a quadratic in
``1/r`` (linear, since the isothermal Hessian has rank one), so the tangential curve is solved for
directly at CUT_ANGLES angles, with no scan.  Tests compare both routes.

A source is multiply imaged when it lies inside the tangential caustic, the radial caustic or the
cut (even-odd rule for the tangential caustic, whose cusps may cross the others).  For the SIS the
cut is the circle of radius theta_E and the test is exact.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .mass import MassModel

__all__ = ["CausticSet", "find_caustics", "isothermal_caustics", "inside_polygon", "polygon_area"]

N_ANGLES = 64  # rays for the critical curves
CUT_ANGLES = 256  # points on the cut (deflections only; the SIS cut area is then within 1e-4 of pi theta_E^2)
N_RADII = 32
BISECTION_STEPS = 8  # in log r, then one linear interpolation of det A
# The Jacobian comes from finite differences (JACOBIAN_STEP = 1e-4 arcsec), so the scan starts at
# 1e-2 theta_E; the cut is traced separately, with deflections alone, at 1e-6 theta_E.
INNER_RADIUS_IN_EINSTEIN_RADII = 1e-2
CUT_RADIUS_IN_EINSTEIN_RADII = 1e-6
OUTER_RADIUS_IN_EINSTEIN_RADII = 5.0


@dataclass(frozen=True, eq=False)
class Curve:
    """A closed polygon (arcsec), ``kind`` one of tangential, radial or cut."""

    kind: str
    x: np.ndarray
    y: np.ndarray

    @property
    def area(self) -> float:
        return polygon_area(self.x, self.y)

    @property
    def max_radius(self) -> float:
        return float(np.max(np.hypot(self.x, self.y))) if self.x.size else 0.0


@dataclass(frozen=True, eq=False)
class CausticSet:
    critical_curves: tuple  # of Curve (image plane)
    caustics: tuple  # of Curve (source plane; the cut is listed here only)

    def multiply_imaged(self, x, y) -> np.ndarray:
        """Whether source-plane points lie inside any caustic or the cut."""
        x, y = np.broadcast_arrays(np.asarray(x, float), np.asarray(y, float))
        inside = np.zeros(x.shape, dtype=bool)
        for curve in self.caustics:
            inside |= inside_polygon(x, y, curve.x, curve.y)
        return inside

    @property
    def max_radius(self) -> float:
        """Largest distance of a caustic point from the lens centre (arcsec)."""
        return max((c.max_radius for c in self.caustics), default=0.0)

    def caustic(self, kind: str) -> Curve | None:
        return next((c for c in self.caustics if c.kind == kind), None)


def polygon_area(x, y):
    """Shoelace area of closed polygons whose vertices run along the last axis (absolute value; a
    float for one polygon, an array for rows of them).  Repeated vertices add nothing, so polygons
    of different lengths can share an array, padded with their last vertex."""
    x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    if x.shape[-1] < 3:
        return 0.0 if x.ndim == 1 else np.zeros(x.shape[:-1])
    cross = (np.sum(x[..., :-1] * y[..., 1:] - x[..., 1:] * y[..., :-1], axis=-1)
             + x[..., -1] * y[..., 0] - x[..., 0] * y[..., -1])  # the closing edge
    area = 0.5 * np.abs(cross)
    return float(area) if x.ndim == 1 else area


def inside_polygon(px, py, vx, vy) -> np.ndarray:
    """Even-odd (ray casting) test of points ``(px, py)`` against polygons ``(vx, vy)``.

    The vertices run along the last axis of ``vx, vy``; the points broadcast against the polygons'
    leading axes: points of any shape against one polygon, or one point per row against that row's
    polygon (``px`` of shape ``(rows,)``, ``vx`` of shape ``(rows, n_vertices)``)."""
    px, py = np.asarray(px, float)[..., None], np.asarray(py, float)[..., None]
    x0, y0 = np.asarray(vx, dtype=float), np.asarray(vy, dtype=float)
    x1, y1 = np.roll(x0, -1, axis=-1), np.roll(y0, -1, axis=-1)
    crosses = (y0 > py) != (y1 > py)
    dy = np.where(y1 == y0, 1.0, y1 - y0)  # edges with y1 == y0 never cross
    x_at = x0 + (py - y0) * (x1 - x0) / dy
    return np.count_nonzero(crosses & (px < x_at), axis=-1) % 2 == 1


def _det(mass: MassModel, x, y) -> np.ndarray:
    psi_xx, psi_xy, psi_yy = mass.hessian(x, y)
    return (1.0 - psi_xx) * (1.0 - psi_yy) - psi_xy**2


def _isothermal_in_uniform_field(mass: MassModel, center) -> tuple | None:
    """``(homogeneous parts, uniform parts)`` when the closed-form route applies, else None."""
    parts = mass.components if hasattr(mass, "components") else (mass,)
    homogeneous, uniform = [], []
    for part in parts:
        if getattr(part, "homogeneous_isothermal", False) and tuple(part.center) == tuple(center):
            homogeneous.append(part)
        elif getattr(part, "uniform_hessian", False):
            uniform.append(part)
        else:
            return None
    return (homogeneous, uniform) if homogeneous else None


_UNIT_CIRCLE = (np.cos(np.linspace(0.0, 2.0 * np.pi, CUT_ANGLES, endpoint=False)),
                np.sin(np.linspace(0.0, 2.0 * np.pi, CUT_ANGLES, endpoint=False)))


def isothermal_caustics(deflection, hessian, uniform_hessian, uniform_deflection, center, einstein_radius):
    """The closed-form tangential critical curve, its caustic and the cut of isothermal lenses in
    uniform fields, one lens a row.

    ``deflection = (ax, ay)`` and ``hessian = (h11, h12, h22)``: the isothermal parts on the unit
    circle around ``center`` at the CUT_ANGLES angles of ``_UNIT_CIRCLE``, shape (rows, CUT_ANGLES)
    (their deflection does not change along a ray and their Hessian scales as 1/r);
    ``uniform_hessian = (u11, u12, u22)`` and ``uniform_deflection = (ux, uy)`` at the centre: the
    uniform parts (their deflection is linear), shape (rows,); ``center`` and ``einstein_radius``
    broadcast against (rows,).  Returns ``(ok, critical, caustic, cut, has_cut)``: ok (rows,) where
    the route applies, the curves as (x, y) pairs of shape (rows, CUT_ANGLES), and which rows have
    a cut that matters (one reaching beyond 1 % of theta_E)."""
    (ax, ay), (h11, h12, h22) = deflection, hessian
    u11, u12, u22 = (np.asarray(u, dtype=float)[:, None] for u in uniform_hessian)
    ux0, uy0 = (np.asarray(u, dtype=float)[:, None] for u in uniform_deflection)
    cx, cy = (np.broadcast_to(np.asarray(c, dtype=float), u11.shape[:1])[:, None] for c in center)
    theta = np.asarray(einstein_radius, dtype=float)
    cos, sin = _UNIT_CIRCLE
    m11, m12, m22 = 1.0 - u11, -u12, 1.0 - u22
    det_m = m11 * m22 - m12 * m12
    # det A(r) = det_m - b_coef / r + c2 / r^2, with c2 = det H1 (zero up to round-off)
    b_coef = m11 * h22 + m22 * h11 - 2.0 * m12 * h12
    c2 = h11 * h22 - h12 * h12
    disc = b_coef * b_coef - 4.0 * c2 * det_m
    ok = (det_m[:, 0] > 0) & ~np.any(disc < 0, axis=1) & ~np.any(b_coef <= 0, axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        r = (b_coef + np.sqrt(np.where(disc < 0, 0.0, disc))) / (2.0 * det_m)
    finite = np.isfinite(r)
    ok &= np.all(finite, axis=1) & (np.max(np.where(finite, r, np.inf), axis=1) < OUTER_RADIUS_IN_EINSTEIN_RADII * theta)
    xc, yc = cx + r * cos, cy + r * sin
    # beta = theta - alpha_iso(direction) - alpha_uniform(theta); at theta -> centre: the cut
    dx, dy = xc - cx, yc - cy
    bx = xc - ax - (ux0 + u11 * dx + u12 * dy)
    by = yc - ay - (uy0 + u12 * dx + u22 * dy)
    cut_x, cut_y = cx - ax - ux0, cy - ay - uy0
    has_cut = np.min(np.hypot(cut_x - cx, cut_y - cy), axis=1) > 0.01 * theta
    return ok, (xc, yc), (bx, by), (cut_x, cut_y), has_cut


def _closed_form(split, center, einstein_radius: float):
    """:func:`isothermal_caustics` for one lens made of model objects; None if it does not apply."""
    homogeneous, uniform = split
    cx, cy = center
    cos, sin = _UNIT_CIRCLE
    ux, uy = cx + cos, cy + sin
    ax_h = ay_h = h11 = h12 = h22 = 0.0
    for part in homogeneous:
        ax, ay, a, b, c = part.deflection_and_hessian(ux, uy)
        ax_h, ay_h, h11, h12, h22 = ax_h + ax, ay_h + ay, h11 + a, h12 + b, h22 + c
    u = np.zeros(5)
    for part in uniform:
        u += [float(v[0]) for v in part.deflection_and_hessian(np.array([cx]), np.array([cy]))]
    ok, curve, caustic, cut, has_cut = isothermal_caustics(
        (np.atleast_2d(ax_h), np.atleast_2d(ay_h)), tuple(np.atleast_2d(h) for h in (h11, h12, h22)),
        u[2:, None], u[:2, None], center, einstein_radius)
    if not ok[0]:
        return None
    caustics = [Curve("tangential", caustic[0][0], caustic[1][0])]
    if has_cut[0]:
        caustics.append(Curve("cut", cut[0][0], cut[1][0]))
    return CausticSet(critical_curves=(Curve("tangential", curve[0][0], curve[1][0]),), caustics=tuple(caustics))


def find_caustics(mass: MassModel, einstein_radius: float, center=(0.0, 0.0),
                  n_angles: int = N_ANGLES, closed_form: bool = True) -> CausticSet:
    """Critical curves and caustics of ``mass`` around ``center``; ``einstein_radius`` (arcsec) sets
    the radii searched (1e-2 to 5 times it).  ``closed_form=False`` forces the scan."""
    cx, cy = center
    split = _isothermal_in_uniform_field(mass, center) if closed_form else None
    if split is not None:
        closed = _closed_form(split, center, einstein_radius)
        if closed is not None:
            return closed
    phi = np.linspace(0.0, 2.0 * np.pi, n_angles, endpoint=False)
    radii = einstein_radius * np.geomspace(INNER_RADIUS_IN_EINSTEIN_RADII, OUTER_RADIUS_IN_EINSTEIN_RADII, N_RADII)
    cos, sin = np.cos(phi)[:, None], np.sin(phi)[:, None]
    gx, gy = cx + radii[None, :] * cos, cy + radii[None, :] * sin
    det = _det(mass, gx, gy)
    change = np.signbit(det[:, :-1]) != np.signbit(det[:, 1:])  # (n_angles, N_RADII - 1)
    counts = change.sum(axis=1)
    curves, caustics = [], []
    if counts.min() >= 1:
        # k-th crossing from outside on every ray, for the crossings every ray has
        order = np.argsort(-np.arange(N_RADII - 1))  # outside first
        reversed_change = change[:, order]
        for rank, kind in ((0, "tangential"), (1, "radial")):
            if counts.min() <= rank:
                break
            index = np.argmax(np.cumsum(reversed_change, axis=1) > rank, axis=1)
            j = order[index]
            lo, hi = radii[j], radii[j + 1]
            det_lo = det[np.arange(n_angles), j]
            for _ in range(BISECTION_STEPS):
                mid = np.sqrt(lo * hi)
                d_mid = _det(mass, cx + mid * cos[:, 0], cy + mid * sin[:, 0])
                same = np.signbit(d_mid) == np.signbit(det_lo)
                lo = np.where(same, mid, lo)
                hi = np.where(same, hi, mid)
                det_lo = np.where(same, d_mid, det_lo)
            d_hi = _det(mass, cx + hi * cos[:, 0], cy + hi * sin[:, 0])
            with np.errstate(divide="ignore", invalid="ignore"):
                t = det_lo / (det_lo - d_hi)
            r = np.where(np.isfinite(t), lo + np.clip(t, 0.0, 1.0) * (hi - lo), np.sqrt(lo * hi))
            xc, yc = cx + r * cos[:, 0], cy + r * sin[:, 0]
            bx, by = mass.ray_shoot(xc, yc)
            curves.append(Curve(kind, xc, yc))
            caustics.append(Curve(kind, bx, by))
    return _with_cut(mass, einstein_radius, center, curves, caustics)


def _with_cut(mass: MassModel, einstein_radius: float, center, curves: list, caustics: list) -> CausticSet:
    cx, cy = center
    # The cut of a singular centre: the image of a tiny circle around it.  It exists when the
    # deflection tends to a finite, non-zero limit there (isothermal centres); shallower profiles
    # have alpha -> 0 (and a radial curve), steeper ones a diverging alpha (no cut that matters).
    if not any(c.kind == "radial" for c in caustics):
        angles = np.linspace(0.0, 2.0 * np.pi, CUT_ANGLES, endpoint=False)
        reach = []
        for factor, step in ((1.0, 1), (100.0, 16)):
            r_cut = CUT_RADIUS_IN_EINSTEIN_RADII * einstein_radius * factor
            a = angles[::step]
            bx, by = mass.ray_shoot(cx + r_cut * np.cos(a), cy + r_cut * np.sin(a))
            reach.append(np.hypot(bx - cx, by - cy))
            if factor == 1.0:
                cut = Curve("cut", bx, by)
        finite = all(np.all(np.isfinite(r)) for r in reach)
        if finite and reach[0].min() > 0.01 * einstein_radius and np.max(reach[0][::16] / reach[1]) < 1.01:
            caustics.append(cut)
    return CausticSet(critical_curves=tuple(curves), caustics=tuple(caustics))

"""Drawing the truth of many systems at once: the geometry phase vectorised across systems.

``PopulationSampler.draw_many(ids)`` returns exactly ``[draw(i) for i in ids]`` -- every system
still draws from its own streams (``system_streams(seed, id, ...)``), in the same order and with the
same calls -- but the arithmetic between the draws runs on arrays holding every pending system:
the bulk geometry batches (deflector population, source counts and redshifts, distance ratios and
the cross-section weight), the Einstein radii, the closed-form caustics of SIE + shear lenses, the
multiply-imaged test of the placement and the caustic areas.  The rest of each candidate
(photometry, lens light, clumps, conditions, sky position, class) is the scalar
``PopulationSampler._finish``.  Only the numbers of the arithmetic done on arrays rather than one
system at a time can differ, in the last bits of transcendental functions (tests/test_block_sampling.py
compares both routes).

The vectorised route covers SIE lenses (with external shear) without subhalos, multipoles or
line-of-sight galaxies, in every placement mode; other recipes are drawn one system at a time
(:func:`block_route_unavailable` says why).
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np

from ..lensing.caustics import _UNIT_CIRCLE, CUT_ANGLES, OUTER_RADIUS_IN_EINSTEIN_RADII, find_caustics, polygon_area
from ..cosmology import ARCSEC_PER_RADIAN
from ..cosmology import C_KM_S
from ..lensing.mass.isothermal import CENTRAL_FLOOR
from ..recipe.distributions import Fixed
from .streams import SYSTEM_STREAMS, grid_cell, system_streams

__all__ = ["draw_many", "block_route_unavailable"]


def block_route_unavailable(sampler) -> str | None:
    """Why ``sampler``'s recipe cannot take the vectorised route (None: it can)."""
    recipe = sampler.recipe
    lens = recipe.lens
    if lens.mass.model != "sie":
        return f"mass model {lens.mass.model!r} (the vectorised caustics are those of SIE + shear)"
    for path, param in (("lens.subhalos.count", lens.subhalos.count),
                        ("lens.multipoles.m3_strength", lens.multipoles.m3_strength),
                        ("lens.multipoles.m4_strength", lens.multipoles.m4_strength),
                        ("lens.line_of_sight.count", lens.line_of_sight.count)):
        if not (isinstance(param, Fixed) and param.value == 0):
            return f"{path} is not 0"
    return None


def draw_many(sampler, ids: Sequence[int]) -> list:
    """``[sampler.draw(i) for i in ids]``, with the geometry of all pending candidates on arrays."""
    ids = [int(i) for i in ids]
    if any(i < 0 for i in ids):
        raise ValueError(f"system_id must be >= 0, got {min(ids)}")
    if block_route_unavailable(sampler) is not None:
        return [sampler.draw(i) for i in ids]
    out = []
    for start in range(0, len(ids), BLOCK_SIZE):  # bounded memory: the caustics of a block are arrays
        out += _draw_block(sampler, ids[start:start + BLOCK_SIZE])
    return out


BLOCK_SIZE = 4096  # systems drawn together


def _draw_block(sampler, ids: list[int]) -> list:
    from .sampler import SelectionExhausted, _exhausted_message

    limit = sampler.recipe.selection.max_candidates
    unique = list(dict.fromkeys(ids))
    candidate = {i: 0 for i in unique}
    rejections = {i: {} for i in unique}
    done: dict = {}
    pending = unique
    while pending:
        streams = [system_streams(sampler.recipe.seed, i, SYSTEM_STREAMS, candidate[i]) for i in pending]
        geometries = _Geometry(sampler, pending, streams).run()
        _photometry_and_light(sampler, geometries, streams)
        still = []
        for i, s, (geometry, failed) in zip(pending, streams, geometries):
            system = None
            if geometry is not None:
                system, failed = sampler._finish(i, candidate[i], s, geometry)
            if isinstance(failed, str):
                failed = {failed: 1}
            total = rejections[i]
            for name, n in (failed or system.rejections).items():
                total[name] = total.get(name, 0) + n
            if system is not None:
                object.__setattr__(system, "rejections", total)
                done[i] = system
                continue
            candidate[i] += 1
            if candidate[i] >= limit:
                raise SelectionExhausted(_exhausted_message(i, limit, total))
            still.append(i)
        pending = still
    return [done[i] for i in ids]


def _photometry_and_light(sampler, geometries: list, streams: list) -> None:
    """The first draws of ``_finish`` for every system with a geometry, on arrays: the source's
    size and colours, the lens light (each from its standard normals of the physics stream, in the
    order _finish draws them) and the time-delay scale; stored in the geometry dicts."""
    rows = [j for j, (g, _) in enumerate(geometries) if g is not None]
    if not rows:
        return
    g = [geometries[j][0] for j in rows]
    source, light = sampler.source_model, sampler.lens_light_model
    n_source = source.normals if source is not None else 0
    n_light = light.NORMALS if light is not None else 0
    normals = np.stack([streams[j]["physics"].standard_normal(size=n_source + n_light) for j in rows])
    z_lens, z_source = np.array([x["z_lens"] for x in g]), np.array([x["z_source"] for x in g])
    if source is not None:
        for x, p in zip(g, source.complete_many([x["anchor_magnitude"] for x in g], z_source, normals[:, :n_source])):
            x["photometry"] = p
    if light is not None:
        drawn = light.draw_many([x["sigma"] for x in g], z_lens, [x["mass_q"] for x in g],
                                [x["mass_angle"] for x in g], normals[:, n_source:])
        for x, one in zip(g, drawn):
            x["light"] = one
    behind = np.array([x["behind"] for x in g])
    days = np.full(len(g), math.nan)
    if behind.any():
        days[behind] = sampler.distances.fermat_to_days(z_lens[behind], z_source[behind])
    for x, d in zip(g, days):
        x["days_per_arcsec2"] = float(d)


class _Geometry:
    """The tries of one candidate for many systems (``PopulationSampler._geometry`` on arrays)."""

    def __init__(self, sampler, ids: list[int], streams: list):
        self.sampler, self.recipe = sampler, sampler.recipe
        self.ids, self.streams = ids, streams
        self.n = len(ids)
        self.queue = _Queue(sampler, [s["physics"] for s in streams])
        self.tries = [dict() for _ in ids]
        self.result: list = [None] * self.n

    # -- parameters --------------------------------------------------------------------------
    def _parameters(self, rows: np.ndarray) -> dict:
        """Every parameter's value for the systems ``rows`` (arrays), as draw_parameters gives them."""
        s = self.sampler
        u = np.stack([self.streams[k]["parameters"].uniform(size=len(s._parameters)) for k in rows])
        values = {path: np.full(rows.size, value) for path, value in s._fixed_values.items()}
        for index, path, param in s._random_parameters:
            values[path] = param.from_uniforms(u[:, index])
        if s._grid_parameters:
            cells = [grid_cell(self.ids[k], s._grid_shape) for k in rows]
            for j, (path, param) in enumerate(s._grid_parameters):
                values[path] = np.array([float(param.at(c[j])) for c in cells])
        return values

    @staticmethod
    def _row(values: dict, j: int) -> dict:
        return {path: float(a[j]) for path, a in values.items()}

    # -- the try loop --------------------------------------------------------------------------
    def run(self) -> list:
        from .sampler import _merge_counts

        s, selection = self.sampler, self.recipe.selection
        active = np.arange(self.n)
        for _ in range(s.TRIES_PER_CANDIDATE):
            if active.size == 0:
                break
            values = self._parameters(active)
            sigma, z_lens, z_source, anchor, ok = self.queue.next(active, values)
            for k in active[~ok]:
                self.result[k] = (None, _merge_counts(self.queue.nonzero_rejections(k), self.tries[k]))
            keep = ok
            active, values = active[keep], {p: a[keep] for p, a in values.items()}
            sigma, z_lens, z_source, anchor = sigma[keep], z_lens[keep], z_source[keep], anchor[keep]
            behind = z_source > z_lens
            ratio = np.where(behind, s.distances.distance_ratio(np.minimum(z_lens, z_source), z_source), 0.0)
            theta_e = 4.0 * math.pi * (sigma / C_KM_S) ** 2 * ratio * ARCSEC_PER_RADIAN
            checks = [dict() for _ in active]
            passed = np.ones(active.size, dtype=bool)
            if selection.einstein_radius is not None:
                lo, hi = selection.einstein_radius
                inside = (lo <= theta_e) & (theta_e <= hi)
                for j in range(active.size):
                    checks[j]["einstein_radius"] = bool(inside[j])
                if selection.enforce:
                    for k in active[~inside]:
                        self.tries[k]["einstein_radius"] = self.tries[k].get("einstein_radius", 0) + 1
                    passed &= inside
            placed = self._place(active, values, theta_e, passed)
            finished = np.zeros(active.size, dtype=bool)
            for j, k in enumerate(active):
                if not passed[j]:
                    continue
                if placed[j] is None:
                    self.tries[k]["placement"] = self.tries[k].get("placement", 0) + 1
                    continue
                if selection.multiply_imaged:
                    checks[j]["multiply_imaged"] = placed[j]["multiply_imaged"]
                    if selection.enforce and not placed[j]["multiply_imaged"]:
                        self.tries[k]["multiply_imaged"] = self.tries[k].get("multiply_imaged", 0) + 1
                        continue
                v = self._row(values, j)
                deflector = dict(mass_model_name="sie", mass_q=v["lens.mass.q"], mass_angle=v["lens.mass.angle"],
                                 mass_slope=2.0, mass_core_radius=0.0, multipoles=(), subhalos=(),
                                 shear_gamma=v["lens.shear.gamma"], shear_angle=v["lens.shear.angle"])
                geometry = dict(
                    v=v, cell=grid_cell(self.ids[k], s._grid_shape), sigma=float(sigma[j]), z_lens=float(z_lens[j]),
                    z_source=float(z_source[j]), anchor_magnitude=float(anchor[j]), behind=bool(behind[j]),
                    ratio=float(ratio[j]), theta_e=float(theta_e[j]), mass_q=v["lens.mass.q"],
                    mass_angle=v["lens.mass.angle"], light=None, composite_truth={}, checks=checks[j],
                    deflector=deflector, line_of_sight=(), placed=placed[j],
                    geometry_rejections=_merge_counts(self.queue.nonzero_rejections(k), self.tries[k]))
                self.result[k] = (geometry, None)
                finished[j] = True
            active = active[~finished]
        for k in active:  # every try used
            self.result[k] = (None, _merge_counts(self.queue.nonzero_rejections(k), self.tries[k]))
        return self.result

    # -- placement (PopulationSampler._place) --------------------------------------------------
    def _place(self, active: np.ndarray, values: dict, theta_e: np.ndarray, passed: np.ndarray) -> list:
        from .sampler import DEFAULT_RADIUS_IN_EINSTEIN_RADII, LENS_MODE_PLACEMENT_TRIES, _uniform_in_disc

        s = self.sampler
        pos = self.recipe.source.position
        mode = s.mode
        out: list = [None] * active.size
        rows = np.flatnonzero(passed)
        if rows.size == 0:
            return out
        caustics = _Caustics(values, theta_e, rows)
        physics = [self.streams[k]["physics"] for k in active]
        if mode == "fixed":
            if pos.x is not None:
                x, y = values["source.position.x"][rows], values["source.position.y"][rows]
                radius = np.hypot(x, y)
            else:
                key = "source.position.radius_in_einstein_radii"
                factor = values[key][rows] if key in values else np.full(rows.size, DEFAULT_RADIUS_IN_EINSTEIN_RADII)
                radius = factor * theta_e[rows]
                x, y = np.empty(rows.size), np.empty(rows.size)
                for i, j in enumerate(rows):
                    x[i], y[i] = _uniform_in_disc(float(radius[i]), physics[j])
            multiple = caustics.multiply_imaged(np.arange(rows.size), x, y)
            for i, j in enumerate(rows):
                out[j] = caustics.placed(i, x[i], y[i], radius[i], False, bool(multiple[i]), mode)
            return out
        reach = caustics.reach()
        if mode == "lens":
            radius = pos.region_radius_in_einstein_radii * theta_e[rows]
        else:
            radius = np.full(rows.size, math.sqrt(3600.0 / (math.pi * s.source_density)))
        widened = reach > radius
        radius = np.maximum(radius, 1.02 * reach)
        tries = 1 if (mode == "sky" or s.deflectors is not None) else LENS_MODE_PLACEMENT_TRIES
        todo = np.arange(rows.size)
        for _ in range(tries):
            if todo.size == 0:
                break
            x, y = np.empty(todo.size), np.empty(todo.size)
            for i, t in enumerate(todo):
                x[i], y[i] = _uniform_in_disc(float(radius[t]), physics[rows[t]])
            multiple = caustics.multiply_imaged(todo, x, y)
            accept = multiple | (mode == "sky")
            for i in np.flatnonzero(accept):
                t = todo[i]
                out[rows[t]] = caustics.placed(t, x[i], y[i], radius[t], bool(widened[t]), bool(multiple[i]), mode)
            todo = todo[~accept]
        return out


class _Caustics:
    """Closed-form tangential caustics and cuts of SIE + shear lenses, for the rows with theta_E > 0
    (the scan of simlens.caustics for any whose closed form does not apply)."""

    def __init__(self, values: dict, theta_e: np.ndarray, rows: np.ndarray):
        theta = theta_e[rows]
        self.lensed = theta > 0
        self.theta = theta
        n = rows.size
        q = values["lens.mass.q"][rows]
        angle = values["lens.mass.angle"][rows]
        gamma = values["lens.shear.gamma"][rows]
        shear_angle = values["lens.shear.angle"][rows]
        self.tangential = (np.zeros((n, CUT_ANGLES)), np.zeros((n, CUT_ANGLES)))
        self.cut = (np.zeros((n, CUT_ANGLES)), np.zeros((n, CUT_ANGLES)))
        self.has_cut = np.zeros(n, dtype=bool)
        self.closed = np.zeros(n, dtype=bool)
        self.scanned: dict = {}
        lensed = np.flatnonzero(self.lensed)
        if lensed.size:
            closed, tx, ty, cx, cy = _closed_form(theta[lensed], q[lensed], angle[lensed], gamma[lensed],
                                                  shear_angle[lensed])
            self.closed[lensed] = closed
            self.tangential[0][lensed], self.tangential[1][lensed] = tx, ty
            self.cut[0][lensed], self.cut[1][lensed] = cx, cy
            self.has_cut[lensed] = closed & (np.min(np.hypot(cx, cy), axis=1) > 0.01 * theta[lensed])
        from .sampler import build_deflector

        for i in np.flatnonzero(self.lensed & ~self.closed):  # the scan, one system at a time
            mass = build_deflector("sie", float(theta[i]), float(q[i]), float(angle[i]), 2.0, 0.0, (), (),
                                   float(gamma[i]), float(shear_angle[i]))
            self.scanned[i] = find_caustics(mass, float(theta[i]))

    def reach(self) -> np.ndarray:
        out = np.where(self.closed, np.max(np.hypot(*self.tangential), axis=1), 0.0)
        out = np.where(self.has_cut, np.maximum(out, np.max(np.hypot(*self.cut), axis=1)), out)
        for i, found in self.scanned.items():
            out[i] = found.max_radius
        return out

    def multiply_imaged(self, index: np.ndarray, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        inside = np.zeros(index.size, dtype=bool)
        closed = self.closed[index]
        if closed.any():
            rows = index[closed]
            hit = _inside(x[closed], y[closed], self.tangential[0][rows], self.tangential[1][rows])
            with_cut = self.has_cut[rows]
            if with_cut.any():
                hit[with_cut] |= _inside(x[closed][with_cut], y[closed][with_cut], self.cut[0][rows[with_cut]],
                                         self.cut[1][rows[with_cut]])
            inside[closed] = hit
        for i, k in enumerate(index):
            if k in self.scanned:
                inside[i] = bool(self.scanned[k].multiply_imaged(x[i], y[i]))
        return inside

    def placed(self, i: int, x: float, y: float, radius: float, widened: bool, multiple: bool, mode: str) -> dict:
        if i in self.scanned:
            found = self.scanned[i]
            tangential = found.caustic("tangential")
            inner = next((c for c in found.caustics if c.kind != "tangential"), None)
            areas = (tangential.area if tangential is not None else 0.0, inner.area if inner is not None else 0.0)
        elif self.closed[i]:
            areas = (polygon_area(self.tangential[0][i], self.tangential[1][i]),
                     polygon_area(self.cut[0][i], self.cut[1][i]) if self.has_cut[i] else 0.0)
        else:
            areas = (0.0, 0.0)
        return dict(source_x=float(x), source_y=float(y), placement=mode, region_radius=float(radius),
                    region_widened=bool(widened), multiply_imaged=bool(multiple),
                    tangential_caustic_area=areas[0], inner_caustic_area=areas[1])


def _inside(px, py, vx, vy) -> np.ndarray:
    """Even-odd test of one point per row against that row's polygon (caustics.inside_polygon)."""
    px, py = px[:, None], py[:, None]
    x1, y1 = np.roll(vx, -1, axis=1), np.roll(vy, -1, axis=1)
    crosses = (vy > py) != (y1 > py)
    dy = np.where(y1 == vy, 1.0, y1 - vy)
    x_at = vx + (py - vy) * (x1 - vx) / dy
    return np.count_nonzero(crosses & (px < x_at), axis=1) % 2 == 1


CHUNK_ROWS = 128  # systems per block of the caustic arithmetic: its temporaries then stay in cache (7x faster)


def _closed_form(theta, q, angle, gamma, shear_angle):
    """caustics._closed_form for SIE + shear lenses centred on the origin, one row a system:
    (closed form applies, tangential caustic x, y, cut x, y)."""
    parts = [_closed_form_rows(*(a[i:i + CHUNK_ROWS] for a in (theta, q, angle, gamma, shear_angle)))
             for i in range(0, theta.size, CHUNK_ROWS)]
    return tuple(np.concatenate([p[k] for p in parts]) for k in range(5))


def _closed_form_rows(theta, q, angle, gamma, shear_angle):
    cos, sin = _UNIT_CIRCLE
    ux, uy = cos[None, :], sin[None, :]
    b, qq = theta[:, None], q[:, None]
    c, s = np.cos(np.radians(angle))[:, None], np.sin(np.radians(angle))[:, None]
    xp, yp = c * ux + s * uy, -s * ux + c * uy
    sphere = qq == 1.0
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.maximum(np.hypot(xp, yp), CENTRAL_FLOOR)
        e = np.sqrt(1.0 - qq * qq)
        w = np.maximum(np.sqrt(qq * qq * xp * xp + yp * yp), CENTRAL_FLOOR)
        pre = b * np.sqrt(qq) / e
        axp = np.where(sphere, b * xp / r, pre * np.arctan(e * xp / w))
        ayp = np.where(sphere, b * yp / r, pre * np.arctanh(e * yp / w))
    ax, ay = c * axp - s * ayp, s * axp + c * ayp
    r2 = np.maximum(ux * ux + uy * uy, 1e-9**2)
    two_kappa = 2.0 * (0.5 * b / np.maximum(np.sqrt(qq * xp * xp + yp * yp / qq), CENTRAL_FLOOR))
    h11, h12, h22 = two_kappa * uy * uy / r2, -two_kappa * ux * uy / r2, two_kappa * ux * ux / r2
    two_phi = 2.0 * np.radians(shear_angle)
    sheared = gamma > 0
    g1 = np.where(sheared, gamma * np.cos(two_phi), 0.0)[:, None]
    g2 = np.where(sheared, gamma * np.sin(two_phi), 0.0)[:, None]
    m11, m12, m22 = 1.0 - g1, -g2, 1.0 + g1
    det_m = m11 * m22 - m12 * m12
    b_coef = m11 * h22 + m22 * h11 - 2.0 * m12 * h12
    c2 = h11 * h22 - h12 * h12
    disc = b_coef * b_coef - 4.0 * c2 * det_m
    ok = (det_m[:, 0] > 0) & ~np.any(disc < 0, axis=1) & ~np.any(b_coef <= 0, axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        radius = (b_coef + np.sqrt(np.where(disc < 0, 0.0, disc))) / (2.0 * det_m)
    ok &= np.all(np.isfinite(radius), axis=1) & (np.max(np.where(np.isfinite(radius), radius, np.inf), axis=1)
                                                  < OUTER_RADIUS_IN_EINSTEIN_RADII * theta)
    xc, yc = radius * ux, radius * uy
    bx = xc - ax - (g1 * xc + g2 * yc)
    by = yc - ay - (g2 * xc - g1 * yc)
    return ok, bx, by, -ax, -ay


class _Queue:
    """_GeometryQueue for many systems: each keeps its own batch and cursor, drawn from its own
    physics stream with the same calls; the batch arithmetic runs on all of them together."""

    def __init__(self, sampler, rngs: list):
        self.sampler, self.rngs = sampler, rngs
        self.lens_mode = sampler.mode == "lens"
        self.bulk = sampler.deflectors is not None or sampler.source_model is not None
        self.size = sampler.GEOMETRY_BATCH if (self.bulk and self.lens_mode) else 1
        n = len(rngs)
        self.batch = {name: np.zeros((n, self.size)) for name in ("sigma", "z_lens", "z_source", "m")}
        self.flags = {name: np.zeros((n, self.size), dtype=bool) for name in ("behind", "weighted", "kept")}
        self.has_batch = np.zeros(n, dtype=bool)
        self.cursor = np.zeros(n, dtype=np.int64)
        self.counts = np.zeros((n, 3), dtype=np.int64)  # source_in_front, cross_section, einstein_radius

    def nonzero_rejections(self, k: int) -> dict:
        names = ("source_in_front", "cross_section", "einstein_radius")
        return {name: int(c) for name, c in zip(names, self.counts[k]) if c}

    def _new_batches(self, rows: np.ndarray, values: dict, picks: np.ndarray) -> None:
        """Fresh batches for systems ``rows`` (``picks``: their places in ``values``)."""
        s, n = self.sampler, self.size
        calls = (2 if s.deflectors is not None else 0) + (2 if s.source_model is not None else 0) + self.lens_mode
        u = np.stack([self.rngs[k].uniform(size=calls * n) for k in rows]).reshape(rows.size, calls, n) \
            if calls else np.zeros((rows.size, 0, n))
        c = 0
        if s.deflectors is not None:
            z_l = s.deflectors.draw_redshift(u[:, 0])
            c = 2
        else:
            z_l = np.repeat(values["lens.redshift"][picks][:, None], n, axis=1)
            sigma = np.repeat(values["lens.velocity_dispersion"][picks][:, None], n, axis=1)
        if s.source_model is not None:
            settings = s.source_model.settings
            m = s.source_model.counts.draw(*settings.magnitude_range, u[:, c])
            z_s = s.source_model.redshifts.draw(m, *settings.redshift_range, u[:, c + 1])
            c += 2
        else:
            m = np.full((rows.size, n), math.nan)
            z_s = np.repeat(values["source.redshift"][picks][:, None], n, axis=1)
        if not self.lens_mode:
            if s.deflectors is not None:
                sigma = s.deflectors.draw_sigma(u[:, 1], z_l)
            ones = np.ones((rows.size, n), dtype=bool)
            behind = weighted = kept = ones
        else:
            behind = z_s > z_l
            ratio = np.where(behind, s.distances.distance_ratio(np.minimum(z_l, z_s), z_s), 0.0)
            weighted = behind & ((u[:, c] <= ratio**2) if s.deflectors is not None else True)
            if s.deflectors is not None:  # sigma only where a pair can still be kept, as _GeometryQueue
                sigma = np.full((rows.size, n), math.nan)
                sigma[weighted] = s.deflectors.draw_sigma(u[:, 1][weighted], z_l[weighted])
            kept = weighted
            selection = s.recipe.selection
            if selection.einstein_radius is not None and selection.enforce:
                theta = 4.0 * math.pi * (sigma / C_KM_S) ** 2 * ratio * ARCSEC_PER_RADIAN
                kept = weighted & (theta >= selection.einstein_radius[0]) & (theta <= selection.einstein_radius[1])
        for name, a in (("sigma", sigma), ("z_lens", z_l), ("z_source", z_s), ("m", m)):
            self.batch[name][rows] = a
        for name, a in (("behind", behind), ("weighted", weighted), ("kept", kept)):
            self.flags[name][rows] = a
        self.has_batch[rows] = True
        self.cursor[rows] = 0

    def _count(self, rows: np.ndarray, stop: np.ndarray) -> None:
        columns = np.arange(self.size)[None, :]
        span = (columns >= self.cursor[rows][:, None]) & (columns < stop[:, None])
        behind, weighted, kept = (self.flags[name][rows] for name in ("behind", "weighted", "kept"))
        self.counts[rows, 0] += np.count_nonzero(span & ~behind, axis=1)
        self.counts[rows, 1] += np.count_nonzero(span & behind & ~weighted, axis=1)
        self.counts[rows, 2] += np.count_nonzero(span & weighted & ~kept, axis=1)

    def next(self, active: np.ndarray, values: dict):
        """The next kept pair of every active system: (sigma, z_lens, z_source, m, found)."""
        m = active.size
        out = {name: np.zeros(m) for name in ("sigma", "z_lens", "z_source", "m")}
        found = np.zeros(m, dtype=bool)
        todo = np.arange(m)
        for _ in range(self.sampler.GEOMETRY_BATCHES if self.bulk else 1):
            if todo.size == 0:
                break
            rows = active[todo]
            fresh = ~self.has_batch[rows] | (self.cursor[rows] >= self.size)
            if fresh.any():
                self._new_batches(rows[fresh], values, todo[fresh])
            kept = self.flags["kept"][rows] & (np.arange(self.size)[None, :] >= self.cursor[rows][:, None])
            has = kept.any(axis=1)
            first = np.argmax(kept, axis=1)
            hit_rows, hit_first = rows[has], first[has]
            self._count(hit_rows, hit_first)
            self.cursor[hit_rows] = hit_first + 1
            for name in out:
                out[name][todo[has]] = self.batch[name][hit_rows, hit_first]
            found[todo[has]] = True
            miss = rows[~has]
            self._count(miss, np.full(miss.size, self.size))
            self.has_batch[miss] = False
            todo = todo[~has]
            if not self.bulk:
                break
        return out["sigma"], out["z_lens"], out["z_source"], out["m"], found

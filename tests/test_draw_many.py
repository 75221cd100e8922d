"""Every system is a function of ``(seed, system_id)`` alone, however it is drawn.

``PopulationSampler.draw_many(ids)`` draws the pending candidates of all ``ids`` together on arrays;
``draw(i)`` is one row of it.  Whatever else is drawn alongside, in whatever order or repetition,
system ``i`` must come out the same, field by field (floats to 1e-12 relative: numpy's vectorised
transcendental functions may differ in the last bits between array lengths), in every placement
mode and with every recipe feature.  The array caustics are checked against the scan of
simlens.lensing.caustics, itself checked against the SIS and SIE in test_lensing.py.
"""

from __future__ import annotations

import dataclasses
import math
from types import SimpleNamespace
from pathlib import Path

import pytest

import numpy as np

from simlens.lensing.caustics import find_caustics
from simlens.lensing.lens_models import build_deflector
from simlens.truth.sampler import PopulationSampler, SelectionExhausted, _Caustics
from simlens.recipe import load_recipe, parse_recipe

from .conftest import PHYSICAL_RECIPE, SMALL_RECIPE

RECIPES = Path(__file__).parents[1] / "recipes"


def difference(a, b, path="system"):
    """The first differing field of two drawn values (None: the same)."""
    if dataclasses.is_dataclass(a) and not isinstance(a, type):
        for f in dataclasses.fields(a):
            found = difference(getattr(a, f.name), getattr(b, f.name), f"{path}.{f.name}")
            if found:
                return found
        return None
    if isinstance(a, dict):
        if list(a) != list(b):
            return f"{path}: keys {list(a)} != {list(b)}"
        return next((d for k in a if (d := difference(a[k], b[k], f"{path}[{k!r}]"))), None)
    if isinstance(a, (tuple, list)):
        if len(a) != len(b):
            return f"{path}: {len(a)} != {len(b)} entries"
        return next((d for i, (x, y) in enumerate(zip(a, b)) if (d := difference(x, y, f"{path}[{i}]"))), None)
    if isinstance(a, float) and isinstance(b, float):
        if (math.isnan(a) and math.isnan(b)) or a == b or abs(a - b) <= 1e-12 * max(abs(a), abs(b)):
            return None
        return f"{path}: {a!r} != {b!r}"
    return None if (a is b or a == b) else f"{path}: {a!r} != {b!r}"


def assert_same_systems(recipe, ids):
    """``draw_many(ids)`` equals ``[draw(i) for i in ids]``, each drawn by a fresh sampler."""
    alone = PopulationSampler(recipe)
    one_by_one = [alone.draw(i) for i in ids]
    together = PopulationSampler(recipe).draw_many(ids)
    assert len(together) == len(one_by_one)
    for i, a, b in zip(ids, one_by_one, together):
        found = difference(a, b)
        assert found is None, f"system {i}: {found}"
    return one_by_one


def population(mode: str | None, **selection):
    recipe = load_recipe(RECIPES / "population.toml")
    position = dataclasses.replace(recipe.source.position, mode=mode)
    source = dataclasses.replace(recipe.source, position=position)
    if mode is None:  # fixed placement: sources behind every lens
        source = dataclasses.replace(source, counts=dataclasses.replace(source.counts, redshift_range=(1.05, 4.0)))
    chosen = dataclasses.replace(recipe.selection, min_arc_snr=None, **selection)
    return dataclasses.replace(recipe, source=source, selection=chosen)


@pytest.mark.parametrize("mode", ["lens", "sky", None])
def test_physical_populations_in_every_placement_mode(mode):
    recipe = population(mode, einstein_radius=None) if mode != "lens" else population(mode)
    systems = assert_same_systems(recipe, range(150))
    if mode == "lens":
        assert all(s.multiply_imaged for s in systems) and any(s.rejections for s in systems)
    if mode == "sky":  # sources in front of their lens too (no deflection, no caustics)
        assert any(s.z_source <= s.z_lens for s in systems) and any(s.z_source > s.z_lens for s in systems)


def test_explicit_distributions_grids_and_cuts():
    # explicit lens and source distributions (one pair a batch), a grid, the resolvable and
    # multiply-imaged cuts, and lens mode re-placing the source behind the same deflector
    text = SMALL_RECIPE.replace('psf = { profile = "moffat", beta = 3.0, fwhm = 0.9 }',
                                'psf = { profile = "moffat", beta = 3.0, fwhm = { grid = [0.7, 0.9] } }')
    text = text.replace("[source.clumps]", '[source.position]\nmode = "lens"\n\n[source.clumps]')
    text += "\n[selection]\nresolvable = true\nmultiply_imaged = true\neinstein_radius = [0.9, 2.0]\n"
    assert_same_systems(parse_recipe(text), range(150))
    assert_same_systems(parse_recipe(SMALL_RECIPE), range(60))  # fixed placement, explicit everything


def test_negatives_quasars_and_a_physical_test_recipe():
    quasars = load_recipe(RECIPES / "quasars.toml")
    quasars = dataclasses.replace(quasars, selection=dataclasses.replace(quasars.selection, min_arc_snr=None))
    assert_same_systems(quasars, range(120))
    negatives = parse_recipe(PHYSICAL_RECIPE + "\n[negatives]\nfraction = 0.4\n")
    systems = assert_same_systems(negatives, range(150))
    assert {s.system_class for s in systems} - {"lens"}


@pytest.mark.parametrize("extra", ["[lens.subhalos]\ncount = 2\n",
                                   "[lens.multipoles]\nm4_strength = 0.02\n",
                                   "[lens.line_of_sight]\ncount = 2\n",
                                   "power_law"])
def test_per_row_steps_and_the_scan_in_the_same_loop(extra):
    # subhalos, multipoles, line-of-sight galaxies and models without the closed form are per-row
    # steps of the one loop: shuffled and repeated ids give the same systems
    text = (PHYSICAL_RECIPE.replace("[lens.mass]\n", '[lens.mass]\nmodel = "power_law"\nslope = 2.1\n')
            if extra == "power_law" else PHYSICAL_RECIPE + "\n" + extra)
    recipe = parse_recipe(text)
    assert_same_systems(recipe, [3, 0, 5, 3, 11])


def test_shuffled_and_repeated_ids_give_the_same_systems():
    recipe = parse_recipe(PHYSICAL_RECIPE)
    reference = {i: PopulationSampler(recipe).draw(i) for i in (1, 2, 7, 40)}
    drawn = PopulationSampler(recipe).draw_many([7, 2, 7, 40, 1, 2])
    for i, system in zip([7, 2, 7, 40, 1, 2], drawn):
        assert difference(system, reference[i]) is None
    assert drawn[0] is drawn[2]


def test_impossible_cuts_fail_the_same_way():
    recipe = parse_recipe(PHYSICAL_RECIPE + "\n[selection]\neinstein_radius = [9.0, 9.5]\nmax_candidates = 3\n")
    with pytest.raises(SelectionExhausted) as alone:
        PopulationSampler(recipe).draw(4)
    with pytest.raises(SelectionExhausted) as together:
        PopulationSampler(recipe).draw_many([1, 4])
    assert "none of 3 candidates for system" in str(alone.value)
    assert str(together.value).startswith("selection: none of 3 candidates")


def test_max_candidates_counts_image_cut_redraws():
    # selection.max_candidates is the number of candidates in all (the recipe key's documentation),
    # whether the geometry or an image cut rejected them
    recipe = parse_recipe(PHYSICAL_RECIPE + "\n[selection]\nmax_candidates = 4\n")
    calls = []

    def never(system):
        calls.append(system.candidate)
        return {"arc_snr": False}

    with pytest.raises(SelectionExhausted, match="none of 4 candidates") as error:
        PopulationSampler(recipe).draw_many([2], image_cuts=never)
    assert "arc_snr" in str(error.value)
    assert len(calls) == len(set(calls)) and max(calls) <= 3  # never past candidate 3

    judged = []

    def third_time(system):
        judged.append(system.candidate)
        return {"arc_snr": len(judged) >= 3}

    system = PopulationSampler(recipe).draw_many([2], image_cuts=third_time)[0]
    assert system.rejections.get("arc_snr") == 2
    assert system.candidate == judged[-1] and system.selection_flags["arc_snr"] is True


def _table(theta, q, angle, gamma, shear_angle):
    deflectors = [dict(mass_model_name="sie", mass_q=a, mass_angle=b, mass_slope=2.0, mass_core_radius=0.0,
                       subhalos=(), multipoles=(), shear_gamma=g, shear_angle=p)
                  for a, b, g, p in zip(q, angle, gamma, shear_angle)]
    n = len(theta)
    table = _Caustics.of(None, np.arange(n), np.asarray(theta, float), deflectors, [{}] * n, [None] * n,
                         [()] * n, None, None, [{}] * n)
    return table, deflectors


def test_array_caustics_agree_with_the_scan():
    # The closed form on arrays against find_caustics' scan (closed_form=False) of the same lenses:
    # which points are multiply imaged, and the caustic areas.  Shear gamma >= 1 (beyond what
    # recipes accept) has no closed-form tangential curve: that row is scanned.
    rng = np.random.default_rng(5)
    n = 12
    theta = rng.uniform(0.5, 2.0, n)
    q, angle = rng.uniform(0.4, 1.0, n), rng.uniform(0.0, 180.0, n)
    gamma, shear_angle = rng.uniform(0.0, 0.15, n), rng.uniform(0.0, 180.0, n)
    q[0], gamma[1] = 1.0, 1.05
    table, deflectors = _table(theta, q, angle, gamma, shear_angle)
    x, y = rng.uniform(-1.0, 1.0, (2, 400))
    for k, d in enumerate(deflectors):
        mass = build_deflector(SimpleNamespace(einstein_radius=theta[k], **d))
        scan = find_caustics(mass, theta[k], closed_form=False)
        px, py = theta[k] * x, theta[k] * y
        ours = table.multiply_imaged(np.full(px.size, k), px, py)
        agree = np.mean(ours == scan.multiply_imaged(px, py))
        assert agree > 0.97, (k, agree)  # the scan's 64 rays against 256 closed-form points
        tangential = scan.caustic("tangential")
        area = tangential.area if tangential is not None else 0.0
        assert table.areas[k, 0] == pytest.approx(area, rel=0.05, abs=1e-3 * theta[k] ** 2)
        assert table.reach[k] == pytest.approx(scan.max_radius, rel=0.05)

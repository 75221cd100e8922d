"""The vectorised route (simlens.truth.block_sampling) draws the same systems as the scalar one.

The reference is the scalar ``PopulationSampler.draw``, itself checked against published results in
test_populations.py and test_placement.py: ``draw_many(ids)`` must give ``[draw(i) for i in ids]``,
field by field (floats to 1e-12 relative: only transcendental functions on arrays may differ in
their last bits), in every placement mode and with the recipe features it covers.
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import pytest

from simlens.truth.block_sampling import block_route_unavailable
from simlens.truth.sampler import PopulationSampler, SelectionExhausted
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
    sampler = PopulationSampler(recipe)
    one_by_one = [sampler.draw(i) for i in ids]
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
    assert block_route_unavailable(PopulationSampler(recipe)) is None
    systems = assert_same_systems(recipe, range(250))
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


def test_unsupported_recipes_take_the_scalar_route_and_order_does_not_matter():
    with_subhalos = parse_recipe(PHYSICAL_RECIPE + "\n[lens.subhalos]\ncount = 2\n")
    assert "subhalos" in block_route_unavailable(PopulationSampler(with_subhalos))
    assert_same_systems(with_subhalos, [3, 0, 5])
    assert_same_systems(parse_recipe(PHYSICAL_RECIPE), [7, 2, 7, 40, 1])


def test_impossible_cuts_fail_the_same_way():
    recipe = parse_recipe(PHYSICAL_RECIPE + "\n[selection]\neinstein_radius = [9.0, 9.5]\nmax_candidates = 3\n")
    with pytest.raises(SelectionExhausted) as scalar:
        PopulationSampler(recipe).draw(4)
    with pytest.raises(SelectionExhausted) as together:
        PopulationSampler(recipe).draw_many([4])
    assert str(together.value) == str(scalar.value)



def test_lenses_beyond_the_closed_form_use_the_scan():
    # Shear gamma >= 1 (beyond what recipes accept) leaves no closed-form tangential curve; such
    # rows take the scan of simlens.lensing.caustics, and must agree with find_caustics on the same lens.
    import numpy as np

    from simlens.truth.block_sampling import _Caustics
    from simlens.lensing.caustics import find_caustics
    from simlens.truth.sampler import build_deflector

    values = {"lens.mass.q": np.array([0.7, 0.7]), "lens.mass.angle": np.array([20.0, 20.0]),
              "lens.shear.gamma": np.array([0.05, 1.05]), "lens.shear.angle": np.array([80.0, 80.0])}
    theta = np.array([1.2, 1.2])
    caustics = _Caustics(values, theta, np.arange(2))
    assert list(caustics.closed) == [True, False] and list(caustics.scanned) == [1]
    x, y = np.array([0.1, 0.1]), np.array([0.05, 0.05])
    inside = caustics.multiply_imaged(np.arange(2), x, y)
    reach = caustics.reach()
    for k in range(2):
        mass = build_deflector("sie", 1.2, 0.7, 20.0, 2.0, 0.0, (), (), float(values["lens.shear.gamma"][k]), 80.0)
        found = find_caustics(mass, 1.2)
        assert inside[k] == bool(found.multiply_imaged(0.1, 0.05))
        assert reach[k] == pytest.approx(found.max_radius, rel=1e-12)
        placed = caustics.placed(k, 0.1, 0.05, 2.0, False, bool(inside[k]), "lens")
        tangential = found.caustic("tangential")
        assert placed["tangential_caustic_area"] == pytest.approx(tangential.area if tangential else 0.0, rel=1e-12)

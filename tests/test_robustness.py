"""A small robustness sweep in the default suite (the 10,000-system sweep is bench/sweep_robustness.py)."""

from __future__ import annotations

from pathlib import Path

import simlens

BENCH = Path(__file__).parents[1] / "bench"


def test_edge_cases_give_finite_pixels_and_truth(tmp_path):
    # Common practice: extreme but valid inputs (theta_E -> 0 and beyond the cutout, q = 1 and q -> 0,
    # sources on the central caustic, magnitudes 10 to 38) must never produce NaN or inf.
    import sys

    sys.path.insert(0, str(BENCH))
    try:
        from sweep_robustness import check_run
    finally:
        sys.path.pop(0)
    recipe = simlens.load_recipe(BENCH / "edge_cases.toml").with_overrides(count=40)
    simlens.run(recipe, tmp_path / "run")
    n, problems = check_run(tmp_path / "run")
    assert n == 40
    assert problems == []

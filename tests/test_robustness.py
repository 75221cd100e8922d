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


def test_every_feature_together_gives_finite_pixels(tmp_path):
    # Common practice: all the recipe's physics at once (stars plus halo, line of sight, subhalos,
    # multipoles, quasars, a second source plane, negatives, flagged cuts) never gives NaN pixels;
    # NaN truth appears only where a quantity does not exist, by design.
    import sys

    import numpy as np
    from astropy.table import Table

    from simlens.recipe import parse_recipe

    from .conftest import FEATURES_RECIPE

    sys.path.insert(0, str(BENCH))
    try:
        from sweep_robustness import check_run
    finally:
        sys.path.pop(0)
    text = FEATURES_RECIPE
    simlens.run(parse_recipe(text), tmp_path / "run")
    n, problems = check_run(tmp_path / "run")
    assert n == 20
    assert not [p for p in problems if not p.startswith("truth ")]  # every pixel finite
    truth = Table.read(tmp_path / "run" / "truth.fits")
    lookalike = np.isin(np.asarray(truth["system_class"]).astype(str),
                        ["ring_galaxy", "spiral_arms", "tidal_features", "edge_on_disk", "blue_companions"])
    multi_plane = np.asarray(truth["n_line_of_sight"]) > 0  # no single Fermat potential: no delays
    allowed = {"source_mag_g": lookalike, "source_mag_r": lookalike, "magnification": lookalike,
               "max_time_delay": multi_plane}
    for name in [c for c in truth.colnames if c.startswith("second_source_")]:
        allowed[name] = np.ones(len(truth), bool)  # none where the second redshift was not behind, or negatives
    for problem in problems:
        column, system = problem.split(":")[0][len("truth "):], int(problem.split("system ")[1].split()[0])
        row = int(np.flatnonzero(np.asarray(truth["system_id"]) == system)[0])
        assert column in allowed and allowed[column][row], problem

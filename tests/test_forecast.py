"""simlens forecast: lens counts per deg^2 from the populations, checked against the lensing optical
depth of Turner, Ostriker & Gott (1984) and against simlens's own rendered images."""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest
from astropy.table import Table
from scipy import integrate

from simlens.cli import main
from simlens.forecast import DEGREE2_PER_STERADIAN, estimated_source_view, forecast, forecast_recipe
from simlens.imaging.render import SystemRendering
from simlens.populations.velocity_function import VELOCITY_FUNCTIONS
from simlens.recipe import parse_recipe
from simlens.truth.sampler import PopulationSampler

from .conftest import PHYSICAL_RECIPE
from .test_placement import TOG84_DENSITY, TOG84_SOURCE_REDSHIFT, tog84_optical_depth, tog84_recipe


def test_the_fast_source_view_matches_the_rendered_images():
    # The estimate's magnification is the renderer's (the same rays and source samples, refined
    # where the first band's light needs it: within 1e-3); its S/N,
    # without the GalSim stage and the noise, is the rendered arc S/N (sqrt(sum S^2 / var), lens
    # light included in the variance) within 5 %.
    recipe = forecast_recipe(parse_recipe(PHYSICAL_RECIPE), "collett2015")
    lens_mode = dataclasses.replace(recipe.source, position=dataclasses.replace(recipe.source.position, mode="lens"))
    recipe = dataclasses.replace(recipe, source=lens_mode).with_overrides(count=10)
    for system in PopulationSampler(recipe).draw_many(range(8)):
        full = SystemRendering(system, recipe.survey, "r").render()
        for view in estimated_source_view(system, recipe.survey, ["g", "r"]):
            if view.band == "r":
                assert view.magnification == pytest.approx(full.magnification, rel=1e-3)
            assert view.matched_snr == pytest.approx(full.band(view.band).arc_snr, rel=0.05)
            observed = full.band(view.band)  # Collett's S/N: over the pixels where the source beats the noise
            above = observed.lensed_source > np.sqrt(observed.variance)
            if above.any():
                expected = observed.lensed_source[above].sum() / np.sqrt(observed.variance[above].sum())
                assert view.snr == pytest.approx(expected, rel=0.08)


def test_with_no_cuts_the_rate_is_the_optical_depth_times_the_source_density():
    # TOG84 (tests/test_placement.py's sky-mode test, reused): behind n_s sources per deg^2 there
    # are tau n_s lenses per deg^2 (the forecast's "multiply_imaged" rules).
    recipe = tog84_recipe()
    result = forecast(recipe, 6000, 1.0, "multiply_imaged")
    cosmo = recipe.cosmology.build()
    expected = tog84_optical_depth(cosmo) * TOG84_DENSITY * 3600.0  # lenses per deg^2
    assert result.per_deg2 == pytest.approx(expected, abs=4 * result.sampling_error_per_deg2)
    # the deflectors' sky density is the velocity function integrated over the comoving volume (scipy)
    vdf = VELOCITY_FUNCTIONS["choi2007"]
    n = vdf.density(cosmo.h) * vdf.fraction_between(120.0, 300.0)
    chi_lo, chi_hi = cosmo.comoving_distance([0.001, TOG84_SOURCE_REDSHIFT - 0.001]).value
    volume_per_sr = integrate.quad(lambda chi: chi**2, chi_lo, chi_hi)[0]
    assert result.galaxies_per_deg2 == pytest.approx(n * volume_per_sr / DEGREE2_PER_STERADIAN, rel=2e-3)


def test_draw_lensed_finishes_the_multiply_imaged_systems_as_draw_many_does():
    # The forecast's fast path leaves the systems that cannot be lenses unfinished; those it
    # finishes are the same records draw_many gives (equal fields, nan alike).
    import math

    recipe = forecast_recipe(parse_recipe(PHYSICAL_RECIPE), "collett2015").with_overrides(count=3000)
    every = PopulationSampler(recipe).draw_many(range(3000))
    lensed = PopulationSampler(recipe).draw_lensed(range(3000))
    found = 0
    for a, b in zip(every, lensed):
        if not a.multiply_imaged:
            assert b is None
            continue
        found += 1
        for f in dataclasses.fields(a):
            u, v = getattr(a, f.name), getattr(b, f.name)
            assert u == v or (isinstance(u, float) and math.isnan(u) and math.isnan(v)), f.name
    assert found >= 3


def test_the_forecast_command_writes_its_tables_and_plot(tmp_path, capsys):
    recipe_path = tmp_path / "r.toml"
    recipe_path.write_text(PHYSICAL_RECIPE.replace('mode = "lens"', 'mode = "sky"'))
    out = tmp_path / "fc"
    args = ["forecast", str(recipe_path), "--n", "3000", "--area", "100", "--out", str(out), "--quiet"]
    assert main(args) == 0
    printed = capsys.readouterr().out
    assert "lenses per deg^2" in printed and "in 100 deg^2" in printed
    summary = json.loads((out / "summary.json").read_text())
    detections = Table.read(out / "detections.ecsv")
    assert summary["detected"] == len(detections) and summary["drawn"] == 3000
    assert summary["lenses_per_deg2"] == pytest.approx(summary["deflectors_per_deg2"] * len(detections) / 3000)
    assert all((detections["snr"] > 20) & (detections["magnification"] > 3))
    for column in ("einstein_radius", "z_lens", "z_source", "source_magnitude", "multiplicity"):
        assert sum(Table.read(out / f"breakdown_{column}.ecsv")["detected"]) == len(detections)
    assert (out / "forecast.png").stat().st_size > 10_000
    assert main(args) == 2  # not over an existing forecast without --overwrite
    assert main(args + ["--overwrite"]) == 0
    (out / "mine.txt").write_text("user\n")
    assert main(args + ["--overwrite"]) == 2 and (out / "mine.txt").read_text() == "user\n"
    assert "did not write" in capsys.readouterr().err


def test_a_recipe_without_rates_is_refused(capsys, tmp_path):
    from .conftest import SMALL_RECIPE

    recipe_path = tmp_path / "r.toml"
    recipe_path.write_text(SMALL_RECIPE)
    assert main(["forecast", str(recipe_path), "--n", "10", "--out", str(tmp_path / "o")]) == 2
    assert "needs populations with rates" in capsys.readouterr().err


def test_lensed_supernovae_without_cuts_are_the_rate_times_the_optical_depth(monkeypatch):
    # N = int dN_SN/dz/dOmega tau(z) dz: the supernova rate (Dilday et al. 2010, from memory; its
    # density checked in tests/test_transients.py) times TOG84's optical depth of non-evolving SIS
    # deflectors, tau(z_s) = (16 pi^3 / 30) n <sigma^4> D_C(z_s)^3 / c^4, by scipy quadrature.
    from astropy import constants, units as u

    from .test_placement import BASE

    text = BASE.replace("count = 10", "count = 100") + """
[lens.population]
velocity_function = "choi2007"
redshift_range = [0.001, 1.2]
velocity_dispersion_range = [200.0, 300.0]
[survey.cadence]
length = 365.25
[source.supernova]
rate = "dilday2010"
redshift_range = [0.2, 1.2]
peak_margin = 0.0
host = false
[source.position]
mode = "sky"
"""
    text = text.replace("[survey.bands.r]", "[survey.bands.r]\nrevisit = 5.0\nfilter = \"LSST_r\"", 1)
    recipe = parse_recipe(text.replace("[source]\nredshift = 2.0\n", "[source]\n"))
    # drawn at 40 per arcmin^2 (boosted 740 times): two in one lens's caustics stay rare (< 2 %)
    monkeypatch.setattr("simlens.forecast.RARE_SOURCE_DRAW_DENSITY", 40.0)
    result = forecast(recipe, 30000, 1.0, "multiply_imaged")
    sampler = PopulationSampler(recipe)
    cosmo = recipe.cosmology.build()
    vdf = VELOCITY_FUNCTIONS["choi2007"]
    n = vdf.density(cosmo.h) * vdf.fraction_between(200.0, 300.0)
    c = constants.c.to_value(u.km / u.s)
    population = sampler.supernova_redshifts
    per_sr = population.per_steradian
    z = np.linspace(0.2, 1.2, 401)
    weights = np.gradient(population._cdf, population._z)
    density_z = np.interp(z, population._z, weights) * per_sr  # dN/dz/dOmega
    tau = 16 * np.pi**3 / 30 * n * vdf.moment(4, 200.0, 300.0) * cosmo.comoving_distance(z).value ** 3 / c**4
    expected = integrate.trapezoid(density_z * tau, z) / DEGREE2_PER_STERADIAN  # per deg^2 over the year
    assert result.window_days == pytest.approx(365.25)
    assert result.per_deg2 == pytest.approx(expected, abs=4 * result.sampling_error_per_deg2)
    assert result.sampling_error_per_deg2 < 0.1 * expected

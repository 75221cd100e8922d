"""Distributions against scipy.stats, grids, and per-system random streams."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from simlens.truth.sampler import PopulationSampler
from simlens.recipe import parse_recipe
from simlens.recipe.distributions import Choice, LogUniform, TruncatedNormal, Uniform
from simlens.truth.streams import grid_cell, system_streams
from simlens.imaging.scene import build_scene

from .conftest import SMALL_RECIPE


def draws(param, n=4000, seed=0):
    rng = np.random.default_rng(seed)
    return np.array([param.draw(rng) for _ in range(n)])


def test_uniform_log_uniform_and_truncated_normal_match_scipy():
    # Kolmogorov-Smirnov tests against scipy.stats' CDFs; a p-value below 1e-3 would flag a wrong law.
    assert stats.kstest(draws(Uniform(2.0, 5.0)), stats.uniform(2.0, 3.0).cdf).pvalue > 1e-3
    assert stats.kstest(draws(LogUniform(0.1, 10.0)), stats.loguniform(0.1, 10.0).cdf).pvalue > 1e-3
    a, b = (150 - 240) / 35, (340 - 240) / 35
    assert stats.kstest(draws(TruncatedNormal(240, 35, 150, 340)), stats.truncnorm(a, b, 240, 35).cdf).pvalue > 1e-3
    x = draws(TruncatedNormal(0.0, 1.0, 0.5, 0.7))
    assert x.min() >= 0.5 and x.max() <= 0.7


def test_choice_weights():
    x = draws(Choice((1, 2, 3), (1, 0, 3)))
    assert set(np.unique(x)) == {1, 3}
    assert np.mean(x == 3) == pytest.approx(0.75, abs=0.03)


def test_grid_cells_form_a_cartesian_product():
    cells = {grid_cell(i, (2, 3)) for i in range(6)}
    assert cells == {(a, b) for a in range(2) for b in range(3)}
    assert grid_cell(7, (2, 3)) == grid_cell(1, (2, 3))


def test_grid_parameters_cover_every_cell_in_a_run():
    text = SMALL_RECIPE.replace("q = { uniform = [0.6, 1.0] }", "q = { grid = [0.6, 1.0] }")
    text = text.replace("half_light_radius = 0.25", "half_light_radius = { grid = [0.1, 0.2, 0.4] }")
    sampler = PopulationSampler(parse_recipe(text))
    pairs = [(s.mass_q, s.source_half_light_radius) for s in map(sampler.draw, range(12))]
    assert sorted(set(pairs)) == [(q, r) for q in (0.6, 1.0) for r in (0.1, 0.2, 0.4)]
    assert pairs.count((0.6, 0.1)) == 2


def test_streams_depend_only_on_seed_and_system_id():
    a = system_streams(5, 17, ("x", "y"))["y"].uniform(size=3)
    b = system_streams(5, 17, ("x", "y"))["y"].uniform(size=3)
    c = system_streams(5, 18, ("x", "y"))["y"].uniform(size=3)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)


def test_system_drawn_alone_equals_system_drawn_in_sequence(small_recipe):
    sampler = PopulationSampler(small_recipe)
    in_order = [sampler.draw(i) for i in range(6)]
    alone = PopulationSampler(small_recipe).draw(4)
    assert alone == in_order[4]
    assert in_order[3] != in_order[4]


def test_sources_placed_uniformly_in_area_within_einstein_radius(small_recipe):
    # With radius_in_einstein_radii = 1 (the default) r / theta_E is distributed as sqrt(U): P(<x) = x^2.
    sampler = PopulationSampler(small_recipe)
    u = np.array([np.hypot(s.source_x, s.source_y) / s.einstein_radius for s in map(sampler.draw, range(600))])
    assert u.max() <= 1.0
    assert stats.kstest(u, lambda x: np.clip(x, 0, 1) ** 2).pvalue > 1e-3


def test_clump_fluxes_add_up_to_the_source_magnitude(small_recipe):
    sampler = PopulationSampler(small_recipe)
    with_clumps = next(s for s in map(sampler.draw, range(50)) if s.clumps)
    for band in ("g", "r"):
        light = build_scene(with_clumps).source_light[band]
        expected = with_clumps.band(band).counts_from_magnitude(with_clumps.source_magnitude(band))
        assert light.flux == pytest.approx(expected, rel=1e-10)


def test_subhalo_population(small_recipe_text):
    # Masses follow dN/dm ~ m^-1.9 on [1e7, 1e10] (KS test against that law's CDF); positions fall in
    # the annulus; each subhalo's total mass pi Sigma_cr b a equals its drawn mass.
    from astropy.cosmology import Planck18

    from simlens.cosmology import ARCSEC_PER_RADIAN, critical_surface_density

    text = small_recipe_text + "\n[lens.subhalos]\ncount = 40\nmass_min = 1e7\nmass_max = 1e10\n"
    sampler = PopulationSampler(parse_recipe(text))
    system = sampler.draw(2)
    assert len(system.subhalos) == 40
    masses = np.array([h.mass for h in system.subhalos] + [h.mass for h in sampler.draw(3).subhalos])
    k = -0.9
    cdf = lambda m: (np.clip(m, 1e7, 1e10) ** k - 1e7**k) / (1e10**k - 1e7**k)
    assert stats.kstest(masses, cdf).pvalue > 1e-3
    r = np.array([np.hypot(h.x, h.y) for h in system.subhalos]) / system.einstein_radius
    assert r.min() >= 0.5 and r.max() <= 1.5
    sigma_cr = critical_surface_density(Planck18, system.z_lens, system.z_source).value
    d_l = Planck18.angular_diameter_distance(system.z_lens).value
    for h in system.subhalos[:5]:
        total = math.pi * h.einstein_radius * h.truncation_radius * sigma_cr * (d_l / ARCSEC_PER_RADIAN) ** 2
        # the sampler's interpolated distances (simlens.cosmology) agree with astropy to 2e-6
        assert total == pytest.approx(h.mass, rel=1e-5)
    assert sum(type(c).__name__ == "TruncatedSIS" for c in build_scene(system).deflector.components) == 40

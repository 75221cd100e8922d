"""Line-of-sight galaxies: SIS deflectors in their own planes, traced with the multi-plane lens
equation (Schneider, Ehlers & Falco 1992, ch. 9)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from astropy import constants, units as u
from astropy.table import Table
from scipy import stats

import simlens
from simlens.imaging.scene import build_scene
from simlens.lensing.multiplane import MultiPlaneLens
from simlens.truth.sampler import PopulationSampler
from simlens.recipe import parse_recipe

from .conftest import SMALL_RECIPE

LOS = SMALL_RECIPE.replace("[lens.mass]\n", """[lens.line_of_sight]
count = 3
velocity_dispersion = { uniform = [60.0, 140.0] }
radius = 5.0

[lens.mass]
""")


def test_line_of_sight_galaxies_are_drawn_from_the_comoving_volume():
    recipe = parse_recipe(LOS)
    sampler = PopulationSampler(recipe)
    cosmo = sampler.cosmology
    chi_fraction = []
    for i in range(300):
        s = sampler.draw(i)
        assert len(s.line_of_sight) == 3
        chi_s = cosmo.comoving_distance(s.z_source).value
        chi_0 = cosmo.comoving_distance(0.02).value
        for g in s.line_of_sight:
            assert 0.02 <= g.z < s.z_source and math.hypot(g.x, g.y) <= 5.0 and 60 <= g.velocity_dispersion <= 140
            # SIS Einstein radius for the system's source (SEF eq. 8.36, astropy distances)
            ratio = (cosmo.angular_diameter_distance(g.z, s.z_source) / cosmo.angular_diameter_distance(s.z_source)).value
            expected = 4 * math.pi * (g.velocity_dispersion / constants.c.to_value(u.km / u.s)) ** 2 * ratio * 206264.806
            assert g.einstein_radius == pytest.approx(expected, rel=1e-5)
            chi = cosmo.comoving_distance(g.z).value
            chi_fraction.append((chi**3 - chi_0**3) / (chi_s**3 - chi_0**3))
    # uniform in comoving volume: (chi^3 - chi_0^3)/(chi_s^3 - chi_0^3) is uniform on [0, 1] (KS test)
    assert stats.kstest(chi_fraction, "uniform").pvalue > 0.01


def test_the_mass_model_is_the_multi_plane_lens_of_those_galaxies():
    recipe = parse_recipe(LOS)
    s = PopulationSampler(recipe).draw(4)
    mass = build_scene(s).deflector
    assert isinstance(mass, MultiPlaneLens) and len(mass.planes) == 4
    assert list(mass.redshifts) == sorted([s.z_lens] + [g.z for g in s.line_of_sight])
    # without the line of sight, the same system is single-plane
    single = build_scene(s.__class__(**{**s.__dict__, "line_of_sight": ()})).deflector
    x, y = np.array([0.3, -1.1, 2.0]), np.array([0.7, 0.4, -1.5])
    assert not np.allclose(np.array(mass.ray_shoot(x, y)), np.array(single.ray_shoot(x, y)))


def test_runs_with_line_of_sight_galaxies_write_their_catalogue(tmp_path):
    recipe = parse_recipe(LOS)
    simlens.run(recipe, tmp_path / "run")
    truth = Table.read(tmp_path / "run" / "truth.fits")
    los = Table.read(tmp_path / "run" / "line_of_sight.ecsv")
    assert (truth["n_line_of_sight"] == 3).all() and len(los) == 3 * len(truth)
    assert set(los["system_id"]) == set(truth["system_id"])
    images = Table.read(tmp_path / "run" / "images.ecsv")
    # no single Fermat potential: delays unknown (NaN, read back as masked), arrival order -1
    assert np.isnan(np.ma.filled(images["time_delay"], np.nan)).all() and (images["arrival"] == -1).all()

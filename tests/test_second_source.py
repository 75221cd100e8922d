"""A second source plane (double source plane lens): the farther source is lensed by the main
lens and by the first source, through the recursive two-plane lens equation."""

from __future__ import annotations

import math

import numpy as np
import pytest
from astropy import constants, units as u
from astropy.table import Table

import simlens
from simlens.imaging.scene import build_scene
from simlens.lensing.mass import ScaledDeflector
from simlens.truth.sampler import PopulationSampler
from simlens.recipe import parse_recipe

from .conftest import SMALL_RECIPE

ARCSEC = 206264.806


def double_source_recipe(sigma_d: float) -> str:
    text = SMALL_RECIPE.replace("redshift = { uniform = [0.3, 0.6] }", "redshift = 0.5")
    text = text.replace("velocity_dispersion = { normal = [250.0, 30.0], within = [180.0, 320.0] }",
                        "velocity_dispersion = 250.0")
    text = text.replace("q = { uniform = [0.6, 1.0] }", "q = 1.0")
    text = text.replace("gamma = { uniform = [0.0, 0.05] }", "gamma = 0.0")
    text = text.replace("redshift = { uniform = [1.5, 2.5] }", "redshift = 1.5")
    return text.replace("[source.clumps]", f"""[source.second]
redshift = 2.5
magnitude = 23.0
half_light_radius = 0.15
deflector_velocity_dispersion = {sigma_d}

[source.clumps]""")


def test_second_plane_matches_a_two_plane_calculation_by_hand():
    # SEF ch. 9: theta_2 = theta - (D_12 / D_2) alpha_1(theta);
    # beta = theta - (D_1s / D_s) alpha_1(theta) - (D_2s / D_s) alpha_2(theta_2), physical SIS
    # deflections |alpha_i| = 4 pi (sigma_i / c)^2, distances from astropy.
    recipe = parse_recipe(double_source_recipe(90.0))
    sampler = PopulationSampler(recipe)
    system = sampler.draw(0)
    assert system.second_source is not None and system.second_source.z == 2.5
    cosmo = sampler.cosmology
    c = constants.c.to_value(u.km / u.s)
    a1 = 4 * math.pi * (250.0 / c) ** 2 * ARCSEC
    a2 = 4 * math.pi * (90.0 / c) ** 2 * ARCSEC
    d = lambda z1, z2: cosmo.angular_diameter_distance(z1, z2).value  # noqa: E731
    d0 = lambda z: cosmo.angular_diameter_distance(z).value  # noqa: E731
    centre2 = np.array([system.source_x, system.source_y])
    mass2 = build_scene(system).second_deflector
    for theta in (np.array([0.9, 0.4]), np.array([-1.7, 0.2]), np.array([0.1, -2.3])):
        hat1 = a1 * theta / np.linalg.norm(theta)
        theta2 = theta - d(0.5, 1.5) / d0(1.5) * hat1
        rel = theta2 - centre2
        hat2 = a2 * rel / np.linalg.norm(rel)
        beta = theta - d(0.5, 2.5) / d0(2.5) * hat1 - d(1.5, 2.5) / d0(2.5) * hat2
        assert np.allclose(np.array(mass2.ray_shoot(theta[0], theta[1])), beta, atol=1e-6)


def test_without_its_own_deflector_the_second_plane_rescales_the_main_lens():
    recipe = parse_recipe(double_source_recipe(0.0))
    sampler = PopulationSampler(recipe)
    system = sampler.draw(1)
    mass2 = build_scene(system).second_deflector
    assert isinstance(mass2, ScaledDeflector)
    cosmo = sampler.cosmology
    ratio = lambda zs: (cosmo.angular_diameter_distance(0.5, zs) / cosmo.angular_diameter_distance(zs)).value  # noqa: E731
    assert mass2.factor == pytest.approx(ratio(2.5) / ratio(1.5), rel=1e-5)


def test_a_run_with_a_second_source_records_it(tmp_path):
    recipe = parse_recipe(double_source_recipe(60.0))
    simlens.run(recipe, tmp_path / "run")
    truth = Table.read(tmp_path / "run" / "truth.fits")
    assert (truth["second_source_z"] == 2.5).all()
    assert (truth["second_source_mag_r"] == 23.0).all()
    mu2 = np.asarray(truth["second_source_magnification"])
    assert np.all(np.isfinite(mu2)) and np.all(mu2 > 1.0)

"""The stars_and_halo mass model: Sersic stars following the light plus an NFW halo."""

from __future__ import annotations

import math

import numpy as np
import pytest
from astropy.cosmology import Planck18
from scipy import integrate

from simlens.lensing.stars_and_halo import critical_density_arcsec2, stars_and_halo
from simlens.cosmology import ARCSEC_PER_RADIAN, critical_surface_density
from simlens.cosmology import DistanceTable
from simlens.errors import RecipeError
from simlens.lensing.lens_equation import find_images
from simlens.lensing.mass import NFW, SersicMass
from simlens.truth.sampler import PopulationSampler
from simlens.recipe import parse_recipe
from simlens.imaging.render import render_system
from simlens.imaging.scene import build_scene

from .conftest import PHYSICAL_RECIPE

STARS_AND_HALO = PHYSICAL_RECIPE.replace("[lens.mass]\n", """[lens.mass]
model = "stars_and_halo"
halo_mass = { log_uniform = [2e12, 1e13] }
halo_ellipticity = 0.1
""")


def test_critical_density_per_arcsec2_matches_astropy():
    # Sigma_cr = c^2 D_s / (4 pi G D_l D_ls) (SEF eq. 5.5), reference: the astropy-based function
    table = DistanceTable(Planck18)
    reference = critical_surface_density(Planck18, 0.4, 1.8).value * (
        Planck18.angular_diameter_distance(0.4).value / ARCSEC_PER_RADIAN) ** 2
    assert critical_density_arcsec2(table, 0.4, 1.8) == pytest.approx(reference, rel=1e-5)


def test_einstein_radius_encloses_mean_convergence_one():
    # SEF eq. 8.3: the mean convergence inside theta_E is 1.  Independent check by quadrature
    # (scipy.integrate.quad) of the two components' convergences, circular case.
    table = DistanceTable(Planck18)
    parts = stars_and_halo(3e11, 3.0, 1.1, 4.0, 5e12, None, 0.35, 1.6, table)
    assert parts.einstein_radius > 0.5
    stars = SersicMass(kappa_e=parts.stellar_kappa_e, half_light_radius=1.1, sersic_index=4.0)
    halo = NFW(kappa_s=parts.halo_kappa_s, scale_radius=parts.halo_scale_radius)
    theta = parts.einstein_radius
    mass = integrate.quad(lambda r: 2 * math.pi * r * float(stars.convergence(r, 0.0) + halo.convergence(r, 0.0)),
                          0.0, theta, points=[1e-3, 1e-2, 0.1], limit=400)[0]
    assert mass / (math.pi * theta**2) == pytest.approx(1.0, rel=1e-4)
    # a faint exponential disk (central convergence e^b_1 kappa_e < 1) in a light halo is
    # sub-critical: no Einstein radius (an n = 4 profile's cusp always has a tiny one)
    assert stars_and_halo(1e9, 3.0, 0.5, 1.0, 1e10, None, 0.35, 1.6, table).einstein_radius == 0.0


def test_stars_and_halo_systems_are_lenses_with_consistent_truth():
    recipe = parse_recipe(STARS_AND_HALO)
    sampler = PopulationSampler(recipe)
    system = sampler.draw(1)
    assert system.multiply_imaged and system.einstein_radius > 0
    assert 2e12 <= system.halo_mass <= 1e13 and system.stellar_kappa_e > 0
    mass = build_scene(system).deflector
    assert [type(c).__name__ for c in mass.components][:2] == ["SersicMass", "NFW"]
    # the caustic test agrees with the image finder for this model
    windows = [(3.0, 0.02), (1.5, 0.005), (0.1, 0.001)]
    assert len(find_images(mass, system.source_x, system.source_y, windows)) >= 2
    rendered = render_system(system, recipe.survey, recipe.reference_band)
    assert np.isfinite(rendered.bands[0].image).all() and rendered.magnification > 1


@pytest.mark.parametrize("edit, key", [
    ('halo_mass = { log_uniform = [2e12, 1e13] }\n', "lens.mass.halo_mass"),
    ("mass_to_light = 3.0\n", "lens.light.scaling.mass_to_light"),
])
def test_stars_and_halo_recipe_errors(edit, key):
    with pytest.raises(RecipeError, match=key.replace(".", r"\.")):
        parse_recipe(STARS_AND_HALO.replace(edit, ""))
    with pytest.raises(RecipeError, match="applies to model = 'stars_and_halo' only"):
        parse_recipe(PHYSICAL_RECIPE.replace("[lens.mass]\n", "[lens.mass]\nhalo_mass = 1e12\n"))

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


# -- their light ---------------------------------------------------------------------------------
def _with_light(count: int = 2):
    from .conftest import PHYSICAL_RECIPE

    return parse_recipe(PHYSICAL_RECIPE.replace("[lens.mass]\n", f"""[lens.line_of_sight]
count = {count}
velocity_dispersion = {{ uniform = [120.0, 200.0] }}
radius = 6.0
light = true

[lens.mass]
"""))


def test_a_galaxy_behind_the_lens_is_seen_through_it_as_the_lens_equation_says():
    # The mapped Sersic of simlens.imaging.scene.mapped_sersic against its exact image: the
    # galaxy's own surface brightness read at beta = theta - f alpha(theta) (the lens equation,
    # SEF 1992 eq. 5.7, f rescaling the SIS to the galaxy's plane) on a fine grid.  A small galaxy
    # 3 theta_E' from an SIS: the flux is |mu| = 1 / (1 - theta_E' / theta) times its own (the
    # SIS's outer image, SEF 1992 eq. 8.39) and the two images agree pixel by pixel within 1 % of the
    # peak.
    from simlens.imaging.light import Sersic
    from simlens.imaging.scene import mapped_sersic
    from simlens.lensing.lens_equation import find_images
    from simlens.lensing.mass import SIS

    theta_e = 1.2  # of the SIS for the galaxy's plane
    lens = SIS(einstein_radius=theta_e)
    source = Sersic(flux=1.0, half_light_radius=0.06, sersic_index=1.5, q=0.6, angle=25.0, center=(2.4, 0.9))
    images = find_images(lens, 2.4, 0.9, [(8.0, 0.04)])
    outer = int(np.argmax(np.hypot(images.x, images.y)))
    x, y = float(images.x[outer]), float(images.y[outer])
    _, _, xx, xy, yy = lens.deflection_and_hessian(np.array([x]), np.array([y]))
    jacobian = np.array([[1 - xx[0], -xy[0]], [-xy[0], 1 - yy[0]]])
    seen = mapped_sersic(1.0, 0.06, 1.5, 0.6, 25.0, x, y, jacobian)
    assert seen.flux == pytest.approx(1.0 / (1.0 - theta_e / math.hypot(x, y)), rel=1e-6)
    step = 0.004
    axis = np.arange(-0.6, 0.6 + step / 2, step)
    gx, gy = np.meshgrid(x + axis, y + axis)
    bx, by = lens.ray_shoot(gx, gy)
    exact = source.surface_brightness(bx, by)
    mapped = seen.surface_brightness(gx, gy)
    assert mapped.sum() * step**2 == pytest.approx(exact.sum() * step**2, rel=0.01)
    assert np.max(np.abs(mapped - exact)) < 0.01 * exact.max()


def test_line_of_sight_light_in_front_sits_where_drawn_and_behind_is_lensed():
    # Galaxies in front of the lens shine unlensed at their position, with the counts of their
    # magnitudes (AB through the band's zero point); behind it, at the images the lens equation
    # gives (tested above).
    recipe = _with_light(3).with_overrides(count=60)
    sampler = PopulationSampler(recipe)
    behind = front = 0
    from simlens.imaging.scene import lens_galaxy_components, line_of_sight_images
    from simlens.lensing.lens_models import build_deflector

    for system in sampler.draw_many(range(50)):  # about 5 % of the volume lies in front of the lens
        scene = build_scene(system)
        seen = line_of_sight_images(system, build_deflector(system))
        light = scene.lens_light["r"]
        parts = light.components if hasattr(light, "components") else (light,)
        n_own = len(lens_galaxy_components(system, "r"))
        assert len(parts) == n_own + len(seen)  # satellites aside: none here
        for (galaxy, x, y, jacobian), part in zip(seen, parts[n_own:]):
            assert galaxy.magnitudes is not None and galaxy.half_light_radius > 0
            assert part.center == (x, y)
            if galaxy.z <= system.z_lens:
                front += 1
                assert (x, y) == (galaxy.x, galaxy.y)
                assert part.flux == pytest.approx(system.band("r").counts_from_magnitude(galaxy.magnitudes["r"]))
            else:
                behind += 1
                assert abs(np.linalg.det(jacobian)) > 0
    assert front > 0 and behind > 0

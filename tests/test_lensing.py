"""Point-source images and extended-source magnification against textbook results."""

from __future__ import annotations

import math

import numpy as np
import pytest

from simlens.lensing.lens_equation import find_images
from simlens.imaging.light import Sersic
from simlens.lensing.mass import SIE, SIS, ExternalShear
from simlens.imaging.rays import PixelGrid, render_scene, trace_rays

WINDOWS = [(4.0, 0.05), (2.0, 0.01)]


@pytest.mark.parametrize("beta", [0.05, 0.3, 0.7])
def test_sis_images_and_total_magnification(beta):
    # SIS, beta < theta_E: two images at beta + theta_E and beta - theta_E on the source's axis, with
    # total magnification 2 theta_E / beta (Schneider, Ehlers & Falco 1992, sect. 8.1.4).
    theta_e = 1.2
    images = find_images(SIS(einstein_radius=theta_e), beta, 0.0, WINDOWS)
    assert len(images) == 2
    order = np.argsort(images.x)
    np.testing.assert_allclose(images.x[order], [beta - theta_e, beta + theta_e], atol=1e-7)
    np.testing.assert_allclose(images.y, 0.0, atol=1e-7)
    assert np.sum(np.abs(images.magnification)) == pytest.approx(2 * theta_e / beta, rel=1e-5)
    # The inner image is a saddle point (negative parity).
    assert images.magnification[order][0] < 0 < images.magnification[order][1]


def test_sis_source_outside_einstein_radius_has_one_image():
    images = find_images(SIS(einstein_radius=1.0), 1.3, 0.0, WINDOWS)
    assert len(images) == 1
    assert images.x[0] == pytest.approx(2.3, abs=1e-7)


def test_sie_quad_and_double():
    # An SIE produces four images for a source inside the inner (astroid) caustic and two outside it
    # (Kormann, Schneider & Bartelmann 1994).  For q = 0.6 the astroid's cusps on the minor axis of the
    # source plane lie near 0.2 theta_E (computed, not quoted); 0.02 is well inside and 0.6 outside.
    lens = SIE(einstein_radius=1.0, q=0.6, angle=0.0)
    quad = find_images(lens, 0.02, 0.01, WINDOWS)
    double = find_images(lens, 0.6, 0.0, WINDOWS)
    assert len(quad) == 4
    assert len(double) == 2
    for images, (sx, sy) in ((quad, (0.02, 0.01)), (double, (0.6, 0.0))):
        bx, by = lens.ray_shoot(images.x, images.y)
        np.testing.assert_allclose(bx, sx, atol=1e-6)
        np.testing.assert_allclose(by, sy, atol=1e-6)


def _lensed_and_unlensed_flux(lens, source, grid):
    scene = render_scene("x", trace_rays(lens, grid), None, source)
    return scene.lensed_source_flux, source.flux


@pytest.mark.parametrize("lens, source_position", [
    (SIS(einstein_radius=1.0), (0.3, 0.0)),
    (SIE(einstein_radius=1.0, q=0.7, angle=25.0) + ExternalShear(gamma=0.04, angle=70.0), (0.25, -0.35)),
])
def test_surface_brightness_conservation_gives_point_magnification(lens, source_position):
    # Lensing conserves surface brightness, so a source small compared with the scale on which the
    # magnification varies has lensed/unlensed flux = sum |mu_i| of the point-source images
    # (SEF 1992, sect. 5.2).  Within 1 %.
    source = Sersic(flux=1.0, half_light_radius=0.01, sersic_index=0.5, center=source_position)
    grid = PixelGrid(size=200, pixel_scale=0.02, supersampling=4)
    lensed, unlensed = _lensed_and_unlensed_flux(lens, source, grid)
    images = find_images(lens, *source_position, WINDOWS)
    assert lensed / unlensed == pytest.approx(np.sum(np.abs(images.magnification)), rel=0.01)


def test_unlensed_flux_is_recovered_without_a_lens():
    # Control: a negligible deflector leaves the source's flux unchanged (the grid integrates it).
    source = Sersic(flux=5.0, half_light_radius=0.3, sersic_index=1.0, center=(0.2, 0.1))
    grid = PixelGrid(size=64, pixel_scale=0.1, supersampling=4)
    lensed, unlensed = _lensed_and_unlensed_flux(SIS(einstein_radius=1e-8), source, grid)
    assert lensed == pytest.approx(unlensed, rel=1e-3)


@pytest.mark.parametrize("fraction", [0.5, 0.9, 0.99, 0.995])
def test_inner_image_near_the_cut_is_found_by_the_renderers_search(fraction):
    # SIS, beta = f theta_E: the inner image lies at (1 - f) theta_E from the centre, down to
    # 0.005 theta_E here (SEF 1992, sect. 8.1.4); the meshes render_system uses must find it.
    from simlens.imaging.render import image_search_windows

    theta_e = 1.3
    grid = PixelGrid(size=64, pixel_scale=0.2, supersampling=4)
    beta = fraction * theta_e
    images = find_images(SIS(einstein_radius=theta_e), beta, 0.0, image_search_windows(theta_e, 1.0, beta, grid))
    assert len(images) == 2
    assert np.min(np.abs(images.x)) == pytest.approx((1 - fraction) * theta_e, rel=1e-6)


def test_image_counts_converge_for_sie_with_shear():
    # Convergence check (common practice): adding a mesh ten times finer at the centre must not change
    # the number of images the renderer's search finds, for sources spread over the Einstein radius.
    from simlens.imaging.render import image_search_windows

    rng = np.random.default_rng(4)
    grid = PixelGrid(size=64, pixel_scale=0.2, supersampling=4)
    for _ in range(25):
        q, theta_e = rng.uniform(0.5, 1.0), rng.uniform(0.5, 2.0)
        lens = SIE(einstein_radius=theta_e, q=q, angle=rng.uniform(0, 180)) + ExternalShear(gamma=0.05, angle=30)
        r, phi = theta_e * np.sqrt(rng.uniform()), rng.uniform(0, 2 * np.pi)
        sx, sy = r * np.cos(phi), r * np.sin(phi)
        windows = image_search_windows(theta_e, q, r, grid)
        finer = windows + [(1e-3 * theta_e, 1e-3 * theta_e / 50)]
        assert len(find_images(lens, sx, sy, windows)) == len(find_images(lens, sx, sy, finer))


def test_single_plane_images_lie_within_the_main_lens_reach():
    # The renderer skips the coarse mesh over the whole cutout for single-plane lenses: every image of
    # the source centre lies within 2.5 theta_E / sqrt(q) beyond the source's offset.  On the
    # features recipe's single-plane systems (SIE or stars plus halo, multipoles, subhalos, shear)
    # the images found with and without the whole-cutout mesh are the same (common practice check).
    from simlens.imaging.render import image_search_windows
    from simlens.imaging.scene import build_scene
    from simlens.recipe import parse_recipe
    from simlens.truth.sampler import PopulationSampler

    from .conftest import FEATURES_RECIPE

    recipe = parse_recipe(FEATURES_RECIPE)
    grid = PixelGrid(size=recipe.survey.cutout_size, pixel_scale=recipe.survey.pixel_scale, supersampling=4)
    compared = 0
    for system in PopulationSampler(recipe).draw_many(range(20)):
        if system.line_of_sight or not system.lensing:
            continue
        lens, offset = build_scene(system).deflector, math.hypot(system.source_x, system.source_y)
        found = [find_images(lens, system.source_x, system.source_y,
                             image_search_windows(system.einstein_radius, system.mass_q, offset, grid, whole))
                 for whole in (True, False)]
        assert len(found[0]) == len(found[1])
        assert np.allclose(np.sort(found[0].x), np.sort(found[1].x), atol=1e-6)
        compared += 1
    assert compared >= 5


def test_adaptive_supersampling_matches_brute_force_on_a_cusp():
    # Reference: 16x16 rays per pixel everywhere (brute force).  A compact source and clumps on the
    # cusp of an SIE's tangential caustic, after PSF and pixel: the default (adaptive) sampling must be
    # within 0.5 % in flux and 1 % of the peak in every pixel; fixed 4x is not (its error is several
    # per cent here), so the test can fail.
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).parents[1] / "bench"))
    try:
        import bench_adaptive as bench
    finally:
        sys.path.pop(0)
    cusp, _ = bench.caustic_points()
    source = Sersic(flux=1e4, half_light_radius=0.03, sersic_index=1.0, q=0.7, angle=30.0, center=cusp)
    source = source + Sersic(flux=2e3, half_light_radius=0.02, sersic_index=0.5, center=(cusp[0] + 0.03, cusp[1] - 0.02))
    reference, _ = bench.render(source, 16)
    adaptive, _ = bench.render(source, 4, adaptive=True)
    fixed, _ = bench.render(source, 4)
    assert adaptive.sum() == pytest.approx(reference.sum(), rel=5e-3)
    assert np.abs(adaptive - reference).max() < 1e-2 * reference.max()
    assert np.abs(fixed - reference).max() > 1e-2 * reference.max()


def test_sersic_faint_radius_follows_the_sersic_law():
    # I(R) = I_e exp(-b_n [(R/R_e)^(1/n) - 1]) (Sersic 1963): at the faint radius I = 1e-4 I_e.
    from simlens.imaging.light import FAINT_SURFACE_BRIGHTNESS

    for n in (0.5, 1.0, 4.0):
        profile = Sersic(flux=1.0, half_light_radius=0.3, sersic_index=n)
        r = profile.faint_radius
        assert profile.surface_brightness(r, 0.0) / profile.intensity_at_half_light_radius == pytest.approx(
            FAINT_SURFACE_BRIGHTNESS, rel=1e-9)


@pytest.mark.parametrize("lens, source", [
    (SIE(einstein_radius=1.0, q=0.6, angle=20.0) + ExternalShear(gamma=0.05, angle=100.0),
     Sersic(flux=1e4, half_light_radius=0.15, sersic_index=1.0, q=0.6, angle=30.0, center=(0.05, 0.03))),
    (SIS(einstein_radius=1.4),
     Sersic(flux=1e4, half_light_radius=0.04, sersic_index=0.5, center=(0.4, -0.2))
     + Sersic(flux=3e3, half_light_radius=0.3, sersic_index=1.5, q=0.8, center=(0.3, -0.1))),
])
def test_supersampling_only_near_the_light_equals_supersampling_everywhere(lens, source):
    # The midpoint rule with supersampling^2 rays in every pixel is the reference; the renderer's
    # route (one ray per pixel, the supersampling only where the source's light can reach) must give
    # the same image wherever the source is brighter than 1e-4 of its peak, and the same flux.
    from simlens.imaging.rays import ComponentImages
    from simlens.imaging.render import observation_rays

    grid = PixelGrid(size=64, pixel_scale=0.2, supersampling=4, padding=8)
    rays, sampling = observation_rays(lens, grid)
    components = ComponentImages(rays, sampling)
    ours = render_scene("x", rays, None, source, components).lensed_source
    full = ComponentImages(trace_rays(lens, grid))
    reference = full.render(source, lensed=True).reshape(ours.shape[0], 2, ours.shape[0], 2).sum(axis=(1, 3))
    assert 0 < components.detailed_pixels < grid.padded_size**2 / 2  # the saving is real
    assert ours.sum() == pytest.approx(reference.sum(), rel=2e-4)
    assert np.abs(ours - reference).max() < 1e-4 * reference.max()


def test_subhalo_counts_from_a_mass_fraction_follow_the_sis_host():
    # With lens.subhalos.mass_fraction = f the number of subhalos is Poisson with mean f M_ann / <m>:
    # M_ann the projected mass of an SIS (kappa = theta_E / 2 theta, SEF 1992 eq. 8.34) in the
    # annulus and Sigma_cr = c^2 D_s / (4 pi G D_l D_ls), both integrated here with scipy and
    # astropy, <m> of dN/dm ~ m^-1.9 by quadrature.  Summed over 60 lenses: within 4 sigma.
    import astropy.constants as const
    import astropy.units as u
    from scipy import integrate

    from simlens.recipe import parse_recipe
    from simlens.truth.sampler import PopulationSampler

    from .conftest import SMALL_RECIPE

    text = SMALL_RECIPE.replace("[lens.shear]", "[lens.subhalos]\nmass_fraction = 0.01\nmass_min = 1e7\n"
                                "mass_max = 1e9\n\n[lens.shear]")
    recipe = parse_recipe(text).with_overrides(count=60)
    cosmo = recipe.cosmology.build()
    slope, lo, hi = -1.9, 1e7, 1e9
    mean_mass = (integrate.quad(lambda m: m ** (slope + 1), lo, hi)[0] / integrate.quad(lambda m: m ** slope, lo, hi)[0])
    counts, means, mass_in_subhalos, host_mass = 0, 0.0, 0.0, 0.0
    for system in PopulationSampler(recipe).draw_many(range(60)):
        d_l = cosmo.angular_diameter_distance(system.z_lens)
        d_s = cosmo.angular_diameter_distance(system.z_source)
        d_ls = cosmo.angular_diameter_distance(system.z_lens, system.z_source)
        sigma_cr = (const.c**2 / (4 * np.pi * const.G) * d_s / (d_l * d_ls)).to(u.M_sun / u.kpc**2)
        per_arcsec2 = (sigma_cr * (d_l * (1 * u.arcsec).to(u.rad).value) ** 2).to(u.M_sun).value
        theta_e = system.einstein_radius
        host = integrate.quad(lambda t: per_arcsec2 * theta_e / (2 * t) * 2 * np.pi * t, 0.5 * theta_e, 1.5 * theta_e)[0]
        means += 0.01 * host / mean_mass
        counts += len(system.subhalos)
        mass_in_subhalos += sum(h.mass for h in system.subhalos)
        host_mass += host
        assert all(0.5 * theta_e <= np.hypot(h.x, h.y) <= 1.5 * theta_e for h in system.subhalos)
    assert counts == pytest.approx(means, abs=4 * np.sqrt(means))
    assert mass_in_subhalos / host_mass == pytest.approx(0.01, rel=0.15)  # the fraction itself

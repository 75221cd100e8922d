"""Populations: distances, the velocity dispersion function, scaling relations and template colours,
each checked against a published formula, a quoted value or a reference library."""

from __future__ import annotations

import math

import galsim
import numpy as np
import pytest
from astropy.cosmology import FlatLambdaCDM, LambdaCDM, Planck18
from scipy import integrate, stats

from simlens.cosmology import DistanceTable
from simlens.populations.photometry import KCorrection, Template, ab_magnitude_offset, load_filter
from simlens.truth.sampler import PopulationSampler
from simlens.recipe import parse_recipe
from simlens.populations.scaling_relations import EarlyTypeJointDistribution, FaberJackson, FundamentalPlane, NumberCounts, RedshiftGivenMagnitude, SizeLuminosity
from simlens.populations.velocity_function import VELOCITY_FUNCTIONS, DeflectorPopulation

from .conftest import PHYSICAL_RECIPE


# -- distances ------------------------------------------------------------------------------------
@pytest.mark.parametrize("cosmo", [Planck18, LambdaCDM(H0=70, Om0=0.3, Ode0=0.6), LambdaCDM(H0=70, Om0=0.3, Ode0=0.8)],
                         ids=["Planck18", "open", "closed"])
def test_distance_table_matches_astropy(cosmo):
    # Reference: astropy.cosmology (Hogg 1999 definitions), including curved models.
    table = DistanceTable(cosmo)
    z = np.linspace(0.02, 6.0, 200)
    z1 = 0.4 * z
    np.testing.assert_allclose(table.angular_diameter_distance(z), cosmo.angular_diameter_distance(z).value, rtol=2e-6)
    np.testing.assert_allclose(table.angular_diameter_distance_z1z2(z1, z), cosmo.angular_diameter_distance(z1, z).value, rtol=2e-6)
    np.testing.assert_allclose(table.luminosity_distance(z), cosmo.luminosity_distance(z).value, rtol=2e-6)
    np.testing.assert_allclose(table.differential_comoving_volume(z),
                               cosmo.differential_comoving_volume(z).value, rtol=2e-6)


# -- velocity dispersion function -------------------------------------------------------------------
def test_velocity_function_integrates_to_phi_star():
    # Sheth et al. (2003, eq. 4): the modified Schechter form is normalised so that the integral over
    # sigma is phi_*, the quoted comoving density (8.0e-3 h^3 Mpc^-3 for Choi et al. 2007).
    vdf = VELOCITY_FUNCTIONS["choi2007"]
    total, _ = integrate.quad(lambda s: vdf.phi_star * float(vdf.pdf(s)), 0, 2000, limit=200)
    assert total == pytest.approx(8.0e-3, rel=1e-6)
    assert vdf.sigma_star == 161.0 and vdf.alpha == 2.32 and vdf.beta == 2.67


@pytest.mark.parametrize("name", ["choi2007", "sheth2003"])
def test_sampled_sigma_follows_the_velocity_function(name):
    # Kolmogorov-Smirnov test (scipy.stats.kstest) of the drawn sigma against the truncated
    # analytic CDF, computed independently by quadrature of the published form.
    vdf = VELOCITY_FUNCTIONS[name]
    table = DistanceTable(FlatLambdaCDM(H0=70, Om0=0.3))
    population = DeflectorPopulation(vdf, table, (0.1, 1.0), (100.0, 350.0))
    rng = np.random.default_rng(5)
    sigma = np.array([population.draw(rng)[0] for _ in range(4000)])
    norm, _ = integrate.quad(lambda s: float(vdf.pdf(s)), 100, 350)

    def cdf(values):
        return np.array([integrate.quad(lambda s: float(vdf.pdf(s)), 100, v)[0] / norm for v in np.atleast_1d(values)])

    grid = np.linspace(100, 350, 400)
    table_cdf = cdf(grid)
    assert stats.kstest(sigma, lambda v: np.interp(v, grid, table_cdf)).pvalue > 0.01


def test_cross_section_weighting_is_sigma_to_the_fourth():
    # sigma^4 phi(sigma) is again a modified Schechter function with alpha + 4 (Sheth et al. 2003
    # form); KS against the directly integrated sigma^4-weighted CDF.
    vdf = VELOCITY_FUNCTIONS["choi2007"]
    table = DistanceTable(FlatLambdaCDM(H0=70, Om0=0.3))
    population = DeflectorPopulation(vdf, table, (0.1, 1.0), (100.0, 350.0), weight_power=4.0)
    rng = np.random.default_rng(6)
    sigma = np.array([population.draw(rng)[0] for _ in range(3000)])
    grid = np.linspace(100, 350, 400)
    weighted = grid**4 * vdf.pdf(grid)
    cdf = np.concatenate([[0], np.cumsum(0.5 * (weighted[1:] + weighted[:-1]) * np.diff(grid))])
    cdf /= cdf[-1]
    assert stats.kstest(sigma, lambda v: np.interp(v, grid, cdf)).pvalue > 0.01


def test_lens_redshifts_follow_the_comoving_volume():
    # Non-evolving population: dN/dz ~ dV_C/dz (astropy's differential_comoving_volume), KS test.
    cosmo = FlatLambdaCDM(H0=70, Om0=0.3)
    population = DeflectorPopulation(VELOCITY_FUNCTIONS["choi2007"], DistanceTable(cosmo), (0.05, 1.5), (100, 350))
    rng = np.random.default_rng(7)
    z = np.array([population.draw(rng)[1] for _ in range(4000)])
    grid = np.linspace(0.05, 1.5, 500)
    dv = cosmo.differential_comoving_volume(grid).value
    cdf = np.concatenate([[0], np.cumsum(0.5 * (dv[1:] + dv[:-1]) * np.diff(grid))])
    cdf /= cdf[-1]
    assert stats.kstest(z, lambda v: np.interp(v, grid, cdf)).pvalue > 0.01


def test_density_evolution_tilts_the_redshifts():
    # phi_*(z) ~ (1 + z)^3 multiplies dN/dz by (1 + z)^3: the mean redshift rises accordingly
    # (expected value by quadrature with astropy's volume element).
    cosmo = FlatLambdaCDM(H0=70, Om0=0.3)
    population = DeflectorPopulation(VELOCITY_FUNCTIONS["choi2007"], DistanceTable(cosmo), (0.05, 1.5), (100, 350),
                                     density_evolution=3.0)
    rng = np.random.default_rng(8)
    z = np.array([population.draw(rng)[1] for _ in range(4000)])
    w = lambda x: cosmo.differential_comoving_volume(x).value * (1 + x) ** 3  # noqa: E731
    mean = integrate.quad(lambda x: x * w(x), 0.05, 1.5)[0] / integrate.quad(w, 0.05, 1.5)[0]
    assert z.mean() == pytest.approx(mean, abs=4 * z.std() / math.sqrt(z.size))


# -- scaling relations --------------------------------------------------------------------------
def test_fundamental_plane_sample_recovers_the_published_coefficients():
    # Bernardi et al. (2003c, r*): log R_e = 1.49 log sigma + 0.30 mu_e - 8.778 (from memory).  A
    # least-squares fit (numpy.linalg.lstsq) to lens light drawn with the plane's scatter must
    # recover a and b; the Faber-Jackson slope L ~ sigma^4 (Faber & Jackson 1976) likewise.
    fj, plane = FaberJackson(), FundamentalPlane()
    rng = np.random.default_rng(9)
    sigma = 10 ** rng.uniform(2.0, 2.5, 3000)
    absolute = np.array([fj.draw(s, rng) for s in sigma])
    radius = np.array([plane.draw_radius(s, m, rng) for s, m in zip(sigma, absolute)])
    mu = plane.mean_surface_brightness(absolute, radius)
    design = np.column_stack([np.log10(sigma), mu, np.ones_like(mu)])
    # The scatter is in R_e, which mu_e contains: fit at the plane's mean radius to avoid the bias.
    mean_r = 10 ** plane.mean_log_radius(sigma, absolute)
    mu_mean = plane.mean_surface_brightness(absolute, mean_r)
    design = np.column_stack([np.log10(sigma), mu_mean, np.ones_like(mu)])
    (a, b, c), *_ = np.linalg.lstsq(design, np.log10(mean_r), rcond=None)
    assert (a, b, c) == pytest.approx((1.49, 0.30, -8.778), abs=1e-6)
    slope = np.polyfit(np.log10(sigma), absolute, 1)[0]
    assert slope == pytest.approx(-2.5 * 4.0, abs=0.3)
    # Scatter of the drawn radii about the plane: the 0.1 dex requested.
    assert np.std(np.log10(radius / mean_r)) == pytest.approx(0.1, rel=0.05)


def test_joint_early_type_law_reproduces_bernardi_2003_moments_and_plane():
    # Bernardi et al. (2003b, AJ 125, 1849, r*, from memory): (M, log R_e, log sigma) trivariate
    # Gaussian, means -21.15, 0.36, 2.20, dispersions 0.84, 0.25, 0.11, correlations rho_RM = -0.88,
    # rho_VM = -0.77, rho_RV = 0.54.  Galaxies drawn given sigma, with sigma from its marginal, must
    # show those moments again (numpy's sample statistics).
    joint = EarlyTypeJointDistribution()
    rng = np.random.default_rng(31)
    n = 200_000
    log_sigma = rng.normal(2.20, 0.11, n)
    magnitude, log_r = joint.draw_given_sigma(10 ** log_sigma, rng.standard_normal((n, 2)))
    data = np.vstack([magnitude, log_r, log_sigma])
    assert data.mean(axis=1) == pytest.approx([-21.15, 0.36, 2.20], abs=0.005)
    assert data.std(axis=1) == pytest.approx([0.84, 0.25, 0.11], rel=0.01)
    rho = np.corrcoef(data)
    assert (rho[0, 1], rho[0, 2], rho[1, 2]) == pytest.approx((-0.88, -0.77, 0.54), abs=0.01)
    # The thinnest direction of the drawn (log R_e, log sigma, mu_e) is the fundamental plane fitted
    # independently by Bernardi et al. (2003c, AJ 125, 1866): log R_e = 1.49 log sigma + 0.30 mu_e + c
    # (from memory), so galaxies scatter about the plane, not across it.
    mu = FundamentalPlane.mean_surface_brightness(magnitude, 10 ** log_r)
    values, vectors = np.linalg.eigh(np.cov(np.vstack([log_r, log_sigma, mu])))
    normal = vectors[:, 0]
    assert -normal[1] / normal[0] == pytest.approx(1.49, abs=0.05)
    assert -normal[2] / normal[0] == pytest.approx(0.30, abs=0.01)
    assert math.sqrt(values[0]) < 0.07  # dex-like thickness; the relation's long axes are 0.1-0.9
    # The inverse relation, sigma given M, is Bernardi's L ~ sigma^3.91 within its error (from memory).
    m = np.array([-21.0, -23.0])
    slope = 2.0 / (2.5 * np.diff(np.log10(joint.mean_sigma_given_magnitude(m)))[0])  # M falls by 2
    assert slope == pytest.approx(3.91, abs=0.2)


def test_size_luminosity_slopes_are_those_of_shen_2003():
    # Shen et al. (2003, table 1, late types): R ~ L^0.21 at the faint end and L^0.53 at the bright
    # end, with the transition at M0 = -20.52 (values quoted in the paper; from memory).
    sizes = SizeLuminosity()
    faint = np.array([-14.0, -13.0])
    bright = np.array([-27.0, -26.0])
    slope_faint = np.diff(sizes.mean_log_radius(faint)) / np.diff(-0.4 * faint)
    slope_bright = np.diff(sizes.mean_log_radius(bright)) / np.diff(-0.4 * bright)
    assert slope_faint[0] == pytest.approx(0.21, abs=0.005)
    assert slope_bright[0] == pytest.approx(0.53, abs=0.005)
    # R ~ (1 + z)^-0.75 at fixed luminosity (van der Wel et al. 2014, late types; from memory)
    ratio = 10 ** (sizes.mean_log_radius(-21.0, 2.1) - sizes.mean_log_radius(-21.0, 0.1))
    assert ratio == pytest.approx((3.1 / 1.1) ** -0.75)


def test_number_counts_and_redshift_distribution():
    # LSST Science Book (2009, eqs. 3.7-3.8; from memory): N(<i) = 46 arcmin^-2 10^(0.31 (i - 25)),
    # p(z | i) = z^2 / (2 z0^3) exp(-z / z0), z0 = 0.0417 i - 0.744, whose mean is 3 z0.
    counts, redshifts = NumberCounts(), RedshiftGivenMagnitude()
    assert counts.cumulative(25.0) == pytest.approx(46.0)
    assert counts.cumulative(24.0) == pytest.approx(46.0 * 10 ** -0.31)
    rng = np.random.default_rng(10)
    m = counts.draw(20.0, 25.0, rng.uniform(size=20000))
    # dN/dm ~ 10^(0.31 m): the fraction brighter than 24 is the ratio of the cumulative counts
    expected = counts.between(20.0, 24.0) / counts.between(20.0, 25.0)
    assert np.mean(m < 24.0) == pytest.approx(expected, abs=4 * math.sqrt(expected * (1 - expected) / m.size))
    z = redshifts.draw(25.0, 0.0, 20.0, rng.uniform(size=20000))
    z0 = 0.0417 * 25 - 0.744
    assert z.mean() == pytest.approx(3 * z0, rel=0.02)
    assert stats.kstest(z / z0, stats.gamma(3).cdf).pvalue > 0.01


# -- template colours ---------------------------------------------------------------------------
@pytest.mark.parametrize("template,sed_file", [("elliptical", "CWW_E_ext.sed"), ("irregular", "CWW_Im_ext.sed")])
@pytest.mark.parametrize("z", [0.0, 0.4, 1.2, 2.5])
def test_template_colours_match_galsim(template, sed_file, z):
    # Reference library: galsim.SED.calculateMagnitude with AB zero points through the same filter
    # curves.  GalSim interpolates the template in photons, simlens in f_lambda: they agree to
    # ~0.01 mag where the templates are coarsely tabulated (the UV extension).
    share = galsim.meta_data.share_dir
    sed = galsim.SED(f"{share}/SEDs/{sed_file}", wave_type="Ang", flux_type="flambda").atRedshift(z)
    filters = {b: galsim.Bandpass(f"LSST_{b}.dat", wave_type="nm").withZeropoint("AB") for b in "gri"}
    t = Template.named(template)
    mine = {b: ab_magnitude_offset(t, load_filter(f"LSST_{b}"), z) for b in "gri"}
    for a, b in (("g", "r"), ("r", "i")):
        reference = sed.calculateMagnitude(filters[a]) - sed.calculateMagnitude(filters[b])
        assert mine[a] - mine[b] == pytest.approx(reference, abs=0.01)


def test_template_magnitude_matches_direct_quadrature():
    # Direct numerical integration (scipy.integrate.quad) of the redshifted template through the
    # filter curve, photon-counting AB definition (Hogg et al. 2002, eq. 8 form).
    t, f = Template.named("spiral"), load_filter("LSST_r")
    z = 0.8
    lo, hi = f.wavelength[0], f.wavelength[-1]
    thr = lambda lam: np.interp(lam, f.wavelength, f.throughput)  # noqa: E731
    points = list(t.wavelength[(t.wavelength * (1 + z) > lo) & (t.wavelength * (1 + z) < hi)] * (1 + z))
    num = integrate.quad(lambda lam: t.f_lambda(lam / (1 + z)) / (1 + z) * thr(lam) * lam, lo, hi,
                         points=points[:49] + list(f.wavelength[1:-1][:49]), limit=500)[0]
    ab = integrate.quad(lambda lam: 3631e-23 * 2.99792458e17 / lam**2 * thr(lam) * lam, lo, hi,
                        points=list(f.wavelength[1:-1][:49]), limit=500)[0]
    assert ab_magnitude_offset(t, f, z) == pytest.approx(-2.5 * math.log10(num / ab), abs=2e-3)


def test_k_correction_vanishes_in_the_rest_filter_at_z_zero():
    # Hogg et al. (2002): K_RR(0) = 0 by definition.
    k = KCorrection(Template.named("elliptical"), load_filter("LSST_r"), load_filter("LSST_r"), z_max=1.0)
    assert abs(k(0.0)) < 1e-9


# -- physical recipe ----------------------------------------------------------------------------
def test_physical_recipe_draws_consistent_systems():
    recipe = parse_recipe(PHYSICAL_RECIPE)
    sampler = PopulationSampler(recipe)
    systems = [sampler.draw(i) for i in range(60)]
    cosmo = sampler.cosmology
    for s in systems:
        assert s.z_source > s.z_lens and s.multiply_imaged and s.placement == "lens"
        # Einstein radius of the SIS with the drawn sigma and astropy's distances (SEF 1992 eq. 8.36)
        ratio = (cosmo.angular_diameter_distance(s.z_lens, s.z_source) / cosmo.angular_diameter_distance(s.z_source)).value
        assert s.einstein_radius == pytest.approx(4 * math.pi * (s.velocity_dispersion / 299792.458) ** 2 * ratio
                                                  * 206264.806, rel=1e-5)
        # Lens apparent magnitude = M + distance modulus + K (astropy's distmod)
        # M/L = 3 of today's luminosity, the luminosity seen brightened by 0.85 z mag (passive evolution)
        assert s.lens_stellar_mass == pytest.approx(3.0 * s.lens_luminosity * 10 ** (-0.4 * 0.85 * s.z_lens))
        assert math.isfinite(s.source_absolute_magnitude)
        assert math.hypot(s.source_x, s.source_y) <= s.region_radius
    # lens light follows the mass's orientation within the scatter (10 deg)
    d_angle = np.array([s.lens_angle - s.mass_angle for s in systems])
    assert np.std(d_angle) < 20.0


def test_lens_light_follows_the_mass_with_the_slacs_scatter():
    # Koopmans et al. (2006, ApJ 649, 599; from memory): q_SIE / q_light = 0.99 +- 0.11 and the mass
    # and light major axes aligned within about 10 degrees; simlens draws q_mass / q_light ~ N(1,
    # 0.11) and an angle offset ~ N(0, 10 deg).  4,000 galaxies with q_mass = 0.5 (no clipping).
    from simlens.cosmology import DistanceTable
    from simlens.populations.galaxies import LensLightModel

    recipe = parse_recipe(PHYSICAL_RECIPE)
    model = LensLightModel(recipe.lens.light.scaling, DistanceTable(recipe.cosmology.build()), {"r": "LSST_r"}, ".")
    n = 4000
    normals = np.random.default_rng(4).standard_normal((n, LensLightModel.NORMALS))
    lights = model.draw_many(np.full(n, 250.0), np.full(n, 0.4), np.full(n, 0.5), np.full(n, 30.0), normals)
    ratio = 0.5 / np.array([g.q for g in lights])
    offset = np.array([g.angle for g in lights]) - 30.0
    assert ratio.mean() == pytest.approx(1.0, abs=4 * 0.11 / math.sqrt(n))
    assert ratio.std() == pytest.approx(0.11, rel=0.05)
    assert offset.std() == pytest.approx(10.0, rel=0.05) and abs(offset.mean()) < 4 * 10.0 / math.sqrt(n)


def test_lens_light_brightens_passively_with_redshift_at_fixed_size_and_mass():
    # Bernardi et al. (2003, AJ 125, 1849; from memory): early types at fixed sigma are brighter by
    # about 0.85 z mag in r (luminosity_evolution): the same draws without it are fainter by exactly
    # 0.85 z in every band, with the same half-light radius and stellar mass.
    evolving = PopulationSampler(parse_recipe(PHYSICAL_RECIPE))
    still = PopulationSampler(parse_recipe(PHYSICAL_RECIPE.replace("mass_to_light = 3.0",
                                                                   "mass_to_light = 3.0\nluminosity_evolution = 0.0")))
    for a, b in zip(evolving.draw_many(range(8)), still.draw_many(range(8))):
        assert (a.z_lens, a.velocity_dispersion) == (b.z_lens, b.velocity_dispersion)
        for band in a.lens_magnitudes:
            assert a.lens_magnitudes[band] - b.lens_magnitudes[band] == pytest.approx(-0.85 * a.z_lens, abs=1e-9)
        assert a.lens_half_light_radius == pytest.approx(b.lens_half_light_radius, rel=1e-12)
        assert a.lens_stellar_mass == pytest.approx(b.lens_stellar_mass, rel=1e-12)


def test_uv_sizes_follow_the_shibuya_relation_and_meet_shen_at_z_1():
    # Shibuya, Ouchi & Harikane (2015; from memory): star-forming galaxies' rest-UV sizes r_e ~
    # L_UV^0.27 (1 + z)^-1.3, 1.66 kpc at z = 2 for 0.6 L*_UV(z=3).  A least-squares fit
    # (numpy.linalg.lstsq) to sources drawn without scatter recovers both exponents; the UV magnitude
    # is the counts-band magnitude less the distance modulus plus 2.5 log10(1 + z) (flat f_nu; astropy
    # distmod).  The mixed relation turns from Shen et al. (2003) at z = 1 with a median jump under 25 %.
    import dataclasses

    from simlens.cosmology import DistanceTable
    from simlens.populations.galaxies import SourceModel

    recipe = parse_recipe(PHYSICAL_RECIPE)
    distances = DistanceTable(recipe.cosmology.build())
    settings = dataclasses.replace(recipe.source.counts, size_relation="shibuya2015", size_scatter=False)
    model = SourceModel(settings, distances, {"i": "LSST_i"}, "i", None, ".")
    rng = np.random.default_rng(3)
    m, z = rng.uniform(23.0, 27.0, 400), rng.uniform(1.0, 4.0, 400)
    sources = model.complete_many(m, z, np.zeros((400, 0)))
    r_kpc = np.array([s.half_light_radius_kpc for s in sources])
    uv = m - np.asarray(recipe.cosmology.build().distmod(z).value) + 2.5 * np.log10(1 + z)
    design = np.column_stack([-0.4 * uv, np.log10(1 + z), np.ones_like(z)])
    (alpha, beta, _), *_ = np.linalg.lstsq(design, np.log10(r_kpc), rcond=None)
    assert alpha == pytest.approx(0.27, abs=1e-3) and beta == pytest.approx(-1.3, abs=1e-3)
    at_two = model.uv_sizes.mean_log_radius(-21.0 + 2.5 * math.log10(1 / 0.6), 2.0)
    assert 10 ** float(at_two) == pytest.approx(6.9 * 3 ** -1.3, rel=1e-9)
    mixed = SourceModel(dataclasses.replace(settings, size_relation="mixed"), distances, {"i": "LSST_i"}, "i", None, ".")
    shen = SourceModel(dataclasses.replace(settings, size_relation="shen2003"), distances, {"i": "LSST_i"}, "i", None, ".")
    below = [s.half_light_radius for s in shen.complete_many(np.full(50, 24.5), np.full(50, 0.999), np.zeros((50, 0)))]
    above = [s.half_light_radius for s in mixed.complete_many(np.full(50, 24.5), np.full(50, 1.0), np.zeros((50, 0)))]
    assert np.median(above) == pytest.approx(np.median(below), rel=0.25)

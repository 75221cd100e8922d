"""Quasars on the sky from a published luminosity function, and the lensed-quasar forecast rules."""

from __future__ import annotations

import math

import numpy as np
import pytest
from astropy.cosmology import FlatLambdaCDM
from scipy import integrate, stats

from simlens.cosmology import DistanceTable
from simlens.populations.photometry import load_filter
from simlens.populations.quasars import ARCMIN2_PER_STERADIAN, QUASAR_LUMINOSITY_FUNCTIONS, QuasarPopulation

COSMOLOGY = FlatLambdaCDM(H0=70.0, Om0=0.3)


def richards2005(absolute_g, z):
    # Richards et al. (2005) double power law (from memory), written out independently
    m_star = -21.61 - 2.5 * (1.39 * z - 0.29 * z**2)
    d = absolute_g - m_star
    return 1.83e-6 / (10 ** (0.4 * (-3.31 + 1) * d) + 10 ** (0.4 * (-1.45 + 1) * d))


def test_quasar_density_and_draws_against_scipy_and_astropy():
    # N = int dz dV/dz/dOmega int dm Phi(M(m, z), z): astropy's volume element and distance
    # modulus, scipy's double quadrature; M(m, z) through the power-law continuum (f_nu ~ nu^-0.44):
    # m = M + DM - 2.5 log10(1+z) + 2.5 alpha log10(lambda / ((1+z) 470 nm)) (Hogg et al. 2002).
    lam = load_filter("LSST_i").mean_wavelength
    z_range, m_range = (0.5, 3.0), (17.0, 23.0)
    population = QuasarPopulation(QUASAR_LUMINOSITY_FUNCTIONS["richards2005"], DistanceTable(COSMOLOGY), 0.7,
                                  z_range, m_range, lam, -0.44)

    def integrand(m, z):
        absolute = (m - COSMOLOGY.distmod(z).value + 2.5 * math.log10(1 + z)
                    - 2.5 * -0.44 * math.log10(lam / ((1 + z) * 470.0)))
        return richards2005(absolute, z) * COSMOLOGY.differential_comoving_volume(z).value

    total, _ = integrate.dblquad(integrand, *z_range, *m_range, epsrel=1e-5)
    assert population.sky_density == pytest.approx(total / ARCMIN2_PER_STERADIAN, rel=2e-3)
    rng = np.random.default_rng(2)
    z, m = population.draw(*rng.uniform(size=(3, 20000)))
    assert np.all((z >= 0.5) & (z <= 3.0) & (m >= 17.0) & (m <= 23.0))
    # the magnitude distribution of the draws against the quadrature's, by a KS test
    edges = np.linspace(17.0, 23.0, 61)
    shares = np.array([integrate.dblquad(integrand, *z_range, a, b, epsrel=1e-4)[0] for a, b in zip(edges[:-1], edges[1:])])
    cdf = np.concatenate([[0.0], np.cumsum(shares)]) / shares.sum()
    assert stats.kstest(m, lambda x: np.interp(x, edges, cdf)).pvalue > 0.01


def test_om10_quasar_rules_need_a_luminosity_function():
    from simlens.errors import SimlensError
    from simlens.forecast import RARE_SOURCE_DRAW_DENSITY, forecast, forecast_recipe
    from simlens.recipe import load_recipe
    from simlens.truth.sampler import PopulationSampler

    with pytest.raises(SimlensError, match="om10_quasar go with"):
        forecast(load_recipe("recipes/forecasts/ground_wide.toml"), 10, 1.0, "om10_quasar")
    recipe = load_recipe("recipes/forecasts/quasars_wide.toml")
    result = forecast(recipe, 3000, 20000.0, "om10_quasar")
    density = PopulationSampler(forecast_recipe(recipe, "om10_quasar")).source_density
    assert 0.3 < density < 0.8  # per arcmin^2 to i = 26 (1,000 to 3,000 per deg^2)
    assert result.boost == pytest.approx(RARE_SOURCE_DRAW_DENSITY / density, rel=1e-12)
    for row in result.detections:
        assert row["n_images"] >= 2


def test_lensed_quasars_without_cuts_are_the_counts_times_the_optical_depth(monkeypatch):
    # As the supernovae of tests/test_forecast.py: N = int dN/dz tau(z) dz, tau of TOG84 for
    # non-evolving SIS deflectors (Choi et al. 2007), scipy's trapezoid over the counts' redshifts.
    from astropy import constants, units as u

    from simlens.forecast import DEGREE2_PER_STERADIAN, forecast
    from simlens.populations.velocity_function import VELOCITY_FUNCTIONS
    from simlens.recipe import parse_recipe
    from simlens.truth.sampler import PopulationSampler

    from .test_placement import BASE

    text = BASE.replace("count = 10", "count = 100").replace("[source]\nredshift = 2.0\n", "[source]\n") + """
[lens.population]
velocity_function = "choi2007"
redshift_range = [0.001, 2.5]
velocity_dispersion_range = [200.0, 300.0]
[source.quasar]
luminosity_function = "richards2005"
magnitude_range = [16.0, 23.0]
redshift_range = [0.3, 2.5]
host = false
[source.position]
mode = "sky"
"""
    recipe = parse_recipe(text.replace("[survey.bands.r]", "[survey.bands.r]\nfilter = \"LSST_r\"", 1))
    monkeypatch.setattr("simlens.forecast.RARE_SOURCE_DRAW_DENSITY", 40.0)
    result = forecast(recipe, 30000, 1.0, "multiply_imaged")
    population = PopulationSampler(recipe).quasar_population
    z = 0.5 * (population._z[1:] + population._z[:-1])
    per_z = population._cells.sum(axis=1) / np.diff(population._z)  # dN/dz/dOmega
    cosmo = recipe.cosmology.build()
    vdf = VELOCITY_FUNCTIONS["choi2007"]
    c = constants.c.to_value(u.km / u.s)
    tau = (16 * np.pi**3 / 30 * vdf.density(cosmo.h) * vdf.fraction_between(200.0, 300.0) * vdf.moment(4, 200.0, 300.0)
           * cosmo.comoving_distance(z).value ** 3 / c**4)
    expected = integrate.trapezoid(per_z * tau, z) / DEGREE2_PER_STERADIAN
    assert result.per_deg2 == pytest.approx(expected, abs=4 * result.sampling_error_per_deg2)
    assert result.sampling_error_per_deg2 < 0.1 * expected

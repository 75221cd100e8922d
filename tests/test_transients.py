"""Light curves of type Ia supernovae and variable quasars, and the survey's epochs, checked against
published forms and reference libraries (GalSim's SED and filter machinery, astropy distances)."""

from __future__ import annotations

import math

import galsim
import numpy as np
import pytest
from astropy.cosmology import Planck18

from simlens.populations.photometry import Filter, load_filter
from simlens.recipe import parse_recipe
from simlens.transients.cadence import DAYS_PER_YEAR, survey_epochs
from simlens.transients.supernova import REST_FRAME_B, SpectralTimeSeries, SupernovaModel, template_b_flux
from simlens.transients.variability import DampedRandomWalk, structure_function

SPECTRA = SpectralTimeSeries.simplified_ia()


def galsim_magnitude(spectra: SpectralTimeSeries, phase_index: int, band: str, z: float) -> float:
    """AB magnitude of one phase of the series at redshift z through GalSim's own SED and Bandpass
    (photon counting), without the distance (GalSim's redshifted SED carries the 1/(1+z) of the
    observed flux density, as in Hogg et al. 2002's K-correction)."""
    table = galsim.LookupTable(spectra.wavelength, spectra.flux[phase_index], interpolant="linear")
    sed = galsim.SED(table, wave_type="nm", flux_type="flambda").atRedshift(z)
    bandpass = galsim.Bandpass(str(galsim.meta_data.share_dir) + f"/bandpasses/{band}.dat", wave_type="nm")
    return sed.calculateMagnitude(bandpass.withZeropoint("AB"))


@pytest.mark.parametrize("z, band", [(0.3, "LSST_r"), (0.8, "LSST_i"), (1.2, "LSST_z")])
def test_supernova_peak_is_m_plus_distance_modulus_plus_k_correction(z, band):
    # m_Q = M + DM(z) + K_QB(z) (Hogg et al. 2002): DM from astropy, K from GalSim's SED and
    # filters, against the model's light curve at maximum.
    model = SupernovaModel(SPECTRA, {"x": load_filter(band)})
    peak_index = int(np.argmin(np.abs(SPECTRA.phase)))
    k = galsim_magnitude(SPECTRA, peak_index, band, z) - galsim_magnitude(SPECTRA, peak_index, REST_FRAME_B, 0.0)
    modulus = float(Planck18.distmod(z).value)
    curve = model.light_curve(z, 1.0, -19.4, modulus, peak_time=61000.0)
    at_peak = curve.magnitudes_at([61000.0])["x"][0]
    assert at_peak == pytest.approx(-19.4 + modulus + k, abs=0.005)


def test_rest_frame_widths_scale_with_one_plus_z_and_stretch():
    # Through the rest-frame B curve moved to (1+z) lambda, the observed light curve is the rest B
    # curve, (1+z) s times wider and 2.5 log10(1+z) fainter than M + DM (the K-correction of
    # matched bands in AB, Hogg et al. 2002 eq. 13).
    b = load_filter(REST_FRAME_B)
    z, stretch = 1.0, 1.1
    shifted = Filter(name="B at z = 1", wavelength=b.wavelength * (1.0 + z), throughput=b.throughput)
    rest = SupernovaModel(SPECTRA, {"B": b}).light_curve(0.0, 1.0, -19.4, 0.0, 0.0)
    far = SupernovaModel(SPECTRA, {"B": shifted}).light_curve(z, stretch, -19.4, 40.0, 0.0)

    def width(curve, span):
        t = np.linspace(-span, 3 * span, 40001)
        flux = 10 ** (-0.4 * curve.magnitudes_at(t)["B"])
        above = t[flux >= 0.5 * flux.max()]
        return above[-1] - above[0], -2.5 * math.log10(flux.max())

    w0, peak0 = width(rest, 40.0)
    w1, peak1 = width(far, 40.0 * (1 + z) * stretch)
    assert w1 / w0 == pytest.approx((1.0 + z) * stretch, rel=0.01)
    assert peak0 == pytest.approx(-19.4, abs=0.002)
    assert peak1 == pytest.approx(-19.4 + 40.0 - 2.5 * math.log10(1.0 + z), abs=0.003)


def test_built_in_template_has_the_published_rise_and_decline():
    # Delta m_15(B) = 1.1 for a normal Ia (Phillips 1993), a rise of about 18 days (Riess et al.
    # 1999, Hayden et al. 2010: 17-19.5 d), 0.014 mag/day at +60 to +100 d (figures from memory).
    b = load_filter(REST_FRAME_B)
    curve = SupernovaModel(SPECTRA, {"B": b}).light_curve(0.0, 1.0, -19.4, 0.0, 0.0)
    m = lambda t: float(curve.magnitudes_at([t])["B"][0])  # noqa: E731
    assert m(15.0) - m(0.0) == pytest.approx(1.1, abs=0.03)
    assert (m(100.0) - m(60.0)) / 40.0 == pytest.approx(0.014, abs=0.002)
    assert template_b_flux(-18.01) == 0.0 and template_b_flux(-17.0) > 0.0
    t = np.linspace(-5, 5, 1001)
    assert abs(t[np.argmax(10 ** (-0.4 * curve.magnitudes_at(t)["B"]))]) < 0.5  # maximum at phase 0


def test_spectral_time_series_from_a_file_round_trips(tmp_path):
    phases, lam = SPECTRA.phase[::10], SPECTRA.wavelength[::5]
    flux = SPECTRA.flux[::10, ::5]
    path = tmp_path / "series.txt"
    rows = [(p, w, flux[i, j]) for i, p in enumerate(phases) for j, w in enumerate(lam)]
    np.savetxt(path, rows[::-1], header="phase_day wavelength_nm f_lambda")  # any order
    series = SpectralTimeSeries.from_file(path)
    assert np.allclose(series.phase, phases) and np.allclose(series.wavelength, lam)
    assert np.allclose(series.flux, flux, rtol=1e-12)
    with pytest.raises(ValueError, match="needs all"):
        np.savetxt(path, rows[:-1])
        SpectralTimeSeries.from_file(path)


def test_damped_random_walk_structure_function():
    # SF(dt) = SF_inf (1 - exp(-dt/tau))^1/2 (Kelly, Bechtold & Siemiginowska 2009; MacLeod et
    # al. 2010 eq. 4), measured over 3000 walks at irregular times.
    sf_inf, tau = 0.2, 150.0
    rng = np.random.default_rng(4)
    lags = np.array([5.0, 30.0, 150.0, 600.0])
    differences = {lag: [] for lag in lags}
    for k in range(3000):
        start = rng.uniform(0, 1000)
        times = np.concatenate([[start], start + lags, rng.uniform(0, 2000, 5)])  # extra times in between
        walk = DampedRandomWalk(mean_magnitudes=(("r", 20.0),), sf_inf=(("r", sf_inf),), tau=tau, seed=k + 1)
        m = walk.magnitudes_at(times)["r"]
        for j, lag in enumerate(lags):
            differences[lag].append(m[1 + j] - m[0])
    for lag in lags:
        measured = math.sqrt(np.mean(np.square(differences[lag])))
        # the rms of 3000 Gaussian differences is known to 1.3 % (1 sigma); 4 sigma
        assert measured == pytest.approx(float(structure_function(lag, sf_inf, tau)), rel=0.052)


def test_damped_random_walk_bands_vary_together_with_their_amplitudes():
    walk = DampedRandomWalk(mean_magnitudes=(("g", 21.0), ("i", 20.5)), sf_inf=(("g", 0.3), ("i", 0.2)),
                            tau=200.0, seed=7)
    m = walk.magnitudes_at(np.linspace(0, 5000, 400))
    assert np.allclose((m["g"] - 21.0) / 0.3, (m["i"] - 20.5) / 0.2)
    again = walk.magnitudes_at(np.linspace(0, 5000, 400))
    assert np.array_equal(m["g"], again["g"])  # a function of its times and seed


CADENCE_RECIPE = """
name = "cadence"
count = 4
seed = 3
[survey]
pixel_scale = 0.2
cutout_size = 32
reference_band = "r"
[survey.seeing]
fwhm = { normal = [0.8, 0.1], within = [0.5, 1.2] }
[survey.cadence]
start = 61000.0
length = 1000.0
season = 200.0
jitter = 0.1
weather_loss = 0.3
[survey.bands.g]
filter = "LSST_g"
zero_point = 28.0
sky_brightness = { normal = [22.0, 0.3], within = [21.0, 23.0] }
exposure_time = 30.0
gain = 1.0
revisit = 3.0
[survey.bands.r]
filter = "LSST_r"
zero_point = 28.0
sky_brightness = 21.0
exposure_time = 30.0
gain = 1.0
revisit = 2.0
[cosmology]
name = "Planck18"
[lens]
redshift = 0.4
velocity_dispersion = 250.0
[lens.light]
magnitude = 19.0
half_light_radius = 1.0
colors = { g = 0.8 }
[source]
redshift = 1.0
magnitude = 23.0
half_light_radius = 0.2
colors = { g = 0.3 }
"""


def test_cadence_model_keeps_seasons_gaps_and_weather():
    epochs = survey_epochs(parse_recipe(CADENCE_RECIPE))
    t = epochs.time
    assert np.all(np.diff(t) >= 0)
    assert np.all(np.mod(t - 61000.0, DAYS_PER_YEAR) < 200.0)  # in season
    nominal = sum(int(np.sum(np.mod(np.arange(0, 1000.0 + 1e-9, gap), DAYS_PER_YEAR) < 200.0))
                  for gap in (3.0, 2.0))
    kept = len(epochs) / nominal
    assert kept == pytest.approx(0.7, abs=0.05)  # 30 % of nights lost, a binomial spread of ~3 %
    for band, gap in (("g", 3.0), ("r", 2.0)):
        times = t[np.array(epochs.band) == band]
        steps = np.diff(times)
        # gaps are whole multiples of the revisit time, to the jitter (two times' of rms 0.1 d: 6 sigma)
        assert np.allclose(steps / gap, np.round(steps / gap), atol=6 * 0.1 * math.sqrt(2) / gap)
        assert np.min(np.round(steps / gap)) >= 1
    sky = np.array([c.sky_brightness for c in epochs.conditions if c.name == "g"])
    fwhm = np.array([c.psf_fwhm for c in epochs.conditions])
    assert sky.std() == pytest.approx(0.3, rel=0.15) and fwhm.mean() == pytest.approx(0.8, abs=0.02)
    assert survey_epochs(parse_recipe(CADENCE_RECIPE)).time.tolist() == t.tolist()  # from the seed alone


def test_visits_file_gives_the_epochs(tmp_path):
    (tmp_path / "visits.txt").write_text("# mjd band [fwhm sky]\n61002.5 r\n61001.0 g 0.7 21.5\n61003.0 r\n")
    recipe_path = tmp_path / "recipe.toml"
    recipe_path.write_text(CADENCE_RECIPE.replace('start = 61000.0', 'visits = "visits.txt"'))
    from simlens.recipe import load_recipe

    epochs = survey_epochs(load_recipe(recipe_path))
    assert epochs.time.tolist() == [61001.0, 61002.5, 61003.0] and epochs.band == ("g", "r", "r")
    assert epochs.conditions[0].psf_fwhm == 0.7 and epochs.conditions[0].sky_brightness == 21.5
    (tmp_path / "visits.txt").write_text("61002.5 z\n")
    with pytest.raises(Exception, match="is not a band"):
        load_recipe(recipe_path)


def test_supernova_rate_density_and_redshifts_against_astropy_and_scipy():
    # N/Omega = int r_V(z) T / (1+z) dV_C/dz/dOmega dz (Hogg 1999; Dilday et al. 2010's rate, from
    # memory): astropy's Planck18 volume element and scipy's quadrature against the tabulation.
    from scipy import integrate, stats

    from simlens.cosmology import DistanceTable
    from simlens.transients.rates import ARCMIN2_PER_STERADIAN, SUPERNOVA_RATES, SupernovaPopulation

    rate = SUPERNOVA_RATES["dilday2010"]
    population = SupernovaPopulation(rate, DistanceTable(Planck18), Planck18.h, (0.05, 1.5), 365.25)

    def per_steradian(z):
        return (2.69e-5 * (Planck18.h / 0.7) ** 3 * (1 + z) ** 1.5 / (1 + z)
                * Planck18.differential_comoving_volume(z).value)

    total, _ = integrate.quad(per_steradian, 0.05, 1.5)
    assert population.sky_density == pytest.approx(total / ARCMIN2_PER_STERADIAN, rel=2e-3)
    z = population.draw_redshift(np.random.default_rng(1).uniform(size=20000))
    grid = np.linspace(0.05, 1.5, 301)
    cumulative = np.concatenate([[0.0], np.cumsum([integrate.quad(per_steradian, a, b)[0]
                                                   for a, b in zip(grid[:-1], grid[1:])])]) / total
    assert stats.kstest(z, lambda x: np.interp(x, grid, cumulative)).pvalue > 0.01


SN_SKY_RECIPE = CADENCE_RECIPE.replace("""[source]
redshift = 1.0
magnitude = 23.0""", """[source]
magnitude = 23.0""") + """
[source.supernova]
rate = "dilday2010"
redshift_range = [0.1, 1.2]
[source.position]
mode = "sky"
"""


def test_sky_mode_supernovae_take_the_rate_density_and_redshifts():
    from simlens.transients.rates import SUPERNOVA_RATES, SupernovaPopulation

    recipe = parse_recipe(SN_SKY_RECIPE.replace("[lens]\nredshift = 0.4", "[lens]\nredshift = 0.05"))
    sampler = simlens_sampler(recipe)
    # the cadence's 1000 days and the default peak_margin of 60 days on both sides
    expected = SupernovaPopulation(SUPERNOVA_RATES["dilday2010"], sampler.distances, Planck18.h, (0.1, 1.2),
                                   1000.0 + 120.0).sky_density
    assert sampler.epochs.span_days == 1000.0
    assert sampler.source_density == pytest.approx(expected, rel=1e-9)
    systems = sampler.draw_many(range(40))
    z = np.array([s.z_source for s in systems])
    assert np.all((z >= 0.1) & (z <= 1.2)) and len(set(z)) == 40
    assert all(s.transient_kind == "sn_ia" for s in systems)
    with pytest.raises(Exception, match="source.redshift: is set together with source.supernova.rate"):
        parse_recipe(SN_SKY_RECIPE.replace("[source]\n", "[source]\nredshift = 1.0\n"))


def simlens_sampler(recipe):
    from simlens.truth.sampler import PopulationSampler

    return PopulationSampler(recipe)


def test_band_light_curve_tables_are_dilated_and_shifted(tmp_path):
    # A user's light curves in the survey's bands: m_b(t) = M + DM + offset_b(p), p = (t - t_peak) /
    # ((1 + z) s): the time dilation of an expanding universe (common practice) and no K-correction.
    from simlens.transients.supernova import BandLightCurves

    phases = np.arange(-15.0, 61.0, 1.0)
    shape = -2.5 * np.log10(np.clip(template_b_flux(phases), 1e-12, None))
    path = tmp_path / "curves.txt"
    path.write_text("".join(f"{p} {band} {m + (0.3 if band == 'g' else 0.0)}\n"
                            for band in ("g", "r") for p, m in zip(phases, shape)))
    table = BandLightCurves.from_file(path, ("g", "r"))
    curve = SupernovaModel(table, {}).light_curve(0.5, 1.2, -19.0, 42.0, peak_time=61000.0)
    t = 61000.0 + 1.5 * 1.2 * np.array([-10.0, 0.0, 15.0])
    m = curve.magnitudes_at(t)
    expected = -19.0 + 42.0 + np.interp([-10.0, 0.0, 15.0], phases, shape)
    assert np.allclose(m["r"], expected, atol=1e-9) and np.allclose(m["g"], expected + 0.3, atol=1e-9)
    path.write_text("0 g 0.0\n1 g 0.1\n")
    with pytest.raises(ValueError, match="band 'r' needs two phases"):
        BandLightCurves.from_file(path, ("g", "r"))

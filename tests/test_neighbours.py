"""Crowded cutouts ([neighbours]): unlensed galaxies and stars in each cutout and its PSF margin.

References: the number of objects per cutout is Poisson with mean the number-count integral
N(< m1) - N(< m0), N(< m) = density 10^(slope (m - pivot)) per arcmin^2 (LSST Science Book 2009,
eq. 3.7, the counts the recipe gives), times the area drawn over less the clearance disc; the
magnitudes follow the counts' cumulative shape (scipy's Kolmogorov-Smirnov test); a neighbour's
flux is measured with photutils aperture photometry against the counts its magnitude gives
through the zero point (AB magnitudes, common practice).
"""

from __future__ import annotations

import math

import galsim
import numpy as np
import pytest
from astropy.io import fits
from scipy import stats

import simlens
from simlens.errors import RecipeError
from simlens.recipe import parse_recipe
from simlens.truth.sampler import PopulationSampler

from .conftest import SMALL_RECIPE

FILTERS = SMALL_RECIPE.replace("[survey.bands.g]\n", '[survey.bands.g]\nfilter = "LSST_g"\n').replace(
    "[survey.bands.r]\n", '[survey.bands.r]\nfilter = "LSST_r"\n')


def crowded(neighbours: str, count: int = 6, size: int = 32) -> str:
    text = FILTERS.replace("count = 6", f"count = {count}").replace("cutout_size = 32", f"cutout_size = {size}")
    return text + "\n" + neighbours


def counts_between(density, pivot, slope, m0, m1):
    return density * (10 ** (slope * (m1 - pivot)) - 10 ** (slope * (m0 - pivot)))


def test_counts_per_cutout_follow_the_number_count_integral():
    galaxies = dict(density=46.0, pivot=25.0, slope=0.31, m0=20.0, m1=25.0)
    stars = dict(density=2.0, pivot=21.0, slope=0.12, m0=16.0, m1=24.0)
    recipe = parse_recipe(crowded(f"""
        [neighbours]
        clearance = 1.5
        [neighbours.galaxies]
        density = {galaxies['density']}
        magnitude_range = [{galaxies['m0']}, {galaxies['m1']}]
        lens_clearance = 2.0
        [neighbours.stars]
        density = {stars['density']}
        magnitude_range = [{stars['m0']}, {stars['m1']}]
    """.replace("\n        ", "\n"), count=400))
    sampler = PopulationSampler(recipe)
    systems = sampler.draw_many(range(400))
    scale, size = 0.2, 32
    n_galaxies, n_stars, expected_galaxies, expected_stars, mags = [], [], [], [], []
    for system in systems:
        objects = system.neighbours
        fwhm = max(b.psf_fwhm for b in system.bands)  # round PSFs: the major axis is the FWHM
        side = (size + 2 * math.ceil(5.0 * fwhm / scale)) * scale / 60.0  # arcmin: cutout + PSF margin
        galaxy_hole = math.pi * (max(2.0 * system.einstein_radius, 1.5) / 60.0) ** 2
        star_hole = math.pi * (1.5 / 60.0) ** 2
        expected_galaxies.append(counts_between(**galaxies) * (side**2 - galaxy_hole))
        expected_stars.append(counts_between(**stars) * (side**2 - star_hole))
        kind = objects.kind
        n_galaxies.append(int(np.sum(kind == "galaxy")))
        n_stars.append(int(np.sum(kind == "star")))
        mags.append(objects.magnitudes["r"][kind == "galaxy"])
        # nothing within the clearances
        centre = 0.5 * (size - 1)
        distance = np.hypot(objects.x - centre, objects.y - centre) * scale
        assert np.all(distance[kind == "star"] >= 1.5)
        assert np.all(distance[kind == "galaxy"] >= max(2.0 * system.einstein_radius, 1.5))
    for counts, expected in ((n_galaxies, expected_galaxies), (n_stars, expected_stars)):
        total, mean = sum(counts), sum(expected)
        assert abs(total - mean) < 4 * math.sqrt(mean), (total, mean)  # Poisson, 4 sigma
        # Poisson scatter: E (n - mu)^2 = mu, with variance mu + 2 mu^2 (the Poisson moments)
        squares = sum((n - mu) ** 2 for n, mu in zip(counts, expected))
        spread = math.sqrt(sum(mu + 2 * mu**2 for mu in expected))
        assert abs(squares - mean) < 4 * spread, (squares, mean)
    # magnitudes follow the cumulative counts
    m0, m1, slope, pivot = galaxies["m0"], galaxies["m1"], galaxies["slope"], galaxies["pivot"]

    def cdf(m):
        return (10 ** (slope * (np.clip(m, m0, m1) - pivot)) - 10 ** (slope * (m0 - pivot))) / \
            (10 ** (slope * (m1 - pivot)) - 10 ** (slope * (m0 - pivot)))

    assert stats.kstest(np.concatenate(mags), cdf).pvalue > 1e-3


def test_neighbour_fluxes_match_their_magnitudes(tmp_path):
    from photutils.aperture import CircularAperture, aperture_photometry

    recipe = parse_recipe(crowded("""
        [neighbours]
        clearance = 3.0
        [neighbours.galaxies]
        density = 0.0
        [neighbours.stars]
        density = 60.0
        pivot = 22.0
        magnitude_range = [19.0, 22.0]
    """.replace("\n        ", "\n"), count=12, size=96))
    simlens.run(recipe, tmp_path / "run")
    checked = 0
    for shard in sorted((tmp_path / "run" / "shards").glob("*.fits")):
        with fits.open(shard) as hdul:
            images, lens, source = hdul["IMAGES"].data, hdul["LENS"].data, hdul["SOURCE"].data
            neighbours, variance = hdul["NEIGHBOURS"].data, hdul["VARIANCE"].data
            truth, objects = hdul["TRUTH"].data, hdul["NEIGHBOUR_TRUTH"].data
        for k, row in enumerate(truth):
            mine = objects[objects["system_id"] == row["system_id"]]
            for b, band in enumerate(("g", "r")):
                fwhm = row[f"psf_fwhm_{band}"]
                radius = 3.0 * fwhm / 0.2  # pixels
                # the share of a star's light in that aperture: GalSim's PSF (the recipe's: Moffat 3 in g,
                # Kolmogorov in r) convolved with the pixel, measured by the same photometry
                psf = galsim.Moffat(beta=3.0, fwhm=fwhm) if band == "g" else galsim.Kolmogorov(fwhm=fwhm)
                drawn = galsim.Convolve(psf, galsim.Pixel(0.2)).drawImage(nx=201, ny=201, scale=0.2, method="no_pixel")
                enclosed = aperture_photometry(drawn.array, CircularAperture((100, 100), r=radius))["aperture_sum"][0]
                for obj in mine:
                    x, y = obj["x_pixel"], obj["y_pixel"]
                    others = np.hypot(mine["x_pixel"] - x, mine["y_pixel"] - y)
                    if not (radius <= x <= 95 - radius and radius <= y <= 95 - radius) or np.sum(others < 2 * radius) > 1:
                        continue  # partly outside the cutout, or blended
                    aperture = CircularAperture((x, y), r=radius)
                    expected = 10 ** (-0.4 * (obj[f"mag_{band}"] - row[f"magzero_{band}"])) * enclosed
                    noiseless = aperture_photometry(neighbours[k, b], aperture)["aperture_sum"][0]
                    assert noiseless == pytest.approx(expected, rel=0.005)
                    # the observed image, less the lens and the arcs, within 4 sigma of its noise
                    residual = images[k, b] - lens[k, b] - source[k, b]
                    observed = aperture_photometry(residual, aperture)["aperture_sum"][0]
                    sigma = math.sqrt(aperture_photometry(variance[k, b], aperture)["aperture_sum"][0])
                    assert abs(observed - expected) < 4 * sigma + 0.005 * expected
                    checked += 1
    assert checked >= 10


def test_neighbours_are_refused_in_field_runs():
    from .test_field import field_recipe

    text = field_recipe() + "\n[neighbours]\n"
    with pytest.raises(RecipeError, match="neighbours"):
        parse_recipe(text)


def test_crowded_cutouts_are_a_function_of_the_system_id():
    recipe = parse_recipe(crowded("[neighbours]\n", count=6))
    sampler = PopulationSampler(recipe)
    first = sampler.draw_many(range(6))
    again = sampler.draw_many([5, 2, 2, 0])
    assert again[0].neighbours == first[5].neighbours and again[1].neighbours == first[2].neighbours
    assert again[3].neighbours == first[0].neighbours
    assert first[0].neighbours != first[1].neighbours


def test_the_realistic_recipe_renders_crowded_coadds_through_optics(tmp_path):
    # recipes/survey_realistic.toml: neighbours drawn through a PSF with optics (GalSim evaluates
    # that convolution only by drawing it), coadd noise, bulges, knots, satellites, all at once
    from pathlib import Path

    recipe = simlens.load_recipe(Path(__file__).parents[1] / "recipes" / "survey_realistic.toml").with_overrides(count=2)
    simlens.run(recipe, tmp_path / "run")
    with fits.open(next((tmp_path / "run" / "shards").glob("*.fits"))) as hdul:
        truth, header = hdul["TRUTH"].data, hdul["IMAGES"].header
        assert np.all(np.isfinite(hdul["IMAGES"].data)) and hdul["NEIGHBOURS"].data.shape == hdul["IMAGES"].data.shape
    ccd = (truth["sky_level_r"] * 4.0 + 7.0**2) / 4.0**2  # the CCD equation (gain 4, read noise 7)
    assert np.all(truth["sky_variance_r"] < 0.9 * ccd)  # resampled: below it
    assert header["NAXIS1"] == 64

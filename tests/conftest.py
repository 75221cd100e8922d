"""Shared fixtures: a small, fast recipe (two bands, 32x32 cutouts)."""

from __future__ import annotations

import textwrap

import pytest

from simlens.recipe import parse_recipe

SMALL_RECIPE = textwrap.dedent("""
    name = "small"
    count = 6
    seed = 42

    [survey]
    name = "Test survey (illustrative)"
    pixel_scale = 0.2
    cutout_size = 32
    supersampling = 4
    reference_band = "r"

    [survey.bands.g]
    zero_point = 26.6
    sky_brightness = 22.0
    exposure_time = 900.0
    gain = 4.0
    read_noise = 7.0
    psf = { profile = "moffat", beta = 3.0, fwhm = 0.9 }

    [survey.bands.r]
    zero_point = 26.8
    sky_brightness = 21.2
    exposure_time = 900.0
    gain = 4.0
    read_noise = 7.0
    psf = { profile = "kolmogorov", fwhm = { uniform = [0.7, 0.9] } }

    [cosmology]
    name = "Planck18"

    [lens]
    redshift = { uniform = [0.3, 0.6] }
    velocity_dispersion = { normal = [250.0, 30.0], within = [180.0, 320.0] }

    [lens.mass]
    q = { uniform = [0.6, 1.0] }
    angle = { uniform = [0.0, 180.0] }

    [lens.shear]
    gamma = { uniform = [0.0, 0.05] }
    angle = { uniform = [0.0, 180.0] }

    [lens.light]
    magnitude = { uniform = [19.0, 20.0] }
    colors = { g = 1.4 }
    half_light_radius = { log_uniform = [0.6, 1.2] }
    q = 0.8
    angle = 20.0

    [source]
    redshift = { uniform = [1.5, 2.5] }
    magnitude = { uniform = [22.0, 23.0] }
    colors = { g = 0.3 }
    half_light_radius = 0.25

    [source.clumps]
    count = { choice = [0, 2] }

    [output]
    shard_size = 4
    per_system_files = true
""")


# The same survey with physical populations: a velocity dispersion function, scaling relations,
# number counts and template colours, sources placed in lens mode.
PHYSICAL_RECIPE = textwrap.dedent("""
    name = "physical"
    count = 6
    seed = 7

    [survey]
    name = "Test survey (illustrative)"
    pixel_scale = 0.2
    cutout_size = 32
    supersampling = 4
    reference_band = "r"

    [survey.bands.g]
    filter = "LSST_g"
    zero_point = 26.6
    sky_brightness = 22.0
    exposure_time = 900.0
    gain = 4.0
    read_noise = 7.0
    psf = { profile = "moffat", beta = 3.0, fwhm = 0.9 }

    [survey.bands.r]
    filter = "LSST_r"
    zero_point = 26.8
    sky_brightness = 21.2
    exposure_time = 900.0
    gain = 4.0
    read_noise = 7.0
    psf = { profile = "moffat", beta = 3.0, fwhm = 0.8 }

    [cosmology]
    name = "Planck18"

    [lens.population]
    velocity_function = "choi2007"
    redshift_range = [0.1, 0.9]
    velocity_dispersion_range = [150.0, 350.0]

    [lens.mass]
    q = { uniform = [0.6, 1.0] }
    angle = { uniform = [0.0, 180.0] }

    [lens.shear]
    gamma = { uniform = [0.0, 0.05] }
    angle = { uniform = [0.0, 180.0] }

    [lens.light.scaling]
    mass_to_light = 3.0

    [source.counts]
    magnitude_range = [21.0, 25.0]
    redshift_range = [0.3, 4.0]

    [source]
    q = 0.7

    [source.position]
    mode = "lens"

    [source.clumps]
    count = { choice = [0, 2] }
    template = "irregular"

    [output]
    shard_size = 3
""")


# All the recipe's physics at once: stars plus halo, line of sight, subhalos, multipoles, quasars,
# a second source plane, negatives and a flagged cut on images.
FEATURES_RECIPE = PHYSICAL_RECIPE.replace("count = 6", "count = 20").replace("[lens.mass]\n", """[lens.line_of_sight]
count = { choice = [0, 1, 2] }

[lens.subhalos]
count = { choice = [0, 3] }

[lens.multipoles]
m4_strength = { uniform = [-0.02, 0.02] }

[lens.mass]
model = "stars_and_halo"
halo_mass = { log_uniform = [1e12, 1e13] }
""").replace("[source.position]", """[source.quasar]
magnitude = { uniform = [20.0, 23.0] }

[source.second]
redshift = { uniform = [2.0, 4.5] }
magnitude = 24.0
deflector_velocity_dispersion = { uniform = [0.0, 100.0] }

[source.position]""").replace("[output]", """[negatives]
fraction = 0.3

[selection]
min_arc_snr = 5.0
enforce = false

[output]""").replace("shard_size = 3", "shard_size = 10")


@pytest.fixture
def small_recipe_text() -> str:
    return SMALL_RECIPE


@pytest.fixture
def small_recipe():
    return parse_recipe(SMALL_RECIPE, origin="small.toml", default_name="small")

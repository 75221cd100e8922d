"""Recipe validation: every malformed recipe gives one clear message (file, key path, value, what is
accepted), no traceback, and nothing is written."""

from __future__ import annotations

import pytest

from simlens.cli import main
from simlens.errors import RecipeError
from simlens.recipe import parse_recipe
from simlens.recipe.distributions import Choice, Fixed, Grid, LogUniform, TruncatedNormal, Uniform

from .conftest import PHYSICAL_RECIPE, SMALL_RECIPE


def edit(old: str, new: str) -> str:
    assert old in SMALL_RECIPE, old
    return SMALL_RECIPE.replace(old, new, 1)


def edit_physical(old: str, new: str) -> str:
    assert old in PHYSICAL_RECIPE, old
    return PHYSICAL_RECIPE.replace(old, new, 1)


# (recipe text, key path named in the message, further words the message must contain)
MALFORMED = [
    (edit("[lens.mass]\n", "[lens.mass]\naxis_ratio = 0.7\n"), "lens.mass.axis_ratio", ["unknown key"]),
    (edit("velocity_dispersion =", "velocty_dispersion ="), "lens.velocty_dispersion", ["did you mean 'velocity_dispersion'"]),
    (edit("q = { uniform = [0.6, 1.0] }", "q = { uniform = [0.6, 1.2] }"), "lens.mass.q", ["1.2", "(0, 1]"]),
    (edit("q = { uniform = [0.6, 1.0] }", "q = 0"), "lens.mass.q", ["out of range", "(0, 1]"]),
    (edit("half_light_radius = 0.25", "half_light_radius = -0.25"), "source.half_light_radius", ["-0.25"]),
    (edit("redshift = { uniform = [1.5, 2.5] }", "redshift = { uniform = [0.5, 2.5] }"), "source.redshift",
     ["0.5", "lens.redshift"]),
    (edit("pixel_scale = 0.2", 'pixel_scale = "0.2"'), "survey.pixel_scale", ["must be a number", "'0.2'"]),
    (edit('psf = { profile = "moffat"', 'psf = { profile = "gaussian"'), "survey.bands.g.psf.profile",
     ["'gaussian'", "'moffat'", "'kolmogorov'"]),
    (edit('colors = { g = 1.4 }', 'colors = { i = 1.4 }'), "lens.light.colors.i", ["not a band"]),
    (edit('colors = { g = 0.3 }', 'colors = { }'), "source.colors", ["no colour for band 'g'"]),
    (edit('reference_band = "r"', 'reference_band = "z"'), "survey.reference_band", ["'z'", "'g', 'r'"]),
    (edit("count = { choice = [0, 2] }", "count = { uniform = [0, 2] }"), "source.clumps.count", ["integer"]),
    (edit("count = 6", "count = 2.5"), "count", ["whole number"]),
    (edit('name = "Planck18"', 'name = "Planck19"'), "cosmology.name", ["Planck18"]),
    (edit("magnitude = { uniform = [22.0, 23.0] }", "magnitude = { uniform = [23.0, 22.0] }"), "source.magnitude",
     ["low < high"]),
    (edit("q = { uniform = [0.6, 1.0] }", "q = { normal = [0.8, 0.1] }"), "lens.mass.q", ["within"]),
    (edit("q = { uniform = [0.6, 1.0] }", "q = { uniform = [0.6, 1.0], within = [0, 1] }"), "lens.mass.q.within",
     ["unknown key"]),
    (edit("seed = 42", "seed = -1"), "seed", ["out of range"]),
    (SMALL_RECIPE + "\n[lens]\n", "", ["not valid TOML"]),
    (edit("[survey.bands.g]\nzero_point = 26.6\n", "[survey.bands.g]\n"), "survey.bands.g.zero_point", ["required"]),
    # physical populations
    (edit_physical("[lens.population]\n", "[lens.population]\nredshift = 0.5\n"), "lens.population.redshift",
     ["unknown key"]),
    (edit_physical("[lens.mass]\n", "[lens]\nredshift = 0.5\n[lens.mass]\n"), "lens.redshift",
     ["[lens.population]"]),
    (edit_physical('filter = "LSST_g"\n', ""), "survey.bands.g.filter", ["missing", "template colours"]),
    (edit_physical('filter = "LSST_g"', 'filter = "LSST_q"'), "survey.bands.g.filter", ["no GalSim filter", "LSST_g"]),
    (edit_physical("redshift_range = [0.1, 0.9]", "redshift_range = [0.9, 0.1]"), "lens.population.redshift_range",
     ["low < high"]),
    (edit("[source.clumps]", '[source.position]\nmode = "sky"\n[source.clumps]'), "source.position.density",
     ["missing", "source density"]),
    (edit_physical('mode = "lens"', 'mode = "lens"\ndensity = 40.0'), "source.position.density", ["mode = 'sky'"]),
    (edit_physical('mode = "lens"', 'mode = "lenses"'), "source.position.mode", ["did you mean 'lens'"]),
    (edit_physical('template = "irregular"', 'colors = { g = 0.1 }'), "source.clumps.colors", ["source.counts"]),
    (edit_physical("[output]", '[selection]\nmin_arc_snr = 5.0\narc_snr_band = "z"\n[output]'),
     "selection.arc_snr_band", ["'z'", "'g', 'r'"]),
    (edit_physical("[lens.light.scaling]\n", "[lens.light.scaling]\nplane_c = -8.0\n"), "lens.light.scaling.plane_c",
     ["relations = \"faber_jackson_plane\""]),
    (edit_physical("[lens.light.scaling]\n", '[lens.light.scaling]\nrelations = "faber_jackson_plane"\nplane_c = 0.0\n'),
     "lens.light.scaling", ["outside 0.1-100 kpc", "published plane"]),
    (edit("[source]\n", "[lens.light.scaling]\n[source]\n"), "lens.light.magnitude",
     ["is set together with [lens.light.scaling]"]),
]


@pytest.mark.parametrize("text, key_path, words", MALFORMED, ids=[m[1] or "toml" for m in MALFORMED])
def test_malformed_recipe_is_reported_clearly_by_the_api(text, key_path, words):
    with pytest.raises(RecipeError) as info:
        parse_recipe(text, origin="bad.toml")
    message = str(info.value)
    assert message.startswith("bad.toml")
    assert key_path in message
    for word in words:
        assert word in message, (word, message)


@pytest.mark.parametrize("text, key_path, words", MALFORMED[:12], ids=[m[1] for m in MALFORMED[:12]])
def test_malformed_recipe_on_the_command_line(tmp_path, capsys, text, key_path, words):
    recipe = tmp_path / "bad.toml"
    recipe.write_text(text)
    out = tmp_path / "run"
    status = main(["make", str(recipe), "--out", str(out), "--quiet"])
    captured = capsys.readouterr()
    assert status == 2
    assert captured.err.startswith("simlens: error: ")
    assert key_path in captured.err and "Traceback" not in captured.err
    assert len(captured.err.strip().splitlines()) == 1
    assert not out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.toml"]  # nothing else written


def test_missing_recipe_file(tmp_path, capsys):
    assert main(["check", str(tmp_path / "none.toml")]) == 2
    assert "file not found" in capsys.readouterr().err


def test_valid_recipe_builds_typed_settings(small_recipe):
    assert small_recipe.name == "small" and small_recipe.count == 6 and small_recipe.seed == 42
    assert small_recipe.survey.band_names == ("g", "r")
    assert small_recipe.survey.band("r").psf.profile == "kolmogorov"
    assert small_recipe.lens.mass.q == Uniform(0.6, 1.0)
    assert small_recipe.lens.velocity_dispersion == TruncatedNormal(250.0, 30.0, 180.0, 320.0)
    assert small_recipe.source.clumps.count == Choice((0, 2))
    assert small_recipe.lens.light.q == Fixed(0.8)
    assert small_recipe.survey.supersampling == 4
    # Defaults fill what the recipe leaves out.
    assert small_recipe.source.sersic_index == Fixed(1.0)
    assert small_recipe.footprint.radius == 1.0


def test_distribution_forms_parse():
    text = edit("q = { uniform = [0.6, 1.0] }", "q = { grid = [0.6, 0.8, 1.0] }")
    text = text.replace("half_light_radius = 0.25", "half_light_radius = { log_uniform = [0.1, 0.4] }")
    text = text.replace("count = { choice = [0, 2] }", "count = { choice = [0, 1, 3], weights = [1, 1, 2] }")
    recipe = parse_recipe(text)
    assert recipe.lens.mass.q == Grid((0.6, 0.8, 1.0))
    assert recipe.source.half_light_radius == LogUniform(0.1, 0.4)
    assert recipe.source.clumps.count == Choice((0, 1, 3), (1, 1, 2))
    assert recipe.grid_shape == (3,)


def test_log_normal_and_ellipticity_distributions_against_scipy():
    # Reference library: scipy.stats.lognorm (s = sigma_dex ln 10, scale = median) truncated to the
    # range gives the same quantiles; the axis ratio's ellipticity e = (1 - q) / (1 + q) follows
    # scipy.stats.rayleigh(scale = sigma) truncated at 0.8 (two Gaussian components of sigma each,
    # the intrinsic-shape model of weak-lensing forecasts; common practice), its per-component rms
    # 0.26 for sigma = 0.26 less the truncation's trim.
    import numpy as np
    from scipy import stats

    from simlens.recipe import AxisRatio, LogNormal

    text = edit("half_light_radius = 0.25", "half_light_radius = 0.25\nsersic_index = { log_normal = [1.0, 0.2], "
                "within = [0.5, 4.0] }\nq = { ellipticity_dispersion = 0.26 }")
    recipe = parse_recipe(text)
    assert recipe.source.sersic_index == LogNormal(1.0, 0.2, 0.5, 4.0)
    assert recipe.source.q == AxisRatio(0.26)
    u = np.linspace(0.001, 0.999, 999)
    reference = stats.lognorm(s=0.2 * np.log(10), scale=1.0)
    lo, hi = reference.cdf(0.5), reference.cdf(4.0)
    assert np.allclose(recipe.source.sersic_index.from_uniform(u), reference.ppf(lo + u * (hi - lo)), rtol=1e-9)
    q = recipe.source.q.from_uniform(u)
    rayleigh = stats.rayleigh(scale=0.26)
    assert np.allclose((1 - q) / (1 + q), rayleigh.ppf(u * rayleigh.cdf(0.8)), rtol=1e-9)
    e = (1 - q) / (1 + q)
    assert np.sqrt(np.mean(e**2) / 2) == pytest.approx(0.26, rel=0.03)  # the trim takes 2 %
    with pytest.raises(RecipeError, match="log_normal"):
        parse_recipe(edit("half_light_radius = 0.25", "half_light_radius = 0.25\nsersic_index = { log_normal = [1.0] }"))
    with pytest.raises(RecipeError, match="out of range"):  # unbounded above: sersic_index stops at 8
        parse_recipe(edit("half_light_radius = 0.25", "half_light_radius = 0.25\nsersic_index = { log_normal = [1.0, 0.2] }"))


def test_overrides_are_validated(small_recipe):
    assert small_recipe.with_overrides(count=3, seed=7).count == 3
    with pytest.raises(RecipeError, match="count"):
        small_recipe.with_overrides(count=0)


def test_demo_recipe_is_valid():
    from pathlib import Path

    from simlens.recipe import load_recipe

    recipe = load_recipe(Path(__file__).parents[1] / "recipes" / "demo.toml")
    assert recipe.count == 100 and recipe.survey.cutout_size == 64 and len(recipe.survey.bands) == 3
    assert recipe.survey.pixel_scale == 0.2


def test_mass_model_keys_must_match_the_model():
    text = edit("[lens.mass]\n", "[lens.mass]\nslope = 2.2\n")
    with pytest.raises(RecipeError, match=r"lens.mass.slope.*power_law"):
        parse_recipe(text, origin="bad.toml")
    recipe = parse_recipe(edit("[lens.mass]\n", "[lens.mass]\nmodel = \"power_law\"\nslope = { uniform = [1.8, 2.3] }\n"))
    assert recipe.lens.mass.model == "power_law"
    with pytest.raises(RecipeError, match="'power_law'"):
        parse_recipe(edit("[lens.mass]\n", "[lens.mass]\nmodel = \"powerlaw\"\n"))


def test_choice_lists_come_from_their_registries():
    # the recipe's choices are the registries' names, and the negative-class weights of the
    # schema are exactly the classes simlens.populations.negatives knows
    import dataclasses as dc

    from simlens.lensing.lens_models import LENS_MODELS
    from simlens.populations.negatives import NEGATIVE_CLASSES
    from simlens.populations.photometry import TEMPLATES
    from simlens.populations.velocity_function import VELOCITY_FUNCTIONS
    from simlens.recipe import schema

    assert schema.MASS_MODELS == tuple(LENS_MODELS)
    assert schema.TEMPLATE_NAMES == tuple(TEMPLATES)
    assert schema.VELOCITY_FUNCTION_NAMES == tuple(VELOCITY_FUNCTIONS)
    assert {f.name for f in dc.fields(schema.NegativeSettings)} - {"fraction"} == set(NEGATIVE_CLASSES)
    for model in LENS_MODELS.values():  # every model-specific key exists in [lens.mass]
        assert set(model.recipe_keys.values()) <= {f.name for f in dc.fields(schema.MassSettings)}

"""Whole runs: determinism, re-rendering one system, the run folder's safety, the CLI."""

from __future__ import annotations

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table

import simlens
from simlens.imaging.scene import build_scene
from simlens.cli import main
from simlens.errors import SimlensError


def image_data(folder):
    out = {}
    for path in sorted((folder / "cutouts").glob("*.fits")):
        with fits.open(path) as hdul:
            out[path.name] = [np.array(h.data) for h in hdul[1:]]
    return out


def same_column(a, b) -> bool:
    """Equal values, NaN equal to NaN (columns of quantities a recipe does not model are NaN)."""
    a, b = np.asarray(a), np.asarray(b)
    if a.dtype.kind == "f":
        return np.array_equal(a, b, equal_nan=True)
    return np.array_equal(a, b)


def test_same_recipe_and_seed_give_identical_image_data(small_recipe, tmp_path):
    simlens.run(small_recipe, tmp_path / "a")
    simlens.run(small_recipe, tmp_path / "b")
    a, b = image_data(tmp_path / "a"), image_data(tmp_path / "b")
    assert a.keys() == b.keys() and len(a) == 6
    for name in a:
        for x, y in zip(a[name], b[name]):
            np.testing.assert_array_equal(x, y)
    ta, tb = Table.read(tmp_path / "a" / "truth.fits"), Table.read(tmp_path / "b" / "truth.fits")
    for col in ta.colnames:
        assert same_column(ta[col], tb[col]), col
    # A different seed changes the data.
    simlens.run(small_recipe.with_overrides(seed=43), tmp_path / "c")
    c = image_data(tmp_path / "c")
    assert not np.array_equal(a["system_000000.fits"][0], c["system_000000.fits"][0])


def test_one_system_re_rendered_alone_is_identical(small_recipe, tmp_path):
    simlens.run(small_recipe, tmp_path / "run")
    system = simlens.PopulationSampler(small_recipe).draw(3)
    rendered = simlens.render_system(system, small_recipe.survey, small_recipe.reference_band)
    with fits.open(tmp_path / "run" / "cutouts" / "system_000003.fits") as hdul:
        np.testing.assert_array_equal(hdul["r"].data, rendered.band("r").image.astype(np.float32))
        np.testing.assert_array_equal(hdul["g_SOURCE"].data, rendered.band("g").lensed_source.astype(np.float32))


def test_bands_rendered_in_any_order_give_the_same_images(small_recipe):
    # Image cuts render their band first (simlens.runs.rendering); the other bands, rendered
    # afterwards from the same rays and shapes, must equal those of one render_system call
    from simlens.imaging.render import SystemRendering

    system = simlens.PopulationSampler(small_recipe).draw(2)
    whole = simlens.render_system(system, small_recipe.survey, small_recipe.reference_band)
    rendering = SystemRendering(system, small_recipe.survey, small_recipe.reference_band)
    first = rendering.render([small_recipe.survey.band_names[-1]], images=False)
    assert len(first.bands) == 1 and first.images is None
    later = rendering.render()
    assert [b.band.name for b in later.bands] == list(small_recipe.survey.band_names)
    for a, b in zip(whole.bands, later.bands):
        np.testing.assert_array_equal(a.image, b.image)
        np.testing.assert_array_equal(a.lensed_source, b.lensed_source)
    assert later.magnification == whole.magnification
    np.testing.assert_array_equal(later.images.x, whole.images.x)


def test_existing_run_is_not_overwritten_without_permission(small_recipe, tmp_path):
    small = small_recipe.with_overrides(count=1)
    simlens.run(small, tmp_path / "run")
    with pytest.raises(SimlensError, match="--overwrite"):
        simlens.run(small, tmp_path / "run")
    simlens.run(small.with_overrides(count=2), tmp_path / "run", overwrite=True)
    assert len(list((tmp_path / "run" / "cutouts").iterdir())) == 2
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run"]  # no partial or old folders left


def test_unwritable_output_folder_is_a_clear_error(small_recipe, tmp_path, capsys):
    blocker = tmp_path / "file"
    blocker.write_text("not a folder")
    with pytest.raises(SimlensError, match="cannot create"):
        simlens.run(small_recipe.with_overrides(count=1), blocker / "run")


def test_cli_make_and_check(tmp_path, capsys, small_recipe_text):
    recipe = tmp_path / "small.toml"
    recipe.write_text(small_recipe_text)
    assert main(["check", str(recipe)]) == 0
    out = capsys.readouterr().out
    assert "valid recipe 'small'" in out and "lens.mass.q" in out and "Einstein radius" in out
    assert not (tmp_path / "outputs").exists()
    assert main(["make", str(recipe), "--out", str(tmp_path / "run"), "--n", "2", "--seed", "9", "--quiet"]) == 0
    out = capsys.readouterr().out
    assert "wrote 2 systems" in out
    assert len(Table.read(tmp_path / "run" / "truth.ecsv")) == 2
    assert main(["make", str(recipe), "--out", str(tmp_path / "run"), "--quiet"]) == 2
    assert "--overwrite" in capsys.readouterr().err


def test_python_dash_m_entry_point(tmp_path, small_recipe_text):
    import subprocess
    import sys

    recipe = tmp_path / "small.toml"
    recipe.write_text(small_recipe_text.replace('q = { uniform = [0.6, 1.0] }', 'q = 1.5'))
    result = subprocess.run([sys.executable, "-m", "simlens", "check", str(recipe)], capture_output=True, text=True)
    assert result.returncode == 2
    assert "lens.mass.q" in result.stderr and "Traceback" not in result.stderr


@pytest.mark.parametrize("mass_table", [
    'model = "power_law"\nslope = { uniform = [1.7, 2.4] }',
    'model = "cored_isothermal"\ncore_radius = 0.1',
])
def test_recipes_choose_the_mass_model(small_recipe_text, tmp_path, mass_table):
    text = small_recipe_text.replace("[lens.mass]\n", f"[lens.mass]\n{mass_table}\n")
    text += "\n[lens.multipoles]\nm4_strength = 0.03\nm4_angle = 45.0\n"
    recipe = simlens.parse_recipe(text).with_overrides(count=2)
    simlens.run(recipe, tmp_path / "run")
    truth = Table.read(tmp_path / "run" / "truth.ecsv")
    model = mass_table.split('"')[1]
    assert list(truth["mass_model"]) == [model, model]
    assert np.all(truth["multipole_m4_strength"] == 0.03) and np.all(truth["multipole_m4_angle"] == 45.0)
    system = simlens.PopulationSampler(recipe).draw(0)
    names = [type(c).__name__ for c in build_scene(system).deflector.components]
    assert names[0] == {"power_law": "PowerLaw", "cored_isothermal": "CoredIsothermal"}[model]
    assert "Multipole" in names
    if model == "power_law":
        assert 1.7 <= truth["mass_slope"][0] <= 2.4


def test_subhalos_are_recorded_in_the_truth(small_recipe_text, tmp_path):
    text = small_recipe_text + "\n[lens.subhalos]\ncount = { choice = [0, 3] }\nmass_min = 1e8\nmass_max = 1e9\n"
    recipe = simlens.parse_recipe(text).with_overrides(count=4)
    simlens.run(recipe, tmp_path / "run")
    truth = Table.read(tmp_path / "run" / "truth.fits")
    subhalos = Table.read(tmp_path / "run" / "subhalos.ecsv")
    assert len(subhalos) == int(truth["n_subhalos"].sum()) > 0
    for row in truth:
        mine = subhalos[subhalos["system_id"] == row["system_id"]]
        assert len(mine) == row["n_subhalos"]
        assert np.sum(mine["mass"]) == pytest.approx(row["subhalo_mass_total"])
    assert subhalos["mass"].unit == "solMass"


def test_import_and_help_load_no_heavy_library():
    # `import simlens` and `simlens --help` must not load numpy, scipy, astropy or GalSim (about a
    # second together); the public names load their stage on first use.  Checked in a fresh
    # interpreter, by the modules it holds (no timing: the machine is noisy).
    import subprocess
    import sys

    heavy = ("numpy", "scipy", "astropy", "galsim")
    code = ("import sys, contextlib, io, simlens\n"
            "from simlens.cli import main\n"
            "with contextlib.redirect_stdout(io.StringIO()):\n"
            "    try:\n        main(['--help'])\n    except SystemExit:\n        pass\n"
            f"print(','.join(m for m in {heavy!r} if m in sys.modules))\n"
            "simlens.load_recipe, simlens.mass.SIE\n"
            f"print(','.join(m for m in {heavy!r} if m in sys.modules))\n")
    before, after = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                                   check=True).stdout.splitlines()
    assert before == ""
    assert "numpy" in after.split(",")  # the stage loaded on use

"""simlens never deletes, overwrites or reads a file it did not write (brief: "Never delete or
overwrite what simlens did not write"; common practice for tools that write into user folders)."""

from __future__ import annotations

import hashlib
import json

import pytest

import simlens
from simlens.cli import main
from simlens.errors import SimlensError
from simlens.injection import inject
from simlens.recipe import parse_recipe

from .conftest import SMALL_RECIPE
from .test_injection import synthetic_image


def _user_folder(path):
    (path / "thesis").mkdir(parents=True)
    (path / "thesis" / "chapter1.tex").write_text("\\chapter{Lenses}\n")
    (path / "notes.txt").write_text("do not lose me\n")
    return {p.relative_to(path): p.read_bytes() for p in path.rglob("*") if p.is_file()}


def _files(path):
    return {p.relative_to(path): p.read_bytes() for p in path.rglob("*") if p.is_file()}


def test_overwrite_refuses_a_folder_of_user_files(small_recipe, tmp_path, capsys, small_recipe_text):
    before = _user_folder(tmp_path / "mine")
    with pytest.raises(SimlensError, match="holds no simlens run") as caught:
        simlens.run(small_recipe.with_overrides(count=1), tmp_path / "mine", overwrite=True)
    assert "--overwrite" not in str(caught.value)  # no hint that would delete them
    recipe = tmp_path / "small.toml"
    recipe.write_text(small_recipe_text)
    assert main(["make", str(recipe), "--out", str(tmp_path / "mine"), "--n", "1", "--overwrite", "--quiet"]) == 2
    assert "holds no simlens run" in capsys.readouterr().err
    assert _files(tmp_path / "mine") == before


def test_overwrite_replaces_only_the_runs_own_files(small_recipe, tmp_path):
    run = tmp_path / "run"
    simlens.run(small_recipe.with_overrides(count=2), run)
    (run / "scores").mkdir()
    (run / "scores" / "mine.csv").write_text("system_id,score\n0,1\n")
    (run / "shards" / "my_notes.txt").write_text("kept\n")
    (run / "README").write_text("kept too\n")
    simlens.run(small_recipe.with_overrides(count=1, seed=5), run, overwrite=True)
    assert (run / "scores" / "mine.csv").read_text() == "system_id,score\n0,1\n"
    assert (run / "shards" / "my_notes.txt").read_text() == "kept\n"
    assert (run / "README").read_text() == "kept too\n"
    assert sorted(p.name for p in (run / "cutouts").iterdir()) == ["system_000000.fits"]  # the old system 1 went
    assert simlens.verify_run(run).ok


def test_a_manifest_pointing_outside_the_run_is_refused(small_recipe, tmp_path):
    run = tmp_path / "run"
    simlens.run(small_recipe.with_overrides(count=1), run)
    secret = tmp_path / "secret.txt"
    secret.write_text("private\n")
    digest = hashlib.sha256(secret.read_bytes()).hexdigest()
    manifest = json.loads((run / "manifest.json").read_text())
    for entry in ("../secret.txt", str(secret)):
        edited = dict(manifest, shards={"0": dict(manifest["shards"]["0"], files={entry: digest})})
        (run / "manifest.json").write_text(json.dumps(edited))
        with pytest.raises(SimlensError, match="not a file inside"):
            simlens.verify_run(run)
        with pytest.raises(SimlensError, match="not a file inside"):
            simlens.run(small_recipe.with_overrides(count=1), run, overwrite=True)
        edited["status"] = "running"
        (run / "manifest.json").write_text(json.dumps(edited))
        with pytest.raises(SimlensError, match="not a file inside"):  # a resume reads nothing outside either
            simlens.run(small_recipe.with_overrides(count=1), run)
    assert secret.read_text() == "private\n"


def test_a_manifest_entry_through_a_symbolic_link_is_refused(small_recipe, tmp_path):
    run = tmp_path / "run"
    simlens.run(small_recipe.with_overrides(count=1), run)
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    (outside / "x.fits").write_text("user data\n")
    (run / "linked").symlink_to(outside)
    manifest = json.loads((run / "manifest.json").read_text())
    manifest["shards"]["0"]["files"] = {"linked/x.fits": "0" * 64}
    (run / "manifest.json").write_text(json.dumps(manifest))
    with pytest.raises(SimlensError, match="not a file inside"):
        simlens.run(small_recipe.with_overrides(count=1), run, overwrite=True)
    assert (outside / "x.fits").read_text() == "user data\n"


def test_inject_overwrite_replaces_only_an_earlier_injection(tmp_path):
    image = synthetic_image(tmp_path)
    recipe = parse_recipe(SMALL_RECIPE)
    args = dict(psf=tmp_path / "psf.fits")
    before = _user_folder(tmp_path / "mine")
    with pytest.raises(SimlensError, match="holds no simlens injection"):
        inject(image, recipe, tmp_path / "lenses.csv", out=tmp_path / "mine", overwrite=True, **args)
    assert _files(tmp_path / "mine") == before
    out = tmp_path / "out"
    inject(image, recipe, tmp_path / "lenses.csv", out=out, **args)
    first = _files(out)
    inject(image, recipe, tmp_path / "lenses.csv", out=out, overwrite=True, **args)  # its own: replaced
    assert _files(out) == first
    (out / "cutouts" / "mine.txt").write_text("user\n")
    with pytest.raises(SimlensError, match="did not write"):
        inject(image, recipe, tmp_path / "lenses.csv", out=out, overwrite=True, **args)
    assert (out / "cutouts" / "mine.txt").read_text() == "user\n" and _files(out).keys() == first.keys() | {
        (out / "cutouts" / "mine.txt").relative_to(out)}

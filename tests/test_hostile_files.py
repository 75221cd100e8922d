"""Hostile input files and concurrent or interrupted runs: every bad file is one line and a
non-zero exit, the input files are never changed (their SHA-256 is compared), a run folder is
locked against a second ``make``, and a run killed at any moment resumes to the same files.
Common practice for command-line tools and for resumable batch jobs; the lock is POSIX flock(2)."""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table

import simlens
from simlens.cli import main
from simlens.errors import RunError
from simlens.recipe import parse_recipe
from simlens.runs.run_folder import RunFolder, verify_run

from .conftest import SMALL_RECIPE
from .test_injection import synthetic_image
from .test_scale import SHARDED, data_checksums, wait_for_a_finished_shard
from .test_scoring import fake_run


def sha256(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def one_line_error(capsys, args, status=2) -> str:
    capsys.readouterr()
    assert main(args) == status, capsys.readouterr().err
    err = capsys.readouterr().err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("simlens: error: ") and "Traceback" not in err, err
    return lines[0]


# -- inject -----------------------------------------------------------------------------------------
def _inject_args(tmp_path, image, lenses=None):
    recipe_path = tmp_path / "r.toml"
    recipe_path.write_text(SMALL_RECIPE)
    return ["inject", str(image), "--recipe", str(recipe_path), "--lenses", str(lenses or tmp_path / "lenses.csv"),
            "--out", str(tmp_path / "out"), "--psf", str(tmp_path / "psf.fits")]


def _hostile_images(tmp_path):
    good = synthetic_image(tmp_path)
    with fits.open(good) as hdul:
        data, header = hdul[0].data.astype(np.float64), hdul[0].header.copy()
    no_wcs = fits.Header({"GAIN": 4.0, "MAGZERO": 30.0})
    cases = {}
    cases["no WCS"] = fits.PrimaryHDU(data=data.astype(np.float32), header=no_wcs)
    cases["a cube"] = fits.PrimaryHDU(data=np.stack([data] * 3).astype(np.float32), header=header)
    cases["all NaN"] = fits.PrimaryHDU(data=np.full_like(data, np.nan, dtype=np.float32), header=header)
    cases["no data"] = fits.PrimaryHDU(header=header)
    return good, cases


@pytest.mark.parametrize("case", ["no WCS", "a cube", "all NaN", "no data", "empty file", "truncated"])
def test_inject_refuses_a_hostile_image_in_one_line(case, tmp_path, capsys):
    good, cases = _hostile_images(tmp_path)
    path = tmp_path / "bad.fits"
    if case == "empty file":
        path.write_bytes(b"")
    elif case == "truncated":
        path.write_bytes(good.read_bytes()[:4000])
    else:
        cases[case].writeto(path)
    before = sha256(path), sha256(tmp_path / "lenses.csv")
    line = one_line_error(capsys, _inject_args(tmp_path, path))
    assert len(line) < 400
    assert (sha256(path), sha256(tmp_path / "lenses.csv")) == before


def test_inject_reads_scaled_integer_and_compressed_images(tmp_path, capsys):
    # FITS standard 4.0, sections 5.3 (BZERO/BSCALE) and 10 (tiled image compression).
    good = synthetic_image(tmp_path)
    with fits.open(good) as hdul:
        data, header = hdul[0].data.astype(np.float64), hdul[0].header.copy()
    scaled = fits.PrimaryHDU(data=data, header=header)
    scaled.scale("int16", bscale=0.01, bzero=0.0)
    scaled.writeto(tmp_path / "scaled.fits")
    fits.HDUList([fits.PrimaryHDU(), fits.CompImageHDU(data=data.astype(np.float32), header=header)]).writeto(
        tmp_path / "compressed.fits")
    for name in ("scaled.fits", "compressed.fits"):
        before = sha256(tmp_path / name)
        args = _inject_args(tmp_path, tmp_path / name)
        args[args.index("--out") + 1] = str(tmp_path / f"out_{name}")
        capsys.readouterr()
        assert main(args) == 0, capsys.readouterr().err
        assert sha256(tmp_path / name) == before
        truth = Table.read(tmp_path / f"out_{name}" / "truth.ecsv")
        assert len(truth) == 3


@pytest.mark.parametrize("case", ["lens off the image", "NaN row", "zero velocity dispersion", "no rows",
                                  "missing column"])
def test_inject_refuses_a_hostile_catalogue_in_one_line(case, tmp_path, capsys):
    image = synthetic_image(tmp_path)
    lenses = Table.read(tmp_path / "lenses.csv")
    if case == "lens off the image":
        lenses["ra"][1] += 1.0  # a degree away
    elif case == "NaN row":
        lenses["z_lens"][1] = np.nan
    elif case == "zero velocity dispersion":
        lenses["velocity_dispersion"][2] = 0.0
    elif case == "no rows":
        lenses = lenses[:0]
    else:
        del lenses["z_lens"]
    path = tmp_path / "hostile.csv"
    lenses.write(path, format="ascii.csv")
    before = sha256(path), sha256(image)
    line = one_line_error(capsys, _inject_args(tmp_path, image, path))
    assert len(line) < 400 and ("lens 1" in line or "lens 2" in line or case in ("no rows", "missing column")), line
    assert (sha256(path), sha256(image)) == before
    assert not (tmp_path / "out").exists()


# -- score ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("case, words", [
    ("NaN score", "non-finite"), ("duplicate id", "repeats"), ("unknown id", "not in the run"),
    ("empty file", "needs columns system_id and score"), ("header only", "no rows"), ("non-numeric id", "row 3"),
    ("fractional id", "whole numbers"), ("missing id", "no score for")])
def test_score_refuses_a_hostile_scores_file_in_one_line(case, words, tmp_path, capsys):
    folder, truth = fake_run(tmp_path, n=10)
    ids, scores = [str(i) for i in truth["system_id"]], ["0.5"] * 10
    if case == "NaN score":
        scores[4] = "nan"
    elif case == "duplicate id":
        ids[3] = ids[2]
    elif case == "unknown id":
        ids, scores = ids + ["99"], scores + ["0.5"]
    elif case == "non-numeric id":
        ids[2] = "abc"
    elif case == "fractional id":
        ids = [f"{i}.5" for i in range(10)]
    elif case == "missing id":
        ids, scores = ids[1:], scores[1:]
    path = tmp_path / "scores.csv"
    if case == "empty file":
        path.write_text("")
    elif case == "header only":
        path.write_text("system_id,score\n")
    else:
        path.write_text("system_id,score\n" + "".join(f"{i},{s}\n" for i, s in zip(ids, scores)))
    before = sha256(path)
    line = one_line_error(capsys, ["score", str(folder), str(path), "--threshold", "0.5", "--no-plots"])
    assert words in line, line
    assert sha256(path) == before


# -- one make at a time -----------------------------------------------------------------------------
def test_a_second_make_refuses_while_the_first_holds_the_lock(tmp_path):
    recipe_file = tmp_path / "sharded.toml"
    recipe_file.write_text(SHARDED)
    out = tmp_path / "run"
    command = [sys.executable, "-m", "simlens", "make", str(recipe_file), "--out", str(out), "--quiet"]
    first = RunFolder.open(out, parse_recipe(SHARDED, origin=str(recipe_file)))  # holds the lock, as make does
    second = subprocess.run(command, capture_output=True, text=True)
    assert second.returncode == 2 and "another simlens make is writing" in second.stderr, second.stderr
    assert len(second.stderr.strip().splitlines()) == 1
    first.release()
    finished = subprocess.run(command, capture_output=True, text=True)
    assert finished.returncode == 0, finished.stderr
    assert verify_run(out).ok


def test_two_makes_at_once_one_refuses_and_the_other_finishes(tmp_path):
    recipe_file = tmp_path / "sharded.toml"
    recipe_file.write_text(SHARDED.replace("count = 8", "count = 16"))
    out = tmp_path / "run"
    command = [sys.executable, "-m", "simlens", "make", str(recipe_file), "--out", str(out), "--quiet"]
    first = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    wait_for_a_finished_shard(out)
    second = subprocess.run(command, capture_output=True, text=True)
    _, first_err = first.communicate(timeout=300)
    assert first.returncode == 0, first_err
    if second.returncode == 0:
        pytest.skip("the first run finished before the second started")
    assert second.returncode == 2 and "another simlens make is writing" in second.stderr
    assert verify_run(out).ok


# -- killed at any moment ---------------------------------------------------------------------------
def _interrupt_and_resume(trial: int, reference: dict, tmp_path: Path) -> None:
    rng = np.random.default_rng(1000 + trial)
    recipe_file = tmp_path / "sharded.toml"
    recipe_file.write_text(SHARDED)
    out = tmp_path / f"run{trial}"
    command = [sys.executable, "-m", "simlens", "make", str(recipe_file), "--out", str(out), "--quiet"]
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.time() + 60
    while not (out / "manifest.json").exists() and time.time() < deadline and process.poll() is None:
        time.sleep(0.01)
    time.sleep(float(rng.uniform(0.0, 2.5)))  # anywhere from the first shard to the catalogues
    process.send_signal(signal.SIGKILL if trial % 2 == 0 else signal.SIGINT)
    process.wait()
    finished = subprocess.run(command, capture_output=True, text=True)
    if finished.returncode != 0:
        assert "a finished run already exists" in finished.stderr, finished.stderr  # it had finished
    assert data_checksums(out) == reference
    assert json.loads((out / "manifest.json").read_text())["status"] == "complete"
    assert not list(out.rglob(".*.tmp-*"))


@pytest.fixture(scope="module")
def reference_checksums(tmp_path_factory):
    out = tmp_path_factory.mktemp("reference") / "run"
    simlens.run(parse_recipe(SHARDED, origin="sharded.toml"), out)
    return data_checksums(out)


@pytest.mark.parametrize("trial", range(4))
def test_killed_at_a_random_moment_resumes_to_the_same_files(trial, reference_checksums, tmp_path):
    _interrupt_and_resume(trial, reference_checksums, tmp_path)


@pytest.mark.slow
@pytest.mark.parametrize("trial", range(4, 40))
def test_killed_at_a_random_moment_many_trials(trial, reference_checksums, tmp_path):
    _interrupt_and_resume(trial, reference_checksums, tmp_path)


def test_a_failed_run_is_marked_failed_and_resumes(tmp_path, monkeypatch):
    from simlens.runs import shards as shard_module

    recipe = parse_recipe(SHARDED, origin="sharded.toml")
    real = shard_module._render_shard

    def breaks_on_shard_two(recipe_, folder, spec):
        if spec.index == 2:
            raise ZeroDivisionError("an unexpected bug")
        return real(recipe_, folder, spec)

    monkeypatch.setattr(shard_module, "_render_shard", breaks_on_shard_two)
    with pytest.raises(RunError, match=r"shard 2 \(systems 4-5\): ZeroDivisionError"):
        simlens.run(recipe, tmp_path / "run")
    manifest = json.loads((tmp_path / "run" / "manifest.json").read_text())
    assert manifest["status"] == "failed" and "ZeroDivisionError" in manifest["failure"]
    monkeypatch.setattr(shard_module, "_render_shard", real)
    simlens.run(recipe, tmp_path / "run")
    assert verify_run(tmp_path / "run").ok


def test_an_unexpected_error_is_one_line_and_debug_shows_the_traceback(tmp_path, capsys, monkeypatch):
    from simlens.runs import shards as shard_module

    def broken(*args):
        raise KeyError("deliberately broken")

    monkeypatch.setattr(shard_module, "_render_shard", broken)
    recipe_file = tmp_path / "sharded.toml"
    recipe_file.write_text(SHARDED)
    args = ["make", str(recipe_file), "--out", str(tmp_path / "run"), "--quiet"]
    line = one_line_error(capsys, args, status=1)
    assert "shard 0" in line and "--debug" in line
    capsys.readouterr()
    assert main(["--debug"] + args) == 1
    assert "Traceback" in capsys.readouterr().err


def test_make_refuses_a_run_larger_than_the_free_memory_before_writing(tmp_path, capsys, monkeypatch):
    from simlens.runs import resources

    monkeypatch.setattr(resources, "available_memory", lambda: 200 * 2**20)
    recipe_file = tmp_path / "sharded.toml"
    recipe_file.write_text(SHARDED)
    line = one_line_error(capsys, ["make", str(recipe_file), "--out", str(tmp_path / "run"), "--quiet"])
    assert "memory per worker" in line and "survey.supersampling" in line
    assert not (tmp_path / "run").exists()
    monkeypatch.setattr(resources, "free_disk", lambda path: 1000)
    monkeypatch.setattr(resources, "available_memory", lambda: None)
    line = one_line_error(capsys, ["make", str(recipe_file), "--out", str(tmp_path / "run"), "--quiet"])
    assert "the disk there has" in line
    assert not (tmp_path / "run").exists()
    capsys.readouterr()
    assert main(["make", str(recipe_file), "--out", str(tmp_path / "run"), "--quiet", "--no-resource-check"]) == 0


def test_check_prints_the_estimate(tmp_path, capsys):
    recipe_file = tmp_path / "sharded.toml"
    recipe_file.write_text(SHARDED)
    assert main(["check", str(recipe_file), "--sample", "3"]) == 0
    assert "of memory per worker" in capsys.readouterr().out


def test_the_manifest_lock_writes_nothing_into_the_folder(tmp_path):
    # the lock is on the folder itself: a refused make must not leave a lock file behind
    out = tmp_path / "run"
    folder = RunFolder.open(out, parse_recipe(SHARDED, origin="sharded.toml"))
    try:
        assert sorted(p.name for p in out.iterdir()) == ["cutouts", "manifest.json", "shards"]
    finally:
        folder.release()
    assert os.path.isdir(out)


@pytest.mark.parametrize("damage", ["count is text", "shards is a list", "not JSON", "a JSON list"])
def test_verify_and_make_refuse_a_damaged_manifest_in_one_line(damage, tmp_path, capsys):
    recipe_file = tmp_path / "sharded.toml"
    recipe_file.write_text(SHARDED)
    out = tmp_path / "run"
    assert main(["make", str(recipe_file), "--out", str(out), "--quiet"]) == 0
    manifest_path = out / "manifest.json"
    manifest = json.loads(manifest_path.read_text())
    if damage == "count is text":
        manifest["count"] = "eight"
    elif damage == "shards is a list":
        manifest["shards"] = ["../../etc/passwd"]
    manifest_path.write_text({"not JSON": "{ nope", "a JSON list": "[1, 2]"}.get(damage, json.dumps(manifest)))
    before = sha256(manifest_path)
    one_line_error(capsys, ["verify", str(out)])
    one_line_error(capsys, ["make", str(recipe_file), "--out", str(out), "--quiet", "--overwrite"])
    assert sha256(manifest_path) == before

"""Runs at scale: shards, engines, byte-identical outputs, resuming after a crash, verify, loader."""

from __future__ import annotations

import errno
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
from simlens.errors import RecipeError, SimlensError
from simlens.runs.loader import iter_batches, load_run
from simlens.output.checksums import sha256_of
from simlens.recipe import parse_recipe

from .conftest import SMALL_RECIPE

SHARDED = SMALL_RECIPE.replace("count = 6", "count = 8").replace("shard_size = 4", "shard_size = 2")


def data_checksums(folder: Path) -> dict:
    """SHA-256 of every data file of a run (the manifest holds timings, so it is left out)."""
    return {str(p.relative_to(folder)): sha256_of(p) for p in sorted(folder.rglob("*.fits")) + [folder / "truth.ecsv"]}


def wait_for_a_finished_shard(out: Path, timeout: float = 120.0) -> None:
    """Poll the manifest of a run in progress until it records at least one shard."""
    deadline = time.time() + timeout
    while time.time() < deadline:
        try:
            if json.loads((out / "manifest.json").read_text())["shards"]:
                return
        except (OSError, ValueError, KeyError):
            pass
        time.sleep(0.02)


@pytest.fixture(scope="module")
def reference_run(tmp_path_factory):
    recipe = parse_recipe(SHARDED, origin="sharded.toml")
    out = tmp_path_factory.mktemp("reference") / "run"
    simlens.run(recipe, out)
    return recipe, out, data_checksums(out)


def test_shards_hold_cubes_masks_and_truth(reference_run):
    recipe, out, _ = reference_run
    shards = sorted((out / "shards").glob("*.fits"))
    assert [p.name for p in shards] == [f"shard_0000{i}.fits" for i in range(4)]
    with fits.open(shards[1]) as hdul:
        assert [h.name for h in hdul] == ["PRIMARY", "IMAGES", "SOURCE", "LENS", "VARIANCE", "MASK", "PSF", "TRUTH", "SUBHALOS", "IMAGE_TRUTH", "LINE_OF_SIGHT"]
        assert hdul["IMAGES"].data.shape == (2, 2, 32, 32) and hdul["PSF"].data.shape == (2, 2, 25, 25)
        assert hdul[0].header["FIRSTID"] == 2 and hdul[0].header["BANDS"] == "g,r"
        truth = Table.read(hdul["TRUTH"])
        assert list(truth["system_id"]) == [2, 3]
        # The cube equals the per-system file of the same system.
        with fits.open(out / truth["file"][1]) as single:
            np.testing.assert_array_equal(hdul["IMAGES"].data[1, 1], single["r"].data)
            np.testing.assert_array_equal(hdul["SOURCE"].data[1, 0], single["g_SOURCE"].data)
        # Mask definition: noiseless source above MASKTHR x the pixel's noise sigma.
        k, b = 0, 1
        source, lens = hdul["SOURCE"].data[k, b].astype(float), hdul["LENS"].data[k, b].astype(float)
        gain, read_noise = recipe.survey.band("r").gain.value, recipe.survey.band("r").read_noise.value
        sky = truth["sky_level_r"][k]
        sigma = np.sqrt(((sky + source + lens) * gain + read_noise**2) / gain**2)
        expected = source > hdul[0].header["MASKTHR"] * sigma
        assert np.mean(hdul["MASK"].data[k, b].astype(bool) == expected) > 0.995  # float32 rounding at the edge
        assert hdul["MASK"].data.any()


def test_per_system_files_are_optional(tmp_path):
    recipe = parse_recipe(SHARDED.replace("per_system_files = true", "per_system_files = false"))
    simlens.run(recipe, tmp_path / "run")
    assert not (tmp_path / "run" / "cutouts").exists()
    truth = Table.read(tmp_path / "run" / "truth.fits")
    assert len(truth) == 8 and list(truth["file"]) == list(truth["shard"])
    assert set(truth["shard"]) == {f"shards/shard_0000{i}.fits" for i in range(4)}


@pytest.mark.parametrize("engine, workers", [("processes", 2), ("dask", 2)])
def test_outputs_are_identical_whatever_the_engine(reference_run, tmp_path, engine, workers):
    pytest.importorskip("distributed") if engine == "dask" else None
    recipe, _, reference = reference_run
    simlens.run(recipe, tmp_path / "run", engine=engine, workers=workers)
    assert data_checksums(tmp_path / "run") == reference


def test_full_disk_keeps_finished_shards_and_resume_finishes_identically(reference_run, tmp_path, monkeypatch):
    recipe, _, reference = reference_run
    import simlens.runs.shards as shard_module

    real = shard_module.write_shard
    calls = {"n": 0}

    def fills_up(path, *args, **kwargs):
        calls["n"] += 1
        if calls["n"] == 3:
            raise OSError(errno.ENOSPC, "No space left on device", str(path))
        return real(path, *args, **kwargs)

    monkeypatch.setattr(shard_module, "write_shard", fills_up)
    with pytest.raises(SimlensError, match="No space left on device.*finished shards are kept"):
        simlens.run(recipe, tmp_path / "run")
    manifest = json.loads((tmp_path / "run" / "manifest.json").read_text())
    assert manifest["status"] == "failed" and "No space" in manifest["failure"] and sorted(manifest["shards"]) == ["0", "1"]
    report = simlens.verify_run(tmp_path / "run")
    assert not report.ok and report.missing == (2, 3) and not report.damaged
    monkeypatch.setattr(shard_module, "write_shard", real)
    summary = simlens.run(recipe, tmp_path / "run")
    assert summary.rendered_now == 4
    assert data_checksums(tmp_path / "run") == reference
    assert simlens.verify_run(tmp_path / "run").ok


def test_verify_finds_damage_and_resume_repairs_it(reference_run, tmp_path):
    recipe, _, reference = reference_run
    out = tmp_path / "run"
    simlens.run(recipe, out)
    victim = out / "shards" / "shard_00002.fits"
    data = bytearray(victim.read_bytes())
    data[-100] ^= 0xFF
    victim.write_bytes(bytes(data))
    report = simlens.verify_run(out)
    assert not report.ok and (2, "shards/shard_00002.fits") in report.damaged
    # A finished run is not re-run without --overwrite; an unfinished one with damage is repaired.
    manifest = json.loads((out / "manifest.json").read_text())
    manifest["status"] = "running"
    (out / "manifest.json").write_text(json.dumps(manifest))
    assert simlens.run(recipe, out).rendered_now == 2
    assert data_checksums(out) == reference


def test_resume_refuses_another_recipe(reference_run, tmp_path):
    recipe, _, _ = reference_run
    out = tmp_path / "run"
    simlens.run(recipe.with_overrides(count=3), out)
    manifest = json.loads((out / "manifest.json").read_text())
    manifest["status"] = "running"
    (out / "manifest.json").write_text(json.dumps(manifest))
    with pytest.raises(SimlensError, match="another recipe"):
        simlens.run(recipe, out)


def test_sigkill_then_same_command_gives_the_uninterrupted_result(reference_run, tmp_path):
    recipe, _, reference = reference_run
    recipe_file = tmp_path / "sharded.toml"
    recipe_file.write_text(SHARDED)
    out = tmp_path / "run"
    command = [sys.executable, "-m", "simlens", "make", str(recipe_file), "--out", str(out), "--quiet"]
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    wait_for_a_finished_shard(out)
    os.kill(process.pid, signal.SIGKILL)
    process.wait()
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["status"] == "running"
    assert 1 <= len(manifest["shards"]) < 4
    finished = subprocess.run(command, capture_output=True, text=True)
    assert finished.returncode == 0, finished.stderr
    assert "resumed" in finished.stdout
    assert data_checksums(out) == reference
    assert not list(out.rglob(".*.tmp-*"))


def test_ctrl_c_stops_cleanly_and_the_same_command_finishes(reference_run, tmp_path):
    recipe, _, reference = reference_run
    recipe_file = tmp_path / "sharded.toml"
    recipe_file.write_text(SHARDED)
    out = tmp_path / "run"
    command = [sys.executable, "-m", "simlens", "make", str(recipe_file), "--out", str(out), "--quiet"]
    process = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    wait_for_a_finished_shard(out)
    process.send_signal(signal.SIGINT)
    _, err = process.communicate(timeout=60)
    if process.returncode == 0:
        pytest.skip("the run finished before the interrupt arrived")
    assert process.returncode == 130
    assert "run the same command again to finish" in err and "Traceback" not in err
    assert not list(out.rglob(".*.tmp-*"))
    assert subprocess.run(command, capture_output=True).returncode == 0
    assert data_checksums(out) == reference


def test_scheduler_address_submits_to_a_running_cluster(reference_run, tmp_path):
    distributed = pytest.importorskip("distributed")
    recipe, _, reference = reference_run
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False, dashboard_address=":0") as cluster:
        simlens.run(recipe, tmp_path / "run", scheduler=cluster.scheduler_address)
    assert data_checksums(tmp_path / "run") == reference
    with pytest.raises(SimlensError, match="needs the dask engine"):
        simlens.run(recipe, tmp_path / "other", engine="processes", scheduler="tcp://127.0.0.1:1")


def test_verify_command(reference_run, capsys):
    from simlens.cli import main

    _, out, _ = reference_run
    assert main(["verify", str(out)]) == 0
    assert "all files match the manifest" in capsys.readouterr().out


def test_loader_yields_batches_in_system_order(reference_run):
    _, out, _ = reference_run
    batches = list(iter_batches(out, batch_size=3))
    assert [len(t) for _, t in batches] == [3, 3, 2]
    assert all(images.shape[1:] == (2, 32, 32) and images.dtype == np.float32 for images, _ in batches)
    ids = np.concatenate([t["system_id"] for _, t in batches])
    assert list(ids) == list(range(8))
    images, truth = load_run(out)
    with fits.open(out / truth["file"][5]) as single:
        np.testing.assert_array_equal(images[5, 0], single["g"].data)
    masks, _ = load_run(out, plane="mask")
    assert masks.dtype == np.uint8
    shuffled = np.concatenate([t["system_id"] for _, t in iter_batches(out, batch_size=3, shuffle=True, seed=1)])
    assert sorted(shuffled) == list(range(8)) and list(shuffled) != list(range(8))


def test_recipe_name_cannot_escape_the_output_folder():
    for bad in ("../elsewhere", "/tmp/x", ".hidden", "a/b"):
        with pytest.raises(RecipeError, match="cannot name a run folder"):
            parse_recipe(SMALL_RECIPE.replace('name = "small"', f'name = "{bad}"'))

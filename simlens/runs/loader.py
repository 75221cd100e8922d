"""Reading a run for training: batches of (images, truth) from the shard files.

>>> from simlens.loader import iter_batches
>>> for images, truth in iter_batches("outputs/demo", batch_size=32):
...     # images: float32 array (batch, bands, ny, nx); truth: astropy Table of the same systems
...     pass

Shards are read with FITS memory mapping, one at a time, so memory stays at about one shard whatever
the size of the run.  ``plane`` picks IMAGES (observed), SOURCE, LENS, VARIANCE, MASK or PSF; in a
run with epochs ([survey.cadence]) also EPOCH_IMAGES and EPOCH_POINTS, batches of time series
``(batch, epochs, ny, nx)`` whose epochs :func:`run_epochs` lists, and REFERENCE.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Iterator

import numpy as np
from astropy.table import Table, vstack

from ..errors import SimlensError
from ..output.shard_fits import PLANES, read_shard

__all__ = ["shard_files", "iter_batches", "load_run", "run_epochs"]


def shard_files(run_folder: str | Path) -> list[Path]:
    """The shard files of a finished run, in system order (from its manifest)."""
    run_folder = Path(run_folder)
    try:
        manifest = json.loads((run_folder / "manifest.json").read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise SimlensError(f"{run_folder}: cannot read its manifest.json ({exc})") from None
    if manifest.get("status") != "complete":
        raise SimlensError(f"{run_folder}: the run is unfinished; run the same `simlens make` command to finish it")
    if manifest.get("kind") == "fields":
        raise SimlensError(f"{run_folder}: a field run: its images are whole fields (fields/field_*.fits, one "
                           f"HDU per band, truth in truth.ecsv and field_objects.ecsv), not cutout shards; "
                           f"read them with astropy.io.fits")
    shards = manifest["shards"]
    return [run_folder / next(iter(shards[k]["files"])) for k in sorted(shards, key=int)]


def iter_batches(run_folder: str | Path, batch_size: int = 64, plane: str = "IMAGES",
                 shuffle: bool = False, seed: int = 0) -> Iterator[tuple[np.ndarray, Table]]:
    """Yield ``(array, truth)`` batches over all systems of a run.

    ``shuffle`` permutes the order of shards and of systems within each shard (a cheap, memory-bounded
    shuffle, reproducible from ``seed``)."""
    plane = plane.upper()
    if plane not in PLANES:
        raise SimlensError(f"unknown plane {plane!r}; choose one of {', '.join(PLANES)}")
    if batch_size < 1:
        raise SimlensError(f"batch_size must be at least 1, got {batch_size}")
    rng = np.random.default_rng(seed)
    files = shard_files(run_folder)
    if shuffle:
        files = [files[i] for i in rng.permutation(len(files))]
    pending_arrays, pending_truth, pending = [], [], 0
    for path in files:
        arrays, truth = read_shard(path, planes=(plane,))
        data = arrays[plane]
        order = rng.permutation(len(truth)) if shuffle else np.arange(len(truth))
        data, truth = data[order], truth[order]
        start = 0
        while start < len(truth):
            take = min(batch_size - pending, len(truth) - start)
            pending_arrays.append(data[start:start + take])
            pending_truth.append(truth[start:start + take])
            pending += take
            start += take
            if pending == batch_size:
                yield np.concatenate(pending_arrays), vstack(pending_truth, metadata_conflicts="silent")
                pending_arrays, pending_truth, pending = [], [], 0
    if pending:
        yield np.concatenate(pending_arrays), vstack(pending_truth, metadata_conflicts="silent")


def load_run(run_folder: str | Path, plane: str = "IMAGES") -> tuple[np.ndarray, Table]:
    """All systems of a (small) run at once."""
    batches = list(iter_batches(run_folder, batch_size=1 << 30, plane=plane))
    return batches[0] if batches else (np.empty(0), Table())


def run_epochs(run_folder: str | Path) -> Table:
    """The epochs of a run with ``[survey.cadence]`` (time, band, seeing, sky, zero point, depth),
    in the order of the epoch axis of EPOCH_IMAGES."""
    run_folder = Path(run_folder)
    path = run_folder / "epochs.ecsv"
    if not path.is_file():
        raise SimlensError(f"{run_folder}: no epochs.ecsv; runs have epochs when their recipe has [survey.cadence]")
    return Table.read(path)

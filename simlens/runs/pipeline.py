"""A whole run: recipe -> systems -> scenes -> images -> files.

The run is cut into shards of consecutive systems (``output.shard_size``); an engine renders them
(in this process, in worker processes or on Dask; see :mod:`simlens.engines`) and each finished
shard is recorded in the manifest (see :mod:`simlens.run_folder`).  When all shards are finished the
truth catalogue is assembled from the shards' truth rows and the manifest is marked complete.
Interrupting a run (Ctrl-C, SIGKILL, a full disk) loses at most the shards in flight; the same call
again finishes it, with files identical to an uninterrupted run.
"""

from __future__ import annotations

import errno
import functools
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np

from .engines import resolve_engine, run_tasks
from ..errors import RunError
from ..output.catalogue import write_catalogue
from ..output.checksums import sha256_of
from ..truth.sampler import PopulationSampler
from ..recipe import Recipe
from .resources import check_resources
from .run_folder import RunFolder
from ..truth.selection import describe_attrition, sum_attrition
from .shards import render_shard, shard_path, shard_plan

__all__ = ["RunSummary", "run", "default_output_folder"]


@dataclass(frozen=True)
class RunSummary:
    folder: Path
    count: int
    rendered_now: int
    seconds: float
    timings: dict
    n_multiply_imaged: int
    median_einstein_radius: float
    median_arc_snr: float
    selection: dict = None

    def describe(self) -> str:
        per = self.seconds / max(self.rendered_now, 1)
        stages = ", ".join(f"{k} {v:.1f} s" for k, v in self.timings.items())
        resumed = "" if self.rendered_now == self.count else f" (resumed: {self.rendered_now} rendered now)"
        return (f"wrote {self.count} systems to {self.folder}{resumed} in {self.seconds:.1f} s "
                f"({per * 1e3:.0f} ms each)\n"
                f"  multiply imaged: {self.n_multiply_imaged}/{self.count}; median Einstein radius "
                f"{self.median_einstein_radius:.2f} arcsec; median arc S/N (reference band) {self.median_arc_snr:.1f}\n"
                f"  {describe_attrition(self.selection or {})}\n"
                f"  process time by stage (all workers): {stages}")


def default_output_folder(recipe: Recipe) -> Path:
    return Path("outputs") / recipe.name


def run(recipe: Recipe, out: Path | str | None = None, *, overwrite: bool = False, workers: int = 1,
        engine: str = "auto", scheduler: str | None = None,
        progress: Callable[[int, int], Any] | None = None, check_machine: bool = True) -> RunSummary:
    """Render every system of ``recipe`` into the run folder ``out`` (default ``outputs/<name>``).

    ``workers``/``engine``/``scheduler`` choose where shards run (:mod:`simlens.engines`).
    ``progress(total, initial)`` may return a tqdm-like object; it gets ``update(n)`` per shard.
    An unfinished run folder of the same recipe and seed is resumed.  Before anything is written,
    a run this machine cannot hold (memory, disk; :mod:`simlens.runs.resources`) is refused, unless
    ``check_machine`` is false.
    """
    out = Path(out) if out is not None else default_output_folder(recipe)
    chosen = resolve_engine(engine, workers, scheduler)  # check the choice before touching the disk
    if check_machine:
        check_resources(recipe, out, local_workers=None if scheduler is not None else
                        (1 if chosen == "serial" else workers))
    t_start = time.perf_counter()
    folder = RunFolder.open(out, recipe, overwrite=overwrite)
    try:
        summary = _run_open_folder(recipe, out, folder, workers, engine, scheduler, progress, t_start)
    except KeyboardInterrupt:
        folder.fail("interrupted", "interrupted by the user")
        raise
    except BaseException as exc:
        folder.fail("failed", f"{type(exc).__name__}: {exc}")
        raise
    finally:
        folder.release()
    return summary


def _run_open_folder(recipe: Recipe, out: Path, folder: RunFolder, workers: int, engine: str,
                     scheduler: str | None, progress, t_start: float) -> RunSummary:
    plan = shard_plan(recipe)
    todo = [spec for spec in plan if spec.index not in folder.finished]
    done_systems = recipe.count - sum(spec.n_systems for spec in todo)
    bar = progress(recipe.count, done_systems) if progress is not None else None
    fields = recipe.field is not None
    if fields:
        from .fields import render_field

        task = functools.partial(render_field, recipe, str(out))
    else:
        task = functools.partial(render_shard, recipe, str(out))
    try:
        for result in run_tasks(task, todo, engine=engine, workers=workers, scheduler=scheduler):
            folder.record(result)
            if bar is not None:
                bar.update(result.spec.n_systems)
    except OSError as exc:
        raise _write_error(out, exc) from None
    finally:
        if bar is not None:
            bar.close()
    reference = f"arc_snr_{recipe.reference_band}"
    try:
        shards = [out / shard_path(recipe, spec.index) for spec in plan]

        def catalogue(stem: str, table: str, keep=(), single: bool = False):
            # single: a table every shard holds alike (the run's epochs), written from the first
            return write_catalogue(shards[:1] if single else shards, table, out, stem, keep=keep)

        summary_columns = catalogue("truth", "TRUTH", keep=("n_images", "einstein_radius", reference))
        catalogue("subhalos", "SUBHALOS")
        catalogue("images", "IMAGE_TRUTH")
        catalogue("line_of_sight", "LINE_OF_SIGHT")
        if fields:
            catalogue("field_objects", "OBJECTS")
        if recipe.neighbours is not None:
            catalogue("neighbours", "NEIGHBOUR_TRUTH")
        if recipe.survey.cadence is not None:
            catalogue("light_curves", "LIGHT_CURVES")
            catalogue("epochs", "EPOCHS", single=True)
    except OSError as exc:
        raise _write_error(out, exc) from None
    seconds = time.perf_counter() - t_start
    sampler = PopulationSampler(recipe)
    attrition = sum_attrition(entry.get("selection", {}) for entry in folder.manifest["shards"].values())
    catalogues = (["truth", "subhalos", "images", "line_of_sight"] + (["field_objects"] if fields else [])
                  + (["neighbours"] if recipe.neighbours is not None else [])
                  + (["light_curves", "epochs"] if recipe.survey.cadence is not None else []))
    files = {name: [f"{name}.fits", f"{name}.ecsv"] for name in catalogues}
    if fields:
        files.update(fields="fields/field_*.fits", regions="fields/field_*.reg")
    else:
        files.update(shards="shards/shard_*.fits",
                     cutouts="cutouts/system_*.fits" if recipe.output.per_system_files else None)
    folder.complete({
        "grid_cells": sampler.n_grid_cells, "cosmology": repr(sampler.cosmology),
        "files": files,
        "truth": {name: sha256_of(out / name) for c in catalogues for name in (f"{c}.fits", f"{c}.ecsv")},
        "selection": attrition,
        "seconds_last_session": round(seconds, 3),
        "engine": resolve_engine(engine, workers, scheduler), "workers": workers,
    })
    return RunSummary(folder=out, count=recipe.count, rendered_now=recipe.count - done_systems, seconds=seconds,
                      timings=dict(folder.manifest.get("seconds_by_stage", {})),
                      n_multiply_imaged=int((summary_columns["n_images"] >= 2).sum()),
                      median_einstein_radius=float(np.median(summary_columns["einstein_radius"])),
                      median_arc_snr=float(np.median(summary_columns[reference])), selection=attrition)


def _write_error(out: Path, exc: OSError) -> RunError:
    reason = exc.strerror or str(exc)
    hint = "free some space" if exc.errno == errno.ENOSPC else "make it writable"
    return RunError(f"{out}: cannot write ({reason}{': ' + str(exc.filename) if exc.filename else ''}); "
                        f"finished shards are kept: {hint} and run the same command again to finish")

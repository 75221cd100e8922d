"""A whole run: recipe -> systems -> scenes -> images -> files.

The run is built in a hidden sibling folder (``.NAME.partial-PID``) and renamed into place only when
every file is written, so a run folder that exists is always complete.  An existing run folder is
replaced only with ``overwrite=True``.
"""

from __future__ import annotations

import os
import shutil
import time
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable, Iterable

from .errors import SimlensError
from .output import truth_row, write_cutout, write_manifest, write_truth
from .population import PopulationSampler
from .recipe import Recipe
from .render import render_system

__all__ = ["RunSummary", "run", "default_output_folder"]


@dataclass(frozen=True)
class RunSummary:
    folder: Path
    count: int
    seconds: float
    timings: dict
    n_multiply_imaged: int
    median_einstein_radius: float
    median_arc_snr: float

    def describe(self) -> str:
        per = self.seconds / max(self.count, 1)
        stages = ", ".join(f"{k} {v:.1f} s" for k, v in self.timings.items())
        return (f"wrote {self.count} systems to {self.folder} in {self.seconds:.1f} s ({per * 1e3:.0f} ms each)\n"
                f"  multiply imaged: {self.n_multiply_imaged}/{self.count}; median Einstein radius "
                f"{self.median_einstein_radius:.2f} arcsec; median arc S/N (reference band) {self.median_arc_snr:.1f}\n"
                f"  time by stage: {stages}")


def default_output_folder(recipe: Recipe) -> Path:
    return Path("outputs") / recipe.name


def _prepare_folder(out: Path, overwrite: bool) -> Path:
    if out.exists() and not out.is_dir():
        raise SimlensError(f"{out}: exists and is not a folder; choose another --out")
    if out.exists() and any(out.iterdir()) and not overwrite:
        raise SimlensError(f"{out}: a run folder already exists; pass --overwrite to replace it, "
                           f"or choose another --out")
    parent = out.parent if str(out.parent) else Path(".")
    try:
        parent.mkdir(parents=True, exist_ok=True)
        partial = parent / f".{out.name}.partial-{os.getpid()}"
        if partial.exists():
            shutil.rmtree(partial)
        (partial / "cutouts").mkdir(parents=True)
    except OSError as exc:
        raise SimlensError(f"{out}: cannot create the run folder ({exc.strerror}); choose a writable --out") from None
    return partial


def _publish(partial: Path, out: Path) -> None:
    if out.exists():
        old = out.parent / f".{out.name}.old-{os.getpid()}"
        os.replace(out, old)
        os.replace(partial, out)
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.replace(partial, out)


def run(recipe: Recipe, out: Path | str | None = None, *, overwrite: bool = False,
        progress: Callable[[Iterable], Iterable] | None = None) -> RunSummary:
    """Render every system of ``recipe`` and write the run folder; return a summary.

    ``progress`` wraps the system ids (e.g. ``tqdm.tqdm``) to show progress.
    """
    out = Path(out) if out is not None else default_output_folder(recipe)
    started = datetime.now(timezone.utc)
    t_start = time.perf_counter()
    sampler = PopulationSampler(recipe)
    partial = _prepare_folder(out, overwrite)
    try:
        rows = []
        timings = {"sampling": 0.0, "ray_tracing": 0.0, "scene": 0.0, "galsim_stage": 0.0,
                   "image_finding": 0.0, "writing": 0.0}
        ids: Iterable[int] = range(recipe.count)
        if progress is not None:
            ids = progress(ids)
        digits = max(6, len(str(recipe.count - 1)))
        for system_id in ids:
            t0 = time.perf_counter()
            system = sampler.draw(system_id)
            timings["sampling"] += time.perf_counter() - t0
            rendered = render_system(system, recipe.survey, recipe.reference_band)
            for key, value in rendered.timings.items():
                timings[key] += value
            t1 = time.perf_counter()
            relative = f"cutouts/system_{system_id:0{digits}d}.fits"
            write_cutout(rendered, partial / relative, run_name=recipe.name)
            rows.append(truth_row(rendered, relative))
            timings["writing"] += time.perf_counter() - t1
        t1 = time.perf_counter()
        table = write_truth(rows, partial)
        timings["writing"] += time.perf_counter() - t1
        seconds = time.perf_counter() - t_start
        write_manifest(partial, {
            "simlens_run": recipe.name,
            "recipe_file": recipe.origin,
            "recipe_text": recipe.source_text,
            "seed": recipe.seed,
            "count": recipe.count,
            "grid_cells": sampler.n_grid_cells,
            "cosmology": repr(sampler.cosmology),
            "bands": list(recipe.survey.band_names),
            "reference_band": recipe.reference_band,
            "files": {"cutouts": "cutouts/system_*.fits", "truth": ["truth.fits", "truth.ecsv"]},
            "started_utc": started.isoformat(timespec="seconds"),
            "finished_utc": datetime.now(timezone.utc).isoformat(timespec="seconds"),
            "seconds": round(seconds, 3),
            "seconds_by_stage": {k: round(v, 3) for k, v in timings.items()},
        })
        _publish(partial, out)
    except BaseException:
        shutil.rmtree(partial, ignore_errors=True)
        raise
    import numpy as np

    snr = table[f"arc_snr_{recipe.reference_band}"]
    return RunSummary(folder=out, count=recipe.count, seconds=seconds, timings=timings,
                      n_multiply_imaged=int((table["n_images"] >= 2).sum()),
                      median_einstein_radius=float(np.median(table["einstein_radius"])),
                      median_arc_snr=float(np.median(snr)))

"""Robustness sweep: many random systems with extreme parameters give only finite pixels and truth.

Renders bench/edge_cases.toml (10,000 systems by default: Einstein radius from 0.0004" to beyond the
cutout, q = 1 and q -> 0, sources on the central caustic, magnitudes from 10 to 38, ...) and checks
every plane of every shard and every numeric truth column for non-finite values.
Run: python bench/sweep_robustness.py [--n 10000] [--workers 2]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np

import simlens
from simlens.runs.loader import iter_batches


def check_run(folder: Path) -> tuple[int, list[str]]:
    from astropy.table import Table

    truth_all = Table.read(Path(folder) / "truth.fits")
    not_modelled = {name for name in truth_all.colnames
                    if np.asarray(truth_all[name]).dtype.kind == "f" and np.isnan(np.asarray(truth_all[name])).all()}
    problems = []
    n = 0
    for plane in ("IMAGES", "SOURCE", "LENS", "PSF", "MASK"):
        for data, truth in iter_batches(folder, batch_size=1000, plane=plane):
            bad = ~np.isfinite(data.reshape(len(data), -1)).all(axis=1)
            problems += [f"{plane}: system {i} has non-finite pixels" for i in truth["system_id"][bad]]
            if plane == "IMAGES":
                n += len(truth)
                for name in truth.colnames:
                    column = np.asarray(truth[name])
                    # Columns of quantities the recipe does not model are NaN throughout, by design.
                    if name in not_modelled:
                        continue
                    if column.dtype.kind == "f" and not np.isfinite(column).all():
                        problems += [f"truth {name}: system {i} is {v}" for i, v in
                                     zip(truth["system_id"][~np.isfinite(column)], column[~np.isfinite(column)])]
    return n, problems


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--n", type=int, default=10_000)
    parser.add_argument("--workers", type=int, default=2)
    args = parser.parse_args()
    recipe = simlens.load_recipe(Path(__file__).with_name("edge_cases.toml")).with_overrides(count=args.n)
    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        simlens.run(recipe, Path(tmp) / "run", workers=args.workers)
        seconds = time.perf_counter() - t0
        n, problems = check_run(Path(tmp) / "run")
    print(f"{n} edge-case systems rendered in {seconds:.0f} s with {args.workers} workers")
    print(f"  non-finite values: {len(problems)}")
    for line in problems[:20]:
        print("   ", line)


if __name__ == "__main__":
    main()

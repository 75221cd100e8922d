"""Parallel efficiency of `simlens make` and the overhead of Dask against plain processes.

Renders the same run (demo survey, --n systems in shards of --shard-size) three ways, side by side
in one run of this script, and checks the files are identical:
  serial      one process
  processes   --workers local processes (concurrent.futures)
  dask        a Dask LocalCluster of --workers single-threaded processes
Prints wall times, the parallel efficiency  t_serial / (workers * t_processes)  and the Dask
overhead  t_dask / t_processes - 1.  Start-up (worker processes, imports) is included: it is part of
what a user waits for.  The load average is printed first, with a warning when the machine is not
idle (other work then takes cores from the parallel runs, not from the serial one).
Run: python bench/bench_parallel.py [--n 200] [--workers 2]
"""

from __future__ import annotations

import argparse
import dataclasses
import hashlib
import os
import shutil
import tempfile
import time
from pathlib import Path

import simlens


def checksums(folder: Path) -> dict:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*.fits"))}


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--n", type=int, default=200)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--shard-size", type=int, default=10)
    parser.add_argument("--no-dask", action="store_true", help="compare serial and processes only")
    args = parser.parse_args()
    load = os.getloadavg()
    print("load average (1, 5, 15 min):", ", ".join(f"{v:.2f}" for v in load), f"on {os.cpu_count()} cores"
          + ("" if load[0] < 0.3 else "  -- not idle: the parallel figures below are pessimistic"))
    recipe = simlens.load_recipe(Path(__file__).parents[1] / "recipes" / "demo.toml").with_overrides(count=args.n)
    recipe = dataclasses.replace(recipe, output=dataclasses.replace(recipe.output, shard_size=args.shard_size,
                                                                     per_system_files=False))
    root = Path(tempfile.mkdtemp(prefix="simlens-bench-"))
    times, sums = {}, {}
    try:
        engines = [("serial", dict(workers=1)), ("processes", dict(workers=args.workers, engine="processes"))]
        if not args.no_dask:
            engines.append(("dask", dict(workers=args.workers, engine="dask")))
        for name, kwargs in engines:
            t0 = time.perf_counter()
            simlens.run(recipe, root / name, **kwargs)
            times[name] = time.perf_counter() - t0
            sums[name] = checksums(root / name)
    finally:
        shutil.rmtree(root, ignore_errors=True)
    identical = all(s == sums["serial"] for s in sums.values())
    print(f"{args.n} demo systems in shards of {args.shard_size}, {args.workers} workers")
    for name, t in times.items():
        print(f"  {name:<10} {t:7.2f} s  ({t / args.n * 1e3:.1f} ms per system)")
    print(f"  parallel efficiency at {args.workers} workers: {times['serial'] / (args.workers * times['processes']):.1%}")
    if "dask" in times:
        print(f"  Dask LocalCluster overhead against processes: {times['dask'] / times['processes'] - 1:+.1%}")
    print(f"  files identical across engines: {identical}")


if __name__ == "__main__":
    main()

"""`simlens make recipes/population.toml`, this checkout against an earlier revision, side by side.

Both sides run the same command on the same recipe (``--n`` systems, one worker, their own fresh
run folder) in separate processes, alternating, ``--repeats`` times each, on two variants: the
recipe as it is (its ``min_arc_snr`` cut renders every candidate that reaches it, and a failing one
is redrawn), and the recipe without that cut (so the sampling stage is the truth alone on both
sides: the baseline counted the renders of image-cut rejections as sampling); the earlier revision is
checked out with ``git worktree`` into a temporary folder and run from there (PYTHONPATH), so both
use this machine's installed GalSim, numpy and astropy.  Printed per system: the sampling stage
(``seconds_by_stage.sampling`` of each run's manifest), the whole command (wall time, start-up
included), and the ratios baseline / this checkout (the best of the repeats for each).

Default baseline: f222759, the revision before the one array-first sampler (``make`` then drew one
system at a time).  The draws of the two revisions differ (the sampler changed), so the systems are
drawn from the same populations but are not the same systems.

Run: python bench/bench_make_sampling.py [--baseline REV] [--n 40] [--repeats 3]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
RECIPE = ROOT / "recipes" / "population.toml"


def run_make(source: Path, recipe: Path, out: Path, n: int) -> tuple[float, float]:
    """(sampling seconds, wall seconds) of one `simlens make` with the package at ``source``."""
    env = dict(os.environ, PYTHONPATH=str(source))
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-m", "simlens", "make", str(recipe), "--out", str(out), "--n", str(n),
                    "--workers", "1", "--quiet"], env=env, check=True, cwd=source, stdout=subprocess.DEVNULL)
    wall = time.perf_counter() - t0
    manifest = json.loads((out / "manifest.json").read_text())
    return float(manifest["seconds_by_stage"]["sampling"]), wall


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--baseline", default="f222759")
    parser.add_argument("--n", type=int, default=40)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        baseline = tmp / "baseline"
        subprocess.run(["git", "-C", str(ROOT), "worktree", "add", "--detach", str(baseline), args.baseline],
                       check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        without_cut = tmp / "population_without_image_cuts.toml"
        text = RECIPE.read_text()
        assert "min_arc_snr" in text
        without_cut.write_text("\n".join(line for line in text.splitlines() if not line.startswith("min_arc_snr")))
        variants = {"as in the recipe (min_arc_snr = 10)": RECIPE, "without its image cut": without_cut}
        results = {(v, name): [] for v in variants for name in ("baseline", "this")}
        try:
            for r in range(args.repeats):
                for v, recipe in variants.items():
                    for name, source in (("baseline", baseline), ("this", ROOT)):
                        out = tmp / f"{name}_{len(results[v, name])}_{abs(hash(v))}"
                        results[v, name].append(run_make(source, recipe, out, args.n))
        finally:
            subprocess.run(["git", "-C", str(ROOT), "worktree", "remove", "--force", str(baseline)], check=False)
    print(f"simlens make {RECIPE.name} --n {args.n}, one worker; best of {args.repeats}, ms per system")
    for v in variants:
        best = {name: (min(s for s, _ in results[v, name]), min(w for _, w in results[v, name]))
                for name in ("baseline", "this")}
        print(f" {v}:")
        for name, label in (("baseline", f"baseline {args.baseline}"), ("this", "this checkout")):
            sampling, wall = best[name]
            print(f"  {label:20s} sampling {1e3 * sampling / args.n:7.1f}   whole command {1e3 * wall / args.n:7.1f}")
        print(f"  ratio baseline / this: sampling {best['baseline'][0] / best['this'][0]:.2f}x, "
              f"whole command {best['baseline'][1] / best['this'][1]:.2f}x")


if __name__ == "__main__":
    main()

"""Time per system of recipes/survey_realistic.toml against recipes/population.toml, in one run.

Both recipes draw the same physical lenses and sources; the realistic one adds what survey cutouts
carry (seeing scaled across bands, PSF ellipticity and optics, Lanczos-3 coadd noise of 10
exposures, bulges, knots, satellites, neighbours).  Each round runs ``make`` on N systems of each
(whole command: sampling, rendering, writing), the two interleaved; the medians of the rounds are
printed with their ratio.  Nothing is asserted.

Run: python bench/bench_realistic.py [--n 30] [--rounds 3]
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from pathlib import Path

import simlens

ROOT = Path(__file__).resolve().parents[1]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=30)
    parser.add_argument("--rounds", type=int, default=3)
    args = parser.parse_args()
    recipes = {name: simlens.load_recipe(ROOT / "recipes" / f"{name}.toml").with_overrides(count=args.n)
               for name in ("population", "survey_realistic")}
    times = {name: [] for name in recipes}
    with tempfile.TemporaryDirectory() as tmp:
        for round_ in range(args.rounds):
            for name, recipe in recipes.items():
                t0 = time.perf_counter()
                simlens.run(recipe, Path(tmp) / f"{name}_{round_}")
                times[name].append((time.perf_counter() - t0) / args.n * 1e3)
    medians = {name: statistics.median(t) for name, t in times.items()}
    print(f"{args.n} systems per recipe, medians of {args.rounds} interleaved rounds, one process")
    for name, value in medians.items():
        print(f"  {name:18s} {value:8.1f} ms/system")
    print(f"  ratio survey_realistic / population: {medians['survey_realistic'] / medians['population']:.2f}")


if __name__ == "__main__":
    main()

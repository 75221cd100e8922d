"""How fast the truth of a population is drawn, without images (one process, one core).

Draws --n systems (default 100,000) of recipes/population.toml's populations in each placement
mode and prints systems per second per core, the draws per accepted system (rejected candidates, tries
and bulk geometry pairs included) and the seconds for 100,000.  The modes, side by side in one run:

* lens  -- lens mode as in the recipe (cross-section weighting, caustics for every candidate that
           reaches placement, the recipe's einstein_radius cut; its arc S/N cut needs images and is
           left out here);
* sky   -- sky mode (one source per 1/n of area; caustics for every system, for its flags);
* fixed -- the source placed uniformly inside one Einstein radius (no placement mode).

Each mode is drawn two ways, side by side in one run: ``draw_many`` of all --n systems at once (the
candidates of many systems on arrays) and ``draw`` one system at a time (the first --scalar-n
systems, default 10,000; the same code with one row); the ratio of their rates is printed.  Both
give the same systems.

Goal: 100,000 systems well under a minute on one core.
Run: python bench/bench_truth_sampling.py [--n 100000] [--scalar-n 10000]
"""

from __future__ import annotations

import argparse
import dataclasses
import time
from pathlib import Path

import simlens
from simlens.truth.sampler import PopulationSampler

RECIPE = Path(__file__).parents[1] / "recipes" / "population.toml"


def variant(mode: str):
    recipe = simlens.load_recipe(RECIPE)
    position = recipe.source.position
    selection = dataclasses.replace(recipe.selection, min_arc_snr=None)
    if mode == "fixed":
        position = dataclasses.replace(position, mode=None)
        selection = dataclasses.replace(selection, einstein_radius=None)
        from simlens.recipe.distributions import Fixed

        position = dataclasses.replace(position, radius_in_einstein_radii=Fixed(1.0))
        lens = recipe.lens
    else:
        position = dataclasses.replace(position, mode=mode)
        if mode == "sky":
            selection = dataclasses.replace(selection, einstein_radius=None)
        lens = recipe.lens
    source = dataclasses.replace(recipe.source, position=position)
    if mode == "fixed":
        # sources must lie behind every lens without a placement mode
        counts = dataclasses.replace(source.counts, redshift_range=(1.05, 4.0))
        source = dataclasses.replace(source, counts=counts)
    return dataclasses.replace(recipe, source=source, selection=selection, lens=lens)


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--n", type=int, default=100_000)
    parser.add_argument("--scalar-n", type=int, default=10_000)
    args = parser.parse_args()
    print(f"truth sampling, one process: draw_many on {args.n} systems, draw on {args.scalar_n}, per mode")
    for mode in ("lens", "sky", "fixed"):
        sampler = PopulationSampler(variant(mode))
        sampler.draw_many(range(10))  # build the tables outside the timing
        t0 = time.perf_counter()
        systems = sampler.draw_many(range(args.n))
        block = time.perf_counter() - t0
        t0 = time.perf_counter()
        for i in range(args.scalar_n):
            sampler.draw(i)
        scalar = time.perf_counter() - t0
        candidates = sum(1 + sum(s.rejections.values()) for s in systems)
        lensed = sum(s.multiply_imaged for s in systems)
        per_block, per_scalar = block / args.n, scalar / args.scalar_n
        print(f"  {mode:5s}: draw_many {1 / per_block:7.0f} systems/s ({per_block * 1e5:5.1f} s per 100,000); "
              f"draw {1 / per_scalar:6.0f} systems/s ({per_scalar * 1e5:5.1f} s per 100,000); "
              f"ratio {per_scalar / per_block:4.2f}; {candidates / args.n:5.2f} draws per system; "
              f"multiply imaged {lensed / args.n:6.1%}")


if __name__ == "__main__":
    main()

"""How fast the truth of a population is drawn, without images (one process, one core).

Draws --n systems (default 100,000) of recipes/population.toml's populations in each placement
mode and prints systems per second per core, the draws per accepted system (rejected candidates, tries
and bulk geometry pairs included) and the seconds for 100,000.  The modes, side by side in one run:

* lens  -- lens mode as in the recipe (cross-section weighting, caustics for every candidate that
           reaches placement, the recipe's einstein_radius cut; its arc S/N cut needs images and is
           left out here);
* sky   -- sky mode (one source per 1/n of area; caustics for every system, for its flags);
* fixed -- the source placed uniformly inside one Einstein radius (no placement mode).

Goal: 100,000 systems well under a minute on one core.
Run: python bench/bench_truth_sampling.py [--n 100000]
"""

from __future__ import annotations

import argparse
import dataclasses
import time
from pathlib import Path

import simlens
from simlens.population import PopulationSampler

RECIPE = Path(__file__).parents[1] / "recipes" / "population.toml"


def variant(mode: str):
    recipe = simlens.load_recipe(RECIPE)
    position = recipe.source.position
    selection = dataclasses.replace(recipe.selection, min_arc_snr=None)
    if mode == "fixed":
        position = dataclasses.replace(position, mode=None)
        selection = dataclasses.replace(selection, einstein_radius=None)
        from simlens.sampling import Fixed

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
    args = parser.parse_args()
    print(f"truth sampling, {args.n} systems per mode, one process")
    for mode in ("lens", "sky", "fixed"):
        sampler = PopulationSampler(variant(mode))
        sampler.draw(0)  # build the tables outside the timing
        t0 = time.perf_counter()
        candidates = lensed = 0
        for i in range(args.n):
            s = sampler.draw(i)
            candidates += 1 + sum(s.rejections.values())
            lensed += s.multiply_imaged
        seconds = time.perf_counter() - t0
        print(f"  {mode:5s}: {args.n / seconds:8.0f} systems/s per core; {candidates / args.n:5.2f} draws per system "
              f"(rejected ones included); multiply imaged {lensed / args.n:6.1%}; {seconds * 1e5 / args.n:6.0f} s per 100,000")


if __name__ == "__main__":
    main()

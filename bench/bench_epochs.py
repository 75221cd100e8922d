"""Cost of each extra epoch against the static render of the same system, in one run.

For the systems of recipes/transients.toml (its epochs, at its cutout size and at --size), each
system is rendered statically (``SystemRendering(...).render()``: rays, refinement, images, every
band's GalSim stage) and then at every epoch (``EpochRenderer.render``: the static scene's
transform once per band, then per epoch its PSF, the point sources and the noise), the two
interleaved system by system; the epochs' PSF transforms are kept across systems, as in a shard
(the first system pays for them and is left out).  Printed: medians per system of the static
render and of one epoch, and their ratio (goal: at most 0.10).  Nothing is asserted.

Run: python bench/bench_epochs.py [--n 20] [--size 64]
"""

from __future__ import annotations

import argparse
import dataclasses
import statistics
import time
from pathlib import Path

import simlens
from simlens.imaging.epochs import EpochRenderer
from simlens.imaging.render import SystemRendering

ROOT = Path(__file__).resolve().parents[1]


def measure(recipe, n: int) -> tuple[float, float, int]:
    sampler = simlens.PopulationSampler(recipe)
    epochs = sampler.epochs
    renderer = EpochRenderer(epochs)
    systems = sampler.draw_many(range(n + 1))
    static, per_epoch = [], []
    for k, system in enumerate(systems):
        t0 = time.perf_counter()
        rendering = SystemRendering(system, recipe.survey, recipe.reference_band, epochs.widest_fwhm)
        rendering.render()
        t1 = time.perf_counter()
        renderer.render(rendering)
        t2 = time.perf_counter()
        if k:  # the first system builds the epochs' PSF transforms
            static.append((t1 - t0) * 1e3)
            per_epoch.append((t2 - t1) * 1e3 / len(epochs))
    return statistics.median(static), statistics.median(per_epoch), len(epochs)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=20)
    parser.add_argument("--size", type=int, default=64)
    args = parser.parse_args()
    base = simlens.load_recipe(ROOT / "recipes" / "transients.toml")
    sizes = sorted({base.survey.cutout_size, args.size})
    print(f"recipes/transients.toml, {args.n} systems per size, medians, one process")
    for size in sizes:
        recipe = dataclasses.replace(base, survey=dataclasses.replace(base.survey, cutout_size=size))
        static, epoch, n_epochs = measure(recipe, args.n)
        print(f"  {size:4d} px, {len(recipe.survey.bands)} bands: static render {static:7.2f} ms, "
              f"one epoch {epoch:6.3f} ms ({n_epochs} epochs), epoch / static {epoch / static:.3f}")


if __name__ == "__main__":
    main()

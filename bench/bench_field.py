"""Field images: the unlensed background drawn together against GalSim drawing each object alone.

For the fields of recipes/field.toml (2048 x 2048 pixels, 3 bands) this script, in one run:
  1. draws each field's noiseless background (galaxies and stars) both ways, side by side:
       together   simlens.imaging.many_objects (one sampled plane per band, one convolution),
                  the few objects bright enough to need it drawn alone by GalSim, as fields do
       per object GalSim drawing every object alone (what fields did before), the same objects
     and prints both times, their ratio, and the two images' largest difference in units of the
     band's noise sigma and of the brightest pixel, and the total flux of each;
  2. renders whole fields (lenses, background, noise, files) as `simlens make` does, and prints
     seconds per field (issue 17's goal: at most 10 s on one core).
The load average is printed first: a busy machine inflates both sides.
Run: python bench/bench_field.py [--fields 2]
"""

from __future__ import annotations

import argparse
import os
import shutil
import tempfile
import time
from pathlib import Path

import galsim
import numpy as np

from simlens.imaging.many_objects import draw_alone, draw_together, drawn_together
from simlens.populations.background import BackgroundModel
from simlens.recipe import load_recipe
from simlens.runs.fields import render_field
from simlens.runs.shards import ShardSpec
from simlens.truth.sampler import PopulationSampler
from simlens.truth.streams import field_streams


def background_both_ways(recipe, sampler, index: int) -> None:
    size, scale = recipe.field.size, recipe.survey.pixel_scale
    bands = sampler.draw(index * recipe.field.lenses).bands
    objects = BackgroundModel(recipe, sampler.distances).draw(field_streams(recipe.seed, index)["background"], [])
    t0 = time.perf_counter()
    together = drawn_together(objects, bands)
    alone = objects.subset(~together)
    ours = draw_together(objects.subset(together), bands, size, scale)
    for image, band in zip(ours, bands):
        canvas = galsim.Image(image, scale=scale)
        draw_alone(canvas, alone, band)
    t_ours = time.perf_counter() - t0
    t0 = time.perf_counter()
    theirs = []
    for band in bands:
        canvas = galsim.Image(size, size, scale=scale)
        draw_alone(canvas, objects, band)
        theirs.append(canvas.array)
    t_theirs = time.perf_counter() - t0
    print(f"field {index}: {len(objects)} objects ({int(together.sum())} drawn together, {int((~together).sum())} alone)")
    print(f"  together {t_ours:6.2f} s   per object {t_theirs:6.2f} s   ratio {t_ours / t_theirs:.2f}")
    for band, a, b in zip(bands, ours, theirs):
        diff = np.abs(a - b).max()
        print(f"  {band.name}: largest difference {diff / band.background_sigma:.3f} sigma = {diff / b.max():.2e} of the "
              f"brightest pixel; total flux ratio {a.sum() / b.sum():.5f}")


def whole_fields(recipe, n_fields: int) -> None:
    folder = Path(tempfile.mkdtemp(prefix="simlens-bench-field-"))
    try:
        (folder / "fields").mkdir()
        for index in range(n_fields):
            t0 = time.perf_counter()
            result = render_field(recipe, folder, ShardSpec(index, index * recipe.field.lenses, recipe.field.lenses))
            stages = ", ".join(f"{k} {v:.1f}" for k, v in result.timings.items() if v >= 0.05)
            print(f"field {index}: {time.perf_counter() - t0:.2f} s in all ({stages})")
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--fields", type=int, default=2)
    args = parser.parse_args()
    print("load average (1, 5, 15 min):", ", ".join(f"{v:.2f}" for v in os.getloadavg()), f"on {os.cpu_count()} cores")
    recipe = load_recipe(Path(__file__).parents[1] / "recipes" / "field.toml")
    sampler = PopulationSampler(recipe)
    print(f"{recipe.field.size} x {recipe.field.size} px, bands {', '.join(recipe.survey.band_names)}")
    for index in range(args.fields):
        background_both_ways(recipe, sampler, index)
    whole_fields(recipe, args.fields)


if __name__ == "__main__":
    main()

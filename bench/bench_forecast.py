"""Forecast benchmarks: truth draws per second, and the fast source view against the full render.

    python bench/bench_forecast.py [--draws 1000000] [--recipe recipes/forecasts/ground_deep.toml]

Prints (1) the wall time of ``--draws`` truth draws of the recipe's population in sky mode on one
core (issue 16's goal: 10^6 in under a minute), (2) the fast noiseless source view of
``simlens.forecast`` against rendering the same multiply imaged systems (all bands), interleaved
in one run, and (3) each forecast recipe's 5-sigma point-source and 10-sigma extended-source
(exponential, R_e = 0.3") depths through its own PSF, the figures its comments quote.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import galsim  # noqa: E402
import numpy as np  # noqa: E402

from simlens.forecast import estimated_source_view, forecast_recipe  # noqa: E402
from simlens.imaging.observe import psf_profile  # noqa: E402
from simlens.imaging.render import SystemRendering  # noqa: E402
from simlens.recipe import load_recipe  # noqa: E402
from simlens.truth.sampler import PopulationSampler  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]


def depths(path: Path) -> dict:
    recipe = load_recipe(path)
    system = PopulationSampler(recipe).draw(0)
    out = {}
    for band in system.bands:
        psf = psf_profile(band)
        for label, profile, k in (("point 5s", psf, 5.0),
                                  ("ext 10s", galsim.Convolve(galsim.Exponential(half_light_radius=0.3), psf), 10.0)):
            p = profile.drawImage(nx=101, ny=101, scale=band.pixel_scale).array
            flux = k * band.background_sigma / math.sqrt(float((p**2).sum()))
            out[f"{band.name} {label}"] = band.magzero - 2.5 * math.log10(flux)
    return out


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--draws", type=int, default=1_000_000)
    parser.add_argument("--recipe", default=str(ROOT / "recipes/forecasts/ground_deep.toml"))
    args = parser.parse_args()
    recipe = forecast_recipe(load_recipe(args.recipe), "collett2015").with_overrides(count=args.draws)
    sampler = PopulationSampler(recipe)
    sampler.draw_many(range(100))  # tables built, caches warm
    t0 = time.perf_counter()
    lensed = []
    for start in range(0, args.draws, 20_000):  # the forecast's draws: multiply imaged systems finished
        for system in sampler.draw_lensed(range(start, min(start + 20_000, args.draws))):
            if system is not None and len(lensed) < 60:
                lensed.append(system)
    seconds = time.perf_counter() - t0
    print(f"{args.draws} truth draws of {Path(args.recipe).name} for a forecast (sky mode, one process): "
          f"{seconds:.1f} s, {seconds / args.draws * 1e3:.3f} ms each; goal 10^6 in 60 s: "
          f"{'met' if seconds * 1e6 / args.draws <= 60 else 'missed'} ({seconds * 1e6 / args.draws:.0f} s per 10^6)")
    n_full = min(args.draws, 20_000)
    t0 = time.perf_counter()
    sampler.draw_many(range(n_full))
    every = time.perf_counter() - t0
    print(f"  every system finished (draw_many), {n_full} of them: {every / n_full * 1e3:.3f} ms each")
    bands = recipe.survey.band_names
    fast = full = 0.0
    for rounds in range(3):  # interleaved
        t = time.perf_counter()
        for system in lensed:
            estimated_source_view(system, recipe.survey, bands)
        fast += time.perf_counter() - t
        t = time.perf_counter()
        for system in lensed:
            SystemRendering(system, recipe.survey, recipe.reference_band).render()
        full += time.perf_counter() - t
    n = 3 * max(len(lensed), 1)
    print(f"{len(lensed)} multiply imaged systems, 3 interleaved rounds: fast source view {fast / n * 1e3:.1f} ms, "
          f"full render {full / n * 1e3:.1f} ms per system ({len(bands)} bands); ratio {fast / full:.2f}")
    for path in sorted((ROOT / "recipes/forecasts").glob("*.toml")):
        text = ", ".join(f"{k} {v:.2f}" for k, v in depths(path).items())
        print(f"depths of {path.name}: {text}")


if __name__ == "__main__":
    np.seterr(all="ignore")
    main()

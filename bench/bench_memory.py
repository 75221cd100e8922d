"""Peak memory of a run does not grow with the number of systems.

Runs a tiny survey (one band, 16x16 pixels, 2x supersampling, shards of 1000) for --small and --large
systems, each in a fresh process, and compares their peak resident set sizes (ru_maxrss of the
process that runs everything: serial engine).  Goal: large within 1.2x of small.
Run: python bench/bench_memory.py [--small 1000] [--large 100000]
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

RECIPE = textwrap.dedent("""
    name = "memory"
    count = 1000
    seed = 3
    [survey]
    pixel_scale = 0.25
    cutout_size = 16
    supersampling = 2
    [survey.bands.r]
    zero_point = 26.8
    sky_brightness = 21.2
    exposure_time = 900.0
    gain = 4.0
    psf = { profile = "moffat", fwhm = 0.8 }
    [cosmology]
    name = "Planck18"
    [lens]
    redshift = { uniform = [0.2, 0.8] }
    velocity_dispersion = { uniform = [150.0, 300.0] }
    [lens.light]
    magnitude = 20.0
    half_light_radius = 0.8
    [source]
    redshift = { uniform = [1.0, 3.0] }
    magnitude = 23.0
    half_light_radius = 0.2
    [output]
    shard_size = 1000
    noiseless = false
""")

CHILD = textwrap.dedent("""
    import resource, sys, simlens
    recipe = simlens.parse_recipe(open(sys.argv[1]).read()).with_overrides(count=int(sys.argv[2]))
    simlens.run(recipe, sys.argv[3])
    print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
""")


def peak_rss_kib(count: int, folder: Path) -> tuple[int, float]:
    recipe = folder / "memory.toml"
    recipe.write_text(RECIPE)
    t0 = time.perf_counter()
    out = subprocess.run([sys.executable, "-c", CHILD, str(recipe), str(count), str(folder / f"run{count}")],
                         capture_output=True, text=True, check=True)
    return int(out.stdout.strip().splitlines()[-1]), time.perf_counter() - t0


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--small", type=int, default=1000)
    parser.add_argument("--large", type=int, default=100_000)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        small, t_small = peak_rss_kib(args.small, Path(tmp))
        large, t_large = peak_rss_kib(args.large, Path(tmp))
    print(f"peak RSS: {args.small} systems {small / 1024:.0f} MiB ({t_small:.0f} s); "
          f"{args.large} systems {large / 1024:.0f} MiB ({t_large:.0f} s); ratio {large / small:.2f} (goal <= 1.2)")


if __name__ == "__main__":
    main()

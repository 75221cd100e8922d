"""The pre-flight memory estimate (simlens.runs.resources) against the measured peak memory.

For a set of cutout sizes, supersamplings, PSF widths and shard sizes (the test recipe of
tests/conftest.py with those keys changed), and two field runs, each case runs ``simlens make --n N`` in a fresh
process and reads its peak resident memory (``ru_maxrss`` of the child); printed side by side with
the estimate, and the ratio estimate / measured, which should be at least 1 (an upper bound) and
not much above 2.  A ratio below 1 means the estimate's constants need raising.

Run: python bench/bench_preflight.py
"""

from __future__ import annotations

import resource
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from simlens.recipe import parse_recipe  # noqa: E402
from simlens.runs.resources import estimate_resources, size_text  # noqa: E402
from tests.conftest import PHYSICAL_RECIPE, SMALL_RECIPE  # noqa: E402

CASES = [  # cutout runs: cutout, supersampling, fwhm of the g band (arcsec), shard size, systems
    (32, 4, 0.9, 4, 4), (64, 4, 0.9, 4, 4), (128, 4, 0.9, 4, 4), (256, 4, 0.9, 4, 2), (256, 8, 0.9, 4, 2),
    (512, 4, 0.9, 2, 2), (64, 16, 0.9, 4, 2), (64, 4, 3.0, 4, 2), (128, 4, 0.9, 64, 64),
]


def case_recipe(cutout, supersampling, fwhm, shard) -> str:
    text = (SMALL_RECIPE.replace("cutout_size = 32", f"cutout_size = {cutout}")
            .replace("supersampling = 4", f"supersampling = {supersampling}")
            .replace("beta = 3.0, fwhm = 0.9", f"beta = 3.0, fwhm = {fwhm}")
            .replace("shard_size = 4", f"shard_size = {shard}")
            .replace("per_system_files = true", "per_system_files = false"))
    return text


FIELD_CASES = [(1024, 64, 4), (2048, 128, 8)]  # field side, stamp side, lenses per field


def field_recipe(size, stamp, lenses) -> str:
    return (PHYSICAL_RECIPE.replace("count = 6", f"count = {lenses}")
            + f"\n[field]\nsize = {size}\nlenses = {lenses}\nlens_stamp_size = {stamp}\n")


def peak_rss(recipe_path: Path, out: Path, n: int) -> int:
    code = ("import resource, sys; from simlens.cli import main; rc = main(sys.argv[1:]); "
            "print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss); sys.exit(rc)")
    done = subprocess.run([sys.executable, "-c", code, "make", str(recipe_path), "--out", str(out), "--n", str(n),
                           "--quiet", "--no-resource-check"], capture_output=True, text=True, cwd=ROOT)
    if done.returncode != 0:
        raise RuntimeError(done.stderr)
    return int(done.stdout.strip().splitlines()[-1]) * 1024  # Linux reports KiB


def main() -> None:
    assert resource.getrusage(resource.RUSAGE_SELF).ru_maxrss > 0
    print(f"{'cutout':>6} {'super':>5} {'fwhm':>5} {'shard':>5} {'n':>4} {'estimate':>10} {'measured':>10} {'ratio':>6}")
    with tempfile.TemporaryDirectory() as tmp:
        for k, (cutout, s, fwhm, shard, n) in enumerate(CASES):
            text = case_recipe(cutout, s, fwhm, shard)
            recipe = parse_recipe(text, origin="case.toml").with_overrides(count=n)
            estimate = estimate_resources(recipe).memory_per_worker
            path = Path(tmp) / f"case{k}.toml"
            path.write_text(text)
            measured = peak_rss(path, Path(tmp) / f"run{k}", n)
            print(f"{cutout:>6} {s:>5} {fwhm:>5} {shard:>5} {n:>4} {size_text(estimate):>10} {size_text(measured):>10} "
                  f"{estimate / measured:>6.2f}", flush=True)
        print(f"\n{'field':>6} {'stamp':>5} {'lenses':>6} {'estimate':>10} {'measured':>10} {'ratio':>6}")
        for k, (size, stamp, lenses) in enumerate(FIELD_CASES):
            text = field_recipe(size, stamp, lenses)
            estimate = estimate_resources(parse_recipe(text, origin="field.toml")).memory_per_worker
            path = Path(tmp) / f"field{k}.toml"
            path.write_text(text)
            measured = peak_rss(path, Path(tmp) / f"field_run{k}", lenses)
            print(f"{size:>6} {stamp:>5} {lenses:>6} {size_text(estimate):>10} {size_text(measured):>10} "
                  f"{estimate / measured:>6.2f}", flush=True)


if __name__ == "__main__":
    main()

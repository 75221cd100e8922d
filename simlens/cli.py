"""Command line: a thin shell over the Python API.

    simlens make RECIPE [--out DIR] [--n N] [--seed S] [--overwrite]
                        [--workers N] [--engine auto|serial|processes|dask] [--scheduler ADDRESS]
    simlens check RECIPE
    simlens verify RUN_DIR

User errors print one line (``simlens: error: ...``) and exit with status 2; no traceback.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

from . import __version__
from .errors import SimlensError
from .recipe import load_recipe

__all__ = ["main"]


def _make(args) -> int:
    from tqdm import tqdm

    from .pipeline import default_output_folder, run

    recipe = load_recipe(args.recipe).with_overrides(count=args.n, seed=args.seed)
    out = Path(args.out) if args.out else default_output_folder(recipe)

    def progress(total, initial):
        return tqdm(total=total, initial=initial, desc=f"simlens {recipe.name}", unit="system",
                    disable=args.quiet, file=sys.stderr)

    n_shards = -(-recipe.count // recipe.output.shard_size)
    if args.workers > n_shards and not args.quiet:
        print(f"simlens: note: {n_shards} shard(s) for {args.workers} workers; lower output.shard_size "
              f"to use them all", file=sys.stderr)
    try:
        summary = run(recipe, out, overwrite=args.overwrite, workers=args.workers, engine=args.engine,
                      scheduler=args.scheduler, progress=progress)
    except KeyboardInterrupt:
        print(f"simlens: interrupted; finished shards are kept in {out}: run the same command again to finish",
              file=sys.stderr)
        return 130
    print(summary.describe())
    return 0


def _verify(args) -> int:
    from .run_folder import verify_run

    report = verify_run(Path(args.run_dir))
    print(report.describe())
    return 0 if report.ok else 1


def _check(args) -> int:
    from .population import PopulationSampler

    recipe = load_recipe(args.recipe).with_overrides(count=args.n, seed=args.seed)
    survey = recipe.survey
    print(f"{recipe.origin}: valid recipe '{recipe.name}'")
    print(f"  survey {survey.name!r}: bands {', '.join(survey.band_names)} (reference {recipe.reference_band}); "
          f"{survey.cutout_size}x{survey.cutout_size} pixels of {survey.pixel_scale:g} arcsec; "
          f"supersampling {survey.supersampling}")
    cells = recipe.grid_shape
    grid_text = " x ".join(str(n) for n in cells) if cells else "none"
    print(f"  {recipe.count} systems, seed {recipe.seed}; grid cells: {grid_text}")
    if cells and recipe.count < int(np.prod(cells)):
        print(f"  note: count {recipe.count} is smaller than the {int(np.prod(cells))} grid cells; some cells get no system")
    print("  parameters:")
    for path, param in recipe.parameters():
        print(f"    {path:<42} {param.describe()}")
    sampler = PopulationSampler(recipe)
    n = min(recipe.count, args.sample)
    systems = [sampler.draw(i) for i in range(n)]
    theta = np.array([s.einstein_radius for s in systems])
    mags = np.array([s.source_magnitude(recipe.reference_band) for s in systems])
    z_l, z_s = np.array([s.z_lens for s in systems]), np.array([s.z_source for s in systems])
    print(f"  drawn truth of the first {n} systems (no images), min / median / max:")
    print(f"    Einstein radius {theta.min():.2f} / {np.median(theta):.2f} / {theta.max():.2f} arcsec; "
          f"z_lens {z_l.min():.2f} / {np.median(z_l):.2f} / {z_l.max():.2f}; "
          f"z_source {z_s.min():.2f} / {np.median(z_s):.2f} / {z_s.max():.2f}")
    print(f"    source {recipe.reference_band} magnitude {mags.min():.1f} / {np.median(mags):.1f} / {mags.max():.1f}; "
          f"multiply imaged (source centre inside a caustic): {sum(s.multiply_imaged for s in systems)}/{n}; "
          f"placement: {systems[0].placement}")
    rejected: dict = {}
    for s in systems:
        for name, count in s.rejections.items():
            rejected[name] = rejected.get(name, 0) + count
    from .selection import describe_attrition

    print("    " + describe_attrition({"accepted": n, "candidates": n + sum(rejected.values()), "rejected_by": rejected})
          + (" (cuts on images are applied by make)" if recipe.selection.min_arc_snr is not None
             or recipe.selection.min_magnification is not None or recipe.selection.min_images is not None else ""))
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="simlens", description="Synthetic survey cutouts of strong gravitational lenses.")
    parser.add_argument("--version", action="version", version=f"simlens {__version__}")
    verbs = parser.add_subparsers(dest="verb", required=True, metavar="{make,check,verify}")

    make = verbs.add_parser("make", help="render the systems of a recipe into a run folder")
    make.add_argument("recipe", help="recipe file (TOML)")
    make.add_argument("--out", help="run folder (default: outputs/<recipe name>)")
    make.add_argument("--n", type=int, help="number of systems (overrides the recipe's count)")
    make.add_argument("--seed", type=int, help="random seed (overrides the recipe's seed)")
    make.add_argument("--overwrite", action="store_true", help="replace an existing run folder")
    make.add_argument("--workers", type=int, default=1, help="worker processes (default 1)")
    make.add_argument("--engine", default="auto", choices=("auto", "serial", "processes", "dask"),
                      help="where shards run (default: serial for 1 worker, else processes)")
    make.add_argument("--scheduler", help="address of a running Dask scheduler (implies --engine dask)")
    make.add_argument("--quiet", action="store_true", help="no progress bar")
    make.set_defaults(func=_make)

    check = verbs.add_parser("check", help="validate a recipe and summarise what would be drawn")
    check.add_argument("recipe", help="recipe file (TOML)")
    check.add_argument("--n", type=int, help="number of systems (overrides the recipe's count)")
    check.add_argument("--seed", type=int, help="random seed (overrides the recipe's seed)")
    check.add_argument("--sample", type=int, default=1000, help="systems to draw for the summary (default 1000)")
    check.set_defaults(func=_check)

    verify = verbs.add_parser("verify", help="check a run folder's files against its manifest")
    verify.add_argument("run_dir", help="run folder")
    verify.set_defaults(func=_verify)
    return parser


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        return args.func(args)
    except SimlensError as exc:
        print(f"simlens: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("simlens: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

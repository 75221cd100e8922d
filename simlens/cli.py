"""Command line: a thin shell over the Python API.

    simlens make RECIPE [--out DIR] [--n N] [--seed S] [--overwrite]
                        [--workers N] [--engine auto|serial|processes|dask] [--scheduler ADDRESS]
    simlens check RECIPE
    simlens verify RUN_DIR
    simlens score RUN_DIR SCORES (--threshold T | --fpr F | --fp-density D) [--by COLUMN ...] [--pair X Y]
                  [--match-radius ARCSEC]
    simlens inject IMAGE.fits [IMAGE.fits ...] --recipe RECIPE --lenses CATALOG [--bands g,r,i] [--psf PSF.fits] [--out DIR]
    simlens gallery RUN_DIR [--where "COLUMN OP VALUE" ...] [--missed SCORES --threshold T] [--sort COLUMN]
    simlens forecast RECIPE [--area DEG2] [--n N] [--rules collett2015|...|om10_supernova] [--out DIR]

Every error prints one line (``simlens: error: ...``), never a traceback unless ``--debug`` is given.
Exit status: 0 success; 1 a run that failed or a verify that found damage; 2 an input error (a
recipe, a file, an option, a folder that cannot be used); 130 interrupted (Ctrl-C).
"""

from __future__ import annotations

import argparse
import os
import sys
import traceback
import warnings
from pathlib import Path

from .version import __version__
from .errors import OUT_OF_MEMORY, RunError, SimlensError, SimlensWarning, clip

# Each command imports what it needs when it runs, so that `simlens --help` and a mistyped option
# answer at once (numpy, scipy, astropy and GalSim take about a second to load).

__all__ = ["main"]


def _make(args) -> int:
    from tqdm import tqdm

    from .recipe import load_recipe
    from .runs.pipeline import default_output_folder, run

    recipe = load_recipe(args.recipe).with_overrides(count=args.n, seed=args.seed)
    out = Path(args.out) if args.out else default_output_folder(recipe)

    def progress(total, initial):
        return tqdm(total=total, initial=initial, desc=f"simlens {recipe.name}", unit="system",
                    disable=args.quiet, file=sys.stderr)

    from .runs.shards import part_size

    n_shards = -(-recipe.count // part_size(recipe))
    if args.workers > n_shards and not args.quiet:
        print(f"simlens: note: {n_shards} shard(s) for {args.workers} workers; lower output.shard_size "
              f"to use them all", file=sys.stderr)
    try:
        summary = run(recipe, out, overwrite=args.overwrite, workers=args.workers, engine=args.engine,
                      scheduler=args.scheduler, progress=progress, check_machine=not args.no_resource_check)
    except KeyboardInterrupt:
        print(f"simlens: interrupted; finished shards are kept in {out}: run the same command again to finish",
              file=sys.stderr)
        return 130
    print(summary.describe())
    return 0


def _verify(args) -> int:
    from .runs.run_folder import verify_run

    report = verify_run(Path(args.run_dir))
    print(report.describe())
    return 0 if report.ok else 1


def _check(args) -> int:
    import numpy as np

    from .recipe import load_recipe
    from .truth.sampler import PopulationSampler

    recipe = load_recipe(args.recipe).with_overrides(count=args.n, seed=args.seed)
    survey = recipe.survey
    print(f"{recipe.origin}: valid recipe '{recipe.name}'")
    print(f"  survey {survey.name!r}: bands {', '.join(survey.band_names)} (reference {recipe.reference_band}); "
          f"{survey.cutout_size}x{survey.cutout_size} pixels of {survey.pixel_scale:g} arcsec; "
          f"supersampling {survey.supersampling}")
    from .runs.resources import available_memory, estimate_resources, size_text

    estimate = estimate_resources(recipe)
    memory = available_memory()
    print(f"  resources: {estimate.describe()}" + (f"; {size_text(memory)} of memory free here" if memory else ""))
    if memory is not None and estimate.memory_per_worker > memory:
        print(f"  note: more memory than this machine has free: make will refuse; lower {estimate.memory_hint}")
    if recipe.field is not None:
        from .runs.fields import describe_fields

        print(f"  fields: {describe_fields(recipe)}")
    if survey.cadence is not None:
        from .transients.cadence import five_sigma_depth, survey_epochs

        epochs = survey_epochs(recipe)
        per_band = ", ".join(f"{b} {epochs.band.count(b)} (median depth "
                             f"{np.median([five_sigma_depth(c) for c in epochs.conditions if c.name == b]):.2f})"
                             for b in survey.band_names if b in epochs.band)
        print(f"  epochs: {len(epochs)} visits from MJD {epochs.time[0]:.1f} to {epochs.time[-1]:.1f}: {per_band}")
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
    systems = sampler.draw_many(range(n))
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
    classes: dict = {}
    for s in systems:
        classes[s.system_class] = classes.get(s.system_class, 0) + 1
    print("    classes: " + ", ".join(f"{name} {n}" for name, n in sorted(classes.items(), key=lambda kv: -kv[1])))
    rejected: dict = {}
    for s in systems:
        for name, count in s.rejections.items():
            rejected[name] = rejected.get(name, 0) + count
    from .truth.selection import describe_attrition

    print("    " + describe_attrition({"accepted": n, "candidates": n + sum(rejected.values()), "rejected_by": rejected})
          + (" (cuts on images are applied by make)" if recipe.selection.min_arc_snr is not None
             or recipe.selection.min_magnification is not None or recipe.selection.min_images is not None else ""))
    return 0


def _score(args) -> int:
    from .scoring.cutouts import score_run

    if (Path(args.run_dir) / "fields").is_dir():
        from .scoring.fields import score_fields

        if args.fpr is not None:
            raise SimlensError("a field run has no non-lens cutouts to take a false-positive rate of; "
                               "use --threshold or --fp-density (false positives per deg^2)")
        report = score_fields(args.run_dir, args.scores, threshold=args.threshold,
                              false_positives_per_deg2=args.fp_density, match_radius=args.match_radius,
                              columns=args.by, pair=args.pair, n_bins=args.bins, name=args.name,
                              plots=not args.no_plots)
        print(report.describe())
        return 0
    if args.fp_density is not None:
        raise SimlensError("--fp-density is for field runs (detections in whole images); use --fpr or --threshold")
    report = score_run(args.run_dir, args.scores, threshold=args.threshold, false_positive_rate=args.fpr,
                       columns=args.by, pair=args.pair, n_bins=args.bins, name=args.name, plots=not args.no_plots)
    print(report.describe())
    return 0


def _forecast(args) -> int:
    from .forecast import forecast, write_forecast
    from .recipe import load_recipe

    recipe = load_recipe(args.recipe).with_overrides(seed=args.seed)
    out = Path(args.out) if args.out else Path("outputs") / f"forecast_{recipe.name}"

    def progress(done, total):
        if not args.quiet:
            print(f"  {done} of {total} deflectors drawn", file=sys.stderr)

    result = forecast(recipe, args.n, args.area, args.rules, progress=progress)
    files = write_forecast(result, out, overwrite=args.overwrite)
    print(f"{result.recipe_name} ({result.rules}): {result.detected} detectable lenses among {result.drawn} "
          f"deflectors drawn ({result.galaxies_per_deg2:.4g} per deg^2)")
    print(f"  {result.per_deg2:.3g} +- {result.sampling_error_per_deg2:.2g} (sampling) lenses per deg^2; "
          f"{result.in_area:.4g} +- {result.poisson_error_in_area:.2g} (Poisson) in {result.area:g} deg^2")
    if result.window_days:
        print(f"  maxima in a window of {result.window_days:g} days: {result.per_year:.4g} per year in "
              f"{result.area:g} deg^2")
    for column in ("einstein_radius", "multiplicity"):
        table = result.breakdown(column)
        if column == "multiplicity":
            parts = [f"{kind} {rate:.3g}" for kind, rate in zip(table["multiplicity"], table["per_deg2"])]
        else:
            parts = [f"{lo:g}-{hi:g}\" {rate:.3g}" for lo, hi, rate in
                     zip(table[f"{column}_low"], table[f"{column}_high"], table["per_deg2"]) if rate > 0]
        print(f"  per deg^2 by {column.replace('_', ' ')}: " + ", ".join(parts))
    print(f"  wrote {out}: " + ", ".join(files))
    return 0


def _gallery(args) -> int:
    from astropy.table import Table

    from .gallery import contact_sheets, population_plots, select_systems
    from .scoring.cutouts import read_scores

    run_dir = Path(args.run_dir)
    if not (run_dir / "truth.fits").is_file():
        raise SimlensError(f"{run_dir}: no truth.fits; is it a finished simlens run folder?")
    truth = Table.read(run_dir / "truth.fits")
    missed = read_scores(args.missed) if args.missed else None
    if missed is not None and args.threshold is None:
        raise SimlensError("--missed needs --threshold (systems scoring below it were missed)")
    rows = select_systems(truth, args.where or (), missed, args.threshold, args.sort, args.descending)
    rows = rows[: args.n]
    files = population_plots(run_dir) if args.population else []
    panels = [p.strip() for p in args.panels.split(",") if p.strip()] if args.panels else None
    if args.epochs:
        from .epoch_gallery import epoch_strips

        files += epoch_strips(run_dir, rows, name=args.name)
    else:
        files += contact_sheets(run_dir, rows, name=args.name, bands=args.bands, panels=panels, smooth=args.smooth,
                                stretch_scale=args.stretch_scale, q=args.q)
    print(f"{len(rows)} systems drawn")
    for f in files:
        print(f"  wrote {f}")
    return 0


def _inject(args) -> int:
    from .recipe import load_recipe
    from .injection import inject

    recipe = load_recipe(args.recipe).with_overrides(seed=args.seed)
    out = Path(args.out) if args.out else Path("outputs") / f"inject_{Path(args.images[0]).stem}"
    bands = [b.strip() for b in args.bands.split(",") if b.strip()] if args.bands else None
    images = args.images[0] if len(args.images) == 1 else args.images
    result = inject(images, recipe, args.lenses, out=out, bands=bands, psf=_per_band_option(args.psf, "--psf", str),
                    gain=_per_band_option(args.gain, "--gain", float),
                    zero_point=_per_band_option(args.zero_point, "--zero-point", float),
                    full_image=args.full_image, overwrite=args.overwrite)
    print(f"injected {len(result.truth)} lensed sources into copies of the images of band(s) "
          f"{result.truth.meta['bands'].replace(',', ', ')}; wrote {out}")
    for f in result.files:
        print(f"  {f}")
    return 0


def _per_band_option(text, option, kind):
    """An option's value for every band (``2.5``) or per band (``g=2.5,r=2.4``)."""
    if text is None:
        return None
    if "=" not in text:
        return _option_value(text, option, kind)
    values = {}
    for item in text.split(","):
        band, sep, value = item.partition("=")
        if not sep or not band.strip():
            raise SimlensError(f"{option} {text!r}: give one value, or band=value pairs separated by commas")
        values[band.strip()] = _option_value(value.strip(), option, kind)
    return values


def _option_value(text, option, kind):
    try:
        return kind(text)
    except ValueError:
        raise SimlensError(f"{option}: {text!r} is not a number") from None


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="simlens", description="Synthetic survey cutouts of strong gravitational lenses.")
    parser.add_argument("--version", action="version", version=f"simlens {__version__}")
    parser.add_argument("--debug", action="store_true", help="show the Python traceback of an error")
    verbs = parser.add_subparsers(dest="verb", required=True, metavar="{make,check,verify,inject,score,gallery,forecast}")

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
    make.add_argument("--no-resource-check", action="store_true",
                      help="start even where the memory or disk estimate exceeds what this machine has free")
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

    inj = verbs.add_parser("inject", help="add lensed sources behind real galaxies of a FITS image (a copy)")
    inj.add_argument("images", nargs="+", metavar="IMAGE",
                     help="FITS image(s) with a celestial WCS: one per band, or one file holding every band "
                          "(HDUs named after the bands); variance/weight and mask planes beside them are updated")
    inj.add_argument("--recipe", required=True, help="recipe for the sources (and the default PSF)")
    inj.add_argument("--lenses", required=True, help="catalogue: ra, dec, z_lens, velocity_dispersion "
                                                     "[, mass_q, mass_angle] (CSV, ECSV or FITS), or 'auto' "
                                                     "to select bright early-type-like galaxies in the image")
    inj.add_argument("--psf", help="PSF image (odd sides, the image's pixels), or 'stars' for an empirical PSF "
                                   "from the image's own stars (default: the recipe band's PSF); per band "
                                   "as g=PSF_g.fits,r=stars")
    inj.add_argument("--out", help="output folder (default: outputs/inject_<image stem>)")
    inj.add_argument("--bands", "--band", help="recipe bands of the images, comma-separated, in their order "
                                               "(default: the reference band)")
    inj.add_argument("--gain", help="electrons per image unit, or per band as g=4,r=3.8 (default: header GAIN)")
    inj.add_argument("--zero-point", help="AB magnitude of one image unit, or per band (default: header MAGZERO)")
    inj.add_argument("--seed", type=int, help="random seed (overrides the recipe's)")
    inj.add_argument("--full-image", action="store_true", help="also write the whole injected and added-flux images")
    inj.add_argument("--overwrite", action="store_true", help="write into a non-empty output folder")
    inj.set_defaults(func=_inject)

    score = verbs.add_parser("score", help="completeness, purity and ROC of a finder's scores against a run's truth")
    score.add_argument("run_dir", help="finished run folder")
    score.add_argument("scores", help="table of system_id, score (CSV, ECSV or FITS); higher = more lens-like. "
                                      "For a field run: detections with field_id, x_pixel and y_pixel "
                                      "(or ra and dec) and score")
    which = score.add_mutually_exclusive_group(required=True)
    which.add_argument("--threshold", type=float, help="score threshold: systems at or above it are found")
    which.add_argument("--fpr", type=float, help="choose the threshold giving this false-positive rate")
    which.add_argument("--fp-density", type=float, metavar="PER_DEG2",
                       help="field runs: choose the threshold giving at most this many false positives per deg^2")
    score.add_argument("--match-radius", type=float, default=3.0, metavar="ARCSEC",
                       help="field runs: a detection within this distance of a lens finds it (default 3)")
    score.add_argument("--by", nargs="+", metavar="COLUMN",
                       help="truth columns for completeness (default: Einstein radius, source magnitude, arc S/N, "
                            "seeing, lens magnitude in the reference band)")
    score.add_argument("--pair", nargs=2, metavar=("X", "Y"), help="two truth columns for a 2D completeness map")
    score.add_argument("--bins", type=int, default=6, help="quantile bins per column (default 6)")
    score.add_argument("--name", default="finder", help="output folder RUN_DIR/scores/NAME (default: finder)")
    score.add_argument("--no-plots", action="store_true", help="tables only")
    score.set_defaults(func=_score)

    fc = verbs.add_parser("forecast", help="how many detectable lenses the recipe's populations give per deg^2")
    fc.add_argument("recipe", help="recipe with [lens.population] and [source.counts] (drawn in sky mode)")
    fc.add_argument("--area", type=float, default=1.0, help="survey area in deg^2 (default 1)")
    fc.add_argument("--n", type=int, default=20000, help="deflector galaxies to draw (default 20000)")
    fc.add_argument("--rules", default="collett2015",
                    choices=("collett2015", "collett2015_matched", "selection", "multiply_imaged", "om10_supernova",
                             "om10_quasar"),
                    help="detectability: Collett (2015)'s rule set (or with the matched-filter S/N), the recipe's "
                         "own [selection] cuts, every multiply imaged source (the optical depth), or Oguri & "
                         "Marshall (2010)'s for lensed supernovae (source.supernova.rate) or quasars "
                         "(source.quasar.luminosity_function)")
    fc.add_argument("--seed", type=int, help="random seed (overrides the recipe's)")
    fc.add_argument("--out", help="output folder (default: outputs/forecast_<recipe name>)")
    fc.add_argument("--overwrite", action="store_true", help="replace an earlier forecast in --out")
    fc.add_argument("--quiet", action="store_true", help="no progress lines")
    fc.set_defaults(func=_forecast)

    gallery = verbs.add_parser("gallery", help="contact sheets of colour composites, and population plots")
    gallery.add_argument("run_dir", help="finished run folder")
    gallery.add_argument("--where", action="append", metavar="CUT",
                         help="truth cut 'COLUMN OP VALUE' (OP: < <= > >= == !=); repeat to combine")
    gallery.add_argument("--missed", metavar="SCORES", help="only the lenses this finder's scores missed")
    gallery.add_argument("--threshold", type=float, help="with --missed: the finder's score threshold")
    gallery.add_argument("--sort", metavar="COLUMN", help="order by this truth column (ascending)")
    gallery.add_argument("--descending", action="store_true", help="sort in descending order")
    gallery.add_argument("--n", type=int, default=36, help="at most this many systems (default 36)")
    gallery.add_argument("--bands", nargs=3, metavar=("RED", "GREEN", "BLUE"), help="bands for R, G, B")
    gallery.add_argument("--name", default="gallery", help="file stem in RUN_DIR/gallery/ (default: gallery)")
    gallery.add_argument("--panels", metavar="LIST",
                         help="comma-separated panels per system: observed, subtracted (minus the noiseless lens light), "
                              "source (the noiseless lensed source); default: all the run's planes allow")
    gallery.add_argument("--smooth", type=float, metavar="FWHM",
                         help="FWHM (arcsec) of the Gaussian smoothing the subtracted panel (default: the PSF's; 0: none)")
    gallery.add_argument("--stretch-scale", type=float, default=1.0,
                         help="multiply each panel's asinh linear range (below 1 shows fainter structure; default 1)")
    gallery.add_argument("--q", type=float, help="asinh softening Q for every panel (default: 8 observed, 3 subtracted, "
                                                 "8 source)")
    gallery.add_argument("--population", action="store_true", help="also plot the population's distributions")
    gallery.add_argument("--epochs", action="store_true",
                         help="a run with epochs: strips of difference images over each system's light curves "
                              "(instead of colour composites)")
    gallery.set_defaults(func=_gallery)
    return parser


def _show_warning(message, category, filename, lineno, file=None, line=None):
    """simlens's own warnings as one plain line; any other warning as Python prints it."""
    if issubclass(category, SimlensWarning):
        print(f"simlens: warning: {message}", file=sys.stderr)
    else:
        _python_show_warning(message, category, filename, lineno, file, line)


_python_show_warning = warnings.showwarning


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        with warnings.catch_warnings():
            warnings.showwarning = _show_warning
            return args.func(args)
    except KeyboardInterrupt:
        print("simlens: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # the reader of our output went away (`simlens check ... | head`)
        try:
            sys.stdout = open(os.devnull, "w")
        except OSError:
            pass
        return 141
    except Exception as exc:  # every error is one line; --debug adds the traceback
        if args.debug:
            traceback.print_exc()
        print(f"simlens: error: {_one_line(exc)}", file=sys.stderr)
        return 2 if isinstance(exc, SimlensError) and not isinstance(exc, RunError) else 1


def _one_line(exc: BaseException) -> str:
    """The message of ``exc`` as one line of bounded length; an error that is not simlens's own
    says it is one and points to --debug."""
    if isinstance(exc, SimlensError):
        return clip(" ".join(str(exc).split()), 600)
    if isinstance(exc, MemoryError):
        return OUT_OF_MEMORY
    if isinstance(exc, OSError) and exc.strerror:
        where = f"{clip(exc.filename, 200)}: " if exc.filename else ""
        return f"{where}{exc.strerror}"
    text = clip(" ".join(str(exc).split()), 200)
    return f"unexpected {type(exc).__name__}: {text} (an error inside simlens; run with --debug for the traceback)"


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

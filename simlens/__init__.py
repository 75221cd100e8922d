"""simlens: synthetic multi-band survey cutouts of galaxy-scale strong gravitational lenses.

The pipeline, one package a stage (DEVELOPERS.md has the full map)::

    recipe/        TOML recipe -> validated, frozen settings (Recipe)
    populations/   velocity function, scaling relations, photometry, galaxies, negatives, background
    truth/         the truth record (System), the array sampler, selection cuts, random streams
    lensing/       mass models and their registry, multi-plane, caustics, the lens equation
    imaging/       System -> Scene -> rays -> ObservedBand (GalSim PSF, pixel, sky, CCD noise)
    output/        the truth schema, shard files, FITS cutouts with WCS, catalogues, manifests
    runs/          a whole run: shards, fields, engines (processes, Dask), run folder, loader
    scoring/       a finder's completeness, purity and ROC, on cutouts and on fields
    cli.py, injection.py (lensed sources in a user's image), gallery.py (contact sheets)

Five lines::

    import simlens
    recipe = simlens.load_recipe("recipes/demo.toml")
    system = simlens.PopulationSampler(recipe).draw(0)
    rendered = simlens.render_system(system, recipe.survey, recipe.reference_band)
    image = rendered.band("r").image
"""

from importlib import import_module

from .version import __version__
from .errors import RecipeError, SimlensError

# The public names and the modules that define them.  They load on first use, so that `import
# simlens` (and the command line) costs nothing until a stage is needed.
_PUBLIC = {
    "Recipe": ".recipe", "load_recipe": ".recipe", "parse_recipe": ".recipe",
    "PopulationSampler": ".truth.sampler", "System": ".truth.record",
    "render_system": ".imaging.render", "RenderedSystem": ".imaging.render",
    "run": ".runs.pipeline", "iter_batches": ".runs.loader", "verify_run": ".runs.run_folder",
    "score_run": ".scoring.cutouts",
}
_SUBPACKAGES = ("recipe", "populations", "truth", "lensing", "imaging", "output", "runs", "scoring",
                "mass", "cosmology", "injection", "gallery", "user_tables", "cli")

__all__ = ["__version__", "SimlensError", "RecipeError", *_PUBLIC]


def __getattr__(name: str):
    if name in _PUBLIC:
        value = getattr(import_module(_PUBLIC[name], __name__), name)
    elif name in _SUBPACKAGES:
        value = import_module(f".{name}", __name__)
    else:
        raise AttributeError(f"module 'simlens' has no attribute {name!r}")
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(_PUBLIC) | set(_SUBPACKAGES))

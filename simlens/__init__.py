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

from .version import __version__

from .errors import RecipeError, SimlensError
from .runs.pipeline import run
from .truth.record import System
from .truth.sampler import PopulationSampler
from .recipe import Recipe, load_recipe, parse_recipe
from .imaging.render import RenderedSystem, render_system
from .runs.loader import iter_batches
from .runs.run_folder import verify_run
from .scoring.cutouts import score_run

__all__ = ["__version__", "SimlensError", "RecipeError", "Recipe", "load_recipe", "parse_recipe",
           "PopulationSampler", "System", "render_system", "RenderedSystem", "run", "iter_batches", "verify_run",
           "score_run"]

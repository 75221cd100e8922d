"""simlens: synthetic multi-band survey cutouts of galaxy-scale strong gravitational lenses.

The pipeline, one module a stage::

    recipe.py      TOML recipe -> validated, frozen settings (Recipe)
    population.py  Recipe + system_id -> System (the truth, plain numbers); uses distances.py,
                   velocity_function.py, scaling_relations.py, photometry.py, galaxies.py,
                   caustics.py and negatives.py
    selection.py   candidates redrawn until the selection cuts pass; attrition
    mass/          deflectors (SIS, SIE, power law, cored, NFW, Sersic, multipoles, subhalos, ...)
    light.py       surface brightness (Sersic, rings, spiral arms, point sources, sums)
    raytrace.py    System -> Scene per band (ray map once, lensed source + lens light)
    observe.py     Scene -> ObservedBand (GalSim PSF, pixel, sky, CCD noise)
    render.py      System -> RenderedSystem (all bands + measured truth)
    shard.py       a block of systems rendered and written as one unit of work
    engines.py     where shards run: this process, worker processes, Dask
    run_folder.py  manifest, resume, verify
    output/        shard files, per-system FITS cutouts with WCS, truth catalogue
    pipeline.py    a whole run into a folder
    loader.py      (images, truth) batches from a run, for training
    scoring.py     a finder's completeness, purity and ROC against a run's truth
    gallery.py     contact sheets and population plots

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

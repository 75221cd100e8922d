"""One system from truth to observed images: the middle of the pipeline.

``render_system(system, survey)`` traces the rays once, renders every band's scene, runs the GalSim
stage and measures the truth that needs images (magnification, number of images, arc S/N).  It is a
pure function of the System, so any system can be re-rendered alone, identically.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

from .lens_equation import ImageSet, find_images
from .observe import ObservedBand, observe_scene, padding_for
from .population import System
from .raytrace import ComponentImages, PixelGrid, render_scene, trace_rays
from .recipe import SurveySettings

__all__ = ["RenderedSystem", "render_system", "pixel_grid_for"]


@dataclass(frozen=True)
class RenderedSystem:
    system: System
    grid: PixelGrid
    bands: tuple  # of ObservedBand, in survey order
    magnification: float  # extended-source magnification in the reference band
    images: ImageSet  # images of the source centre within the padded field
    timings: dict = field(default_factory=dict, compare=False)

    def band(self, name: str) -> ObservedBand:
        for b in self.bands:
            if b.band.name == name:
                return b
        raise KeyError(name)


def pixel_grid_for(system: System, survey: SurveySettings) -> PixelGrid:
    fwhm_max = max(b.psf_fwhm for b in system.bands)
    return PixelGrid(size=survey.cutout_size, pixel_scale=survey.pixel_scale,
                     supersampling=survey.supersampling, padding=padding_for(fwhm_max, survey.pixel_scale))


def image_search_windows(system: System, grid: PixelGrid) -> list[tuple[float, float]]:
    """A coarse mesh over the padded field and a fine one around the Einstein ring."""
    coarse = (grid.half_width, grid.pixel_scale / 2.0)
    reach = 2.5 * system.einstein_radius / math.sqrt(system.mass_q) + math.hypot(system.source_x, system.source_y)
    reach = min(reach, grid.half_width)
    return [coarse, (reach, reach / 100.0)]


def render_system(system: System, survey: SurveySettings, reference_band: str) -> RenderedSystem:
    timings = {}
    t0 = time.perf_counter()
    grid = pixel_grid_for(system, survey)
    mass = system.mass_model()
    rays = trace_rays(mass, grid)
    t1 = time.perf_counter()
    timings["ray_tracing"] = t1 - t0

    observed, magnification = [], math.nan
    components = ComponentImages(rays)  # shapes are achromatic: evaluate each once for all bands
    t_scene = t_observe = 0.0
    for conditions, seed in zip(system.bands, system.noise_seeds):
        ta = time.perf_counter()
        scene = render_scene(conditions.name, rays, system.lens_light(conditions.name),
                             system.source_light(conditions.name), components)
        tb = time.perf_counter()
        observed.append(observe_scene(scene, conditions, seed))
        tc = time.perf_counter()
        t_scene += tb - ta
        t_observe += tc - tb
        if conditions.name == reference_band:
            magnification = scene.magnification
    timings["scene"] = t_scene
    timings["galsim_stage"] = t_observe

    t2 = time.perf_counter()
    images = find_images(mass, system.source_x, system.source_y, image_search_windows(system, grid))
    timings["image_finding"] = time.perf_counter() - t2
    return RenderedSystem(system=system, grid=grid, bands=tuple(observed), magnification=magnification,
                          images=images, timings=timings)

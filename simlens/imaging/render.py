"""One system from truth to observed images: the middle of the pipeline.

``render_system(system, survey)`` traces the rays once, renders every band's scene, runs the GalSim
stage and measures the truth that needs images (magnification, number of images, arc S/N).  It is a
pure function of the System, so any system can be re-rendered alone, identically.
"""

from __future__ import annotations

import dataclasses
import math
import time
from dataclasses import dataclass, field

import numpy as np

from ..lensing.lens_equation import ImageSet, find_images, time_delays
from .light import PointSource
from .observe import ObservedBand, convolution_sampling, observe_scene, padding_for
from ..truth.sampler import System
from .rays import ComponentImages, PixelGrid, render_scene, trace_rays
from ..recipe import SurveySettings

__all__ = ["RenderedSystem", "render_system", "pixel_grid_for"]


@dataclass(frozen=True)
class RenderedSystem:
    system: System
    grid: PixelGrid
    bands: tuple  # of ObservedBand, in survey order
    magnification: float  # extended-source magnification in the reference band
    images: ImageSet  # images of the source centre within the cutout
    second_magnification: float = math.nan  # of the second source (reference band), if any
    time_delays: np.ndarray = field(default_factory=lambda: np.empty(0), compare=False)  # days after the first image
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


# Rays at full supersampling reach this many PSF FWHM beyond the cutout; farther out (in the padding)
# light only enters the cutout through the PSF's wings and is traced at the PSF stage's sampling.
FULL_RESOLUTION_MARGIN_IN_FWHM = 1.0


def observation_rays(mass, grid: PixelGrid, fwhm_max: float):
    """The ray map a system is rendered with, and the sampling of its scenes (see raytrace.py)."""
    sampling = convolution_sampling(grid.supersampling)
    margin = int(math.ceil(FULL_RESOLUTION_MARGIN_IN_FWHM * fwhm_max / grid.pixel_scale))
    if sampling == grid.supersampling:
        return trace_rays(mass, grid), sampling
    return trace_rays(mass, grid, outer_sampling=sampling, margin=margin), sampling


# Nested meshes around the singular centre (half-sizes in Einstein radii, 50 steps each): as a
# source nears the cut of an isothermal lens its inner image approaches the centre.  A mesh finds
# images reliably from about 0.1 to 1 times its half-size (five cells or more from the singularity),
# so these cover 2e-4 to 0.2 theta_E and the ring mesh the rest; image counts then do not change
# when finer meshes are added (tests/test_lensing.py).
CENTRAL_WINDOWS = (0.2, 0.02, 0.002)


def image_search_windows(einstein_radius: float, q: float, source_offset: float,
                         grid: PixelGrid) -> list[tuple[float, float]]:
    """Meshes for :func:`simlens.lens_equation.find_images`, all within the cutout: a coarse one over
    the cutout, a fine one around the Einstein ring, and nested ones around the centre."""
    half = 0.5 * grid.size * grid.pixel_scale
    if einstein_radius <= 0:  # no deflection (a source in front of the lens): the source itself
        return [(half, grid.pixel_scale)]
    reach = min(2.5 * einstein_radius / math.sqrt(q) + source_offset, half)
    windows = [(half, grid.pixel_scale), (reach, reach / 100.0)]
    windows += [(min(f * einstein_radius, half), min(f * einstein_radius, half) / 50.0) for f in CENTRAL_WINDOWS]
    return windows


def render_system(system: System, survey: SurveySettings, reference_band: str) -> RenderedSystem:
    timings = {}
    t0 = time.perf_counter()
    grid = pixel_grid_for(system, survey)
    mass = system.mass_model()
    rays, sampling = observation_rays(mass, grid, max(b.psf_fwhm for b in system.bands))
    t1 = time.perf_counter()
    timings["ray_tracing"] = t1 - t0

    # Images of the source centre first: a point source (quasar) is drawn at them.
    windows = image_search_windows(system.einstein_radius, system.mass_q,
                                   math.hypot(system.source_x, system.source_y), grid)
    images = find_images(mass, system.source_x, system.source_y, windows)
    if system.line_of_sight:  # multi-plane: no single Fermat potential (not computed)
        delays = np.full(len(images), math.nan)
    elif math.isfinite(system.days_per_arcsec2):
        delays = time_delays(mass, images, system.source_x, system.source_y, system.days_per_arcsec2)
    else:
        delays = np.zeros(len(images))
    t_images = time.perf_counter()
    timings["image_finding"] = t_images - t1

    observed, magnification = [], math.nan
    # Shapes are achromatic: evaluate each once for all bands, on the PSF stage's grid.
    components = ComponentImages(rays, sampling=sampling, adaptive=survey.adaptive_supersampling)
    components.prepare_lensed(system.source_light(reference_band))  # refine where the whole source needs it
    second = None
    if system.second_source is not None:  # its own ray map, through its own deflectors
        rays2, sampling2 = observation_rays(system.second_source_mass(), grid, max(b.psf_fwhm for b in system.bands))
        second = ComponentImages(rays2, sampling=sampling2, adaptive=survey.adaptive_supersampling)
        second.prepare_lensed(system.second_source_light(reference_band))
    second_magnification = math.nan
    timings["adaptive_refinement"] = time.perf_counter() - t_images
    t_scene = t_observe = 0.0
    for conditions, seed in zip(system.bands, system.noise_seeds):
        ta = time.perf_counter()
        points = ()
        if system.quasar_magnitudes is not None:
            flux = system.quasar_flux(conditions.name)
            points = tuple(PointSource(flux=flux * abs(float(mu)), center=(float(x), float(y)))
                           for x, y, mu in zip(images.x, images.y, images.magnification))
        scene = render_scene(conditions.name, rays, system.lens_light(conditions.name),
                             system.source_light(conditions.name), components, lensed_points=points)
        if conditions.name == reference_band:
            magnification = scene.magnification  # of the first source alone
        if second is not None:
            light2 = system.second_source_light(conditions.name)
            lensed2 = second.render(light2, lensed=True)
            if conditions.name == reference_band and light2.flux > 0:
                second_magnification = float(lensed2.sum()) / light2.flux
            scene = dataclasses.replace(scene, lensed_source=scene.lensed_source + lensed2)
        tb = time.perf_counter()
        observed.append(observe_scene(scene, conditions, seed))
        tc = time.perf_counter()
        t_scene += tb - ta
        t_observe += tc - tb
    timings["scene"] = t_scene
    timings["galsim_stage"] = t_observe
    return RenderedSystem(system=system, grid=grid, bands=tuple(observed), magnification=magnification,
                          images=images, second_magnification=second_magnification, time_delays=delays,
                          timings=timings)

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
from .many_objects import draw_objects
from .observe import ObservedBand, convolution_sampling, major_axis_fwhm, observe_scene, padding_for
from ..truth.record import System
from .scene import build_scene
from .rays import ComponentImages, PixelGrid, render_scene, trace_rays
from ..recipe import SurveySettings

__all__ = ["RenderedSystem", "SystemRendering", "render_system", "pixel_grid_for"]


@dataclass(frozen=True)
class RenderedSystem:
    """A system's observed images and the truth measured on them: what the truth catalogue and
    the FITS writers take.  ``bands`` holds one :class:`~simlens.imaging.observe.ObservedBand` per
    band (the noisy image, the noiseless lens light and lensed source, the PSF and the arc S/N);
    ``images`` the images of the source centre (positions, signed magnifications), with
    ``time_delays`` in days after the first."""

    system: System
    grid: PixelGrid
    bands: tuple  # of ObservedBand, in survey order
    magnification: float  # extended-source magnification in the reference band
    images: ImageSet  # images of the source centre within the cutout
    second_magnification: float = math.nan  # of the second source (reference band), if any
    time_delays: np.ndarray = field(default_factory=lambda: np.empty(0), compare=False)  # days after the first image
    timings: dict = field(default_factory=dict, compare=False)
    epochs: object = field(default=None, compare=False)  # imaging.epochs.EpochImages of a run with epochs

    def band(self, name: str) -> ObservedBand:
        for b in self.bands:
            if b.band.name == name:
                return b
        raise KeyError(name)


def pixel_grid_for(system: System, survey: SurveySettings, widest_fwhm: float = 0.0) -> PixelGrid:
    """The system's padded pixel grid: its padding holds the PSF stamp of the widest of its bands'
    PSFs and ``widest_fwhm`` (the widest PSF of a run's epochs)."""
    fwhm_max = max([major_axis_fwhm(b) for b in system.bands] + [widest_fwhm])
    return PixelGrid(size=survey.cutout_size, pixel_scale=survey.pixel_scale,
                     supersampling=survey.supersampling, padding=padding_for(fwhm_max, survey.pixel_scale))


def observation_rays(mass, grid: PixelGrid):
    """The ray map a system is rendered with, one ray per pixel (see
    :class:`~simlens.imaging.rays.ComponentImages` for where more rays are traced), and the
    sampling of its scenes, the PSF stage's."""
    return trace_rays(mass, grid, 1), convolution_sampling(grid.supersampling)


# Nested meshes around the singular centre (half-sizes in Einstein radii, 50 steps each): as a
# source nears the cut of an isothermal lens its inner image approaches the centre.  A mesh finds
# images reliably from about 0.1 to 1 times its half-size (five cells or more from the singularity),
# so these cover 2e-4 to 0.2 theta_E and the ring mesh the rest; image counts then do not change
# when finer meshes are added (tests/test_lensing.py).
CENTRAL_WINDOWS = (0.2, 0.02, 0.002)


def image_search_windows(einstein_radius: float, q: float, source_offset: float,
                         grid: PixelGrid, whole_cutout: bool = True) -> list[tuple[float, float]]:
    """Meshes for :func:`simlens.lens_equation.find_images`, all within the cutout: a coarse one over
    the cutout (``whole_cutout``: where images may form far from the main lens, as near
    line-of-sight galaxies), a fine one over the reach of the main lens's images (2.5 theta_E /
    sqrt(q) beyond the source's offset), and nested ones around the centre."""
    half = 0.5 * grid.size * grid.pixel_scale
    if einstein_radius <= 0:  # no deflection (a source in front of the lens): the source itself
        return [(half, grid.pixel_scale)]
    reach = min(2.5 * einstein_radius / math.sqrt(q) + source_offset, half)
    windows = ([(half, grid.pixel_scale)] if whole_cutout or reach >= half else []) + [(reach, reach / 100.0)]
    windows += [(min(f * einstein_radius, half), min(f * einstein_radius, half) / 50.0) for f in CENTRAL_WINDOWS]
    return windows


def render_system(system: System, survey: SurveySettings, reference_band: str) -> RenderedSystem:
    """The observed images of ``system`` in every band of ``survey``, with the truth that needs
    images (the extended-source magnification and the second source's, in ``reference_band``; the
    images of the source centre and their time delays).  A pure function of its arguments: the
    noise of each band comes from the system's own noise seeds."""
    return SystemRendering(system, survey, reference_band).render()


class SystemRendering:
    """One system rendered band by band: the rays are traced and the source's shape refined once
    (on construction), the images of the source centre found once when first needed; :meth:`render`
    then observes the bands asked for, each once.  Cuts on images can so be judged on the bands they need before the
    others are rendered (:mod:`simlens.runs.rendering`)."""

    def __init__(self, system: System, survey: SurveySettings, reference_band: str, widest_fwhm: float = 0.0):
        self.system, self.survey, self.reference_band = system, survey, reference_band
        self.timings = dict.fromkeys(("ray_tracing", "image_finding", "adaptive_refinement", "scene",
                                      "galsim_stage"), 0.0)
        t0 = time.perf_counter()
        self.grid = pixel_grid_for(system, survey, widest_fwhm)
        self.scene = scene = build_scene(system)
        self.mass = scene.deflector
        self.rays, sampling = observation_rays(self.mass, self.grid)
        t1 = time.perf_counter()
        self.timings["ray_tracing"] = t1 - t0

        self._images = None
        self.delays = None
        t2 = time.perf_counter()

        # Shapes are achromatic: evaluate each once for all bands, on the PSF stage's grid.
        self.components = ComponentImages(self.rays, sampling=sampling, adaptive=survey.adaptive_supersampling)
        self.components.prepare_lensed(scene.source_light[reference_band])  # refine where the whole source needs it
        self.second = None
        if system.second_source is not None:  # its own ray map, through its own deflectors
            rays2, sampling2 = observation_rays(scene.second_deflector, self.grid)
            self.second = ComponentImages(rays2, sampling=sampling2, adaptive=survey.adaptive_supersampling)
            self.second.prepare_lensed(scene.second_source_light[reference_band])
        self.timings["adaptive_refinement"] = time.perf_counter() - t2
        self.observed: dict[str, ObservedBand] = {}
        self.magnification = self.second_magnification = math.nan
        self._neighbours = None

    @property
    def images(self) -> ImageSet:
        """The images of the source centre within the cutout and their time delays (found on first use)."""
        if self._images is None:
            t0 = time.perf_counter()
            system = self.system
            windows = image_search_windows(system.einstein_radius, system.mass_q,
                                           math.hypot(system.source_x, system.source_y), self.grid,
                                           whole_cutout=bool(system.line_of_sight))
            self._images = find_images(self.mass, system.source_x, system.source_y, windows)
            if system.line_of_sight:  # multi-plane: no single Fermat potential (not computed)
                self.delays = np.full(len(self._images), math.nan)
            elif math.isfinite(system.days_per_arcsec2):
                self.delays = time_delays(self.mass, self._images, system.source_x, system.source_y,
                                          system.days_per_arcsec2)
            else:
                self.delays = np.zeros(len(self._images))
            self.timings["image_finding"] += time.perf_counter() - t0
        return self._images

    def band_scene(self, name: str, points: bool = True):
        """The band's noiseless scene on the ray grid (:class:`~simlens.imaging.rays.Scene`): lens
        light, lensed source and any second source, with the images of a quasar unless ``points``
        is False (the static scene of :mod:`simlens.imaging.epochs`)."""
        system = self.system
        lensed_points = ()
        if points and system.quasar_magnitudes is not None:
            flux = self.scene.point_flux[name]
            lensed_points = tuple(PointSource(flux=flux * abs(float(mu)), center=(float(x), float(y)))
                                  for x, y, mu in zip(self.images.x, self.images.y, self.images.magnification))
        scene = render_scene(name, self.rays, self.scene.lens_light[name], self.scene.source_light[name], self.components,
                             lensed_points=lensed_points)
        if name == self.reference_band:
            self.magnification = scene.magnification  # of the first source alone
        if self.second is not None:
            light2 = self.scene.second_source_light[name]
            lensed2 = self.second.render(light2, lensed=True)
            if name == self.reference_band and light2.flux > 0:
                self.second_magnification = float(lensed2.sum()) / light2.flux
            scene = dataclasses.replace(scene, lensed_source=scene.lensed_source + lensed2)
        return scene

    def _observe(self, conditions, seed: int) -> ObservedBand:
        name = conditions.name
        ta = time.perf_counter()
        scene = self.band_scene(name)
        neighbours = self.neighbour_images()
        tb = time.perf_counter()
        observed = observe_scene(scene, conditions, seed, neighbours=neighbours.get(name))
        self.timings["scene"] += tb - ta
        self.timings["galsim_stage"] += time.perf_counter() - tb
        return observed

    def neighbour_images(self) -> dict:
        """``band -> noiseless image`` of the system's neighbours (crowded cutouts), drawn for all
        bands together on first use; empty without neighbours."""
        if self._neighbours is None:
            objects = self.system.neighbours
            self._neighbours = {}
            if objects is not None and len(objects):
                images = draw_objects(objects, self.system.bands, self.grid.size, self.grid.pixel_scale)
                self._neighbours = {b.name: image for b, image in zip(self.system.bands, images)}
        return self._neighbours

    def render(self, band_names=None, images: bool = True) -> RenderedSystem:
        """The system with the bands ``band_names`` (default: all) observed, besides any observed
        before; the bands of the result are those observed so far, in survey order.  ``images =
        False`` leaves the images of the source centre unfound where no band needs them (the
        result's ``images`` and ``time_delays`` are then None)."""
        wanted = set(band_names) if band_names is not None else {b.name for b in self.system.bands}
        for conditions, seed in zip(self.system.bands, self.system.noise_seeds):
            if conditions.name in wanted and conditions.name not in self.observed:
                self.observed[conditions.name] = self._observe(conditions, seed)
        bands = tuple(self.observed[b.name] for b in self.system.bands if b.name in self.observed)
        found = self.images if images else self._images
        return RenderedSystem(system=self.system, grid=self.grid, bands=bands, magnification=self.magnification,
                              images=found, second_magnification=self.second_magnification,
                              time_delays=self.delays, timings=dict(self.timings))

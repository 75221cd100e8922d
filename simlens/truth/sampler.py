"""Drawing systems: one :class:`~simlens.truth.record.System` per ``system_id`` from a recipe.

Drawing is deterministic in ``(recipe.seed, system_id)``: every system draws from its own streams
(:mod:`simlens.truth.streams`), always with the same calls in the same order, so
``PopulationSampler(recipe).draw(i)`` gives the same system whichever process asks, whatever it
drew before and however many systems it draws at once.

There is one implementation, array-first: :meth:`PopulationSampler.draw_many` takes the pending
candidates of many systems together, and the arithmetic between their draws runs on arrays (the
parameters, the deflector and source batches, distance ratios and Einstein radii, the closed-form
caustics of SIE + shear lenses, the placement tries and the selection cuts).  What has no array
form -- subhalos, line-of-sight galaxies, the stars-and-halo model, caustics found by the scan --
is a per-row step inside the same loop.  ``draw(i)`` is ``draw_many([i])[0]``.

A system is drawn as a sequence of *candidates* (``candidate = 0, 1, ...``, each from its own
streams).  The first candidate that passes every enforced cut is kept; cuts on images
(magnification, image count, arc S/N) are judged by the ``image_cuts`` callable of
:meth:`~PopulationSampler.draw_many`, within the same count of ``selection.max_candidates``.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from pathlib import Path
from types import SimpleNamespace
from typing import Callable, Mapping, Sequence

import numpy as np

from ..cosmology import ARCSEC_PER_RADIAN, DistanceTable, sis_einstein_radius
from ..errors import RunError, SimlensError
from ..lensing.lens_models import LENS_MODELS, TRUTH_DEFAULTS, build_deflector, multi_plane
from ..lensing.caustics import CUT_ANGLES, _UNIT_CIRCLE, find_caustics, inside_polygon, isothermal_caustics, polygon_area
from ..lensing.mass.base import isothermal_hessian, rotate_back
from ..lensing.mass.isothermal import sie_convergence_in_frame, sie_deflection_in_frame
from ..lensing.mass.sheets import shear_components
from ..lensing.stars_and_halo import critical_density_arcsec2, stars_and_halo
from ..imaging.light import ImageLight
from ..populations.background import BackgroundModel
from ..populations.scaling_relations import SUN_ABSOLUTE_MAGNITUDE_R, SizeLuminosity, StellarToHaloMass
from ..populations.stamps import load_stamps
from ..populations.galaxies import (LensLightModel, PointSourceColours, SourceModel, core_half_light_radius,
                                    split_core_and_envelope)
from ..populations.negatives import lookalike_light
from ..populations.velocity_function import VELOCITY_FUNCTIONS, DeflectorPopulation
from ..recipe import Recipe
from ..recipe.distributions import Fixed, Grid
from .conditions import BandConditions
from .record import Clump, LensEnvelope, LineOfSightGalaxy, SecondSource, Subhalo, System
from .psf import band_fwhm, band_optics, major_axis_fwhm, padding_for, psf_shear, seeing_factors
from .streams import SYSTEM_STREAMS, grid_cell, system_streams_many
from ..populations.photometry import load_filter
from ..transients.cadence import survey_epochs
from ..transients.supernova import BandLightCurves, SpectralTimeSeries, SupernovaModel, stretched_peak_magnitude
from ..populations.quasars import QUASAR_LUMINOSITY_FUNCTIONS, QuasarPopulation
from ..transients.rates import SUPERNOVA_RATES, SupernovaPopulation
from ..transients.variability import MACLEOD_SF_INF, MACLEOD_TAU, DampedRandomWalk

QUASAR_I_WAVELENGTH_NM = 750.0  # the rest wavelength of M_i in the variability relations (SDSS i, about)

__all__ = ["PopulationSampler", "SelectionExhausted", "System", "offset_on_sky"]


class SelectionExhausted(RunError):
    """No candidate of a system passed the selection within ``selection.max_candidates``."""


ImageCuts = Callable[[System], Mapping[str, bool]]


class PopulationSampler:
    """Draws :class:`System` objects from a recipe.

    >>> sampler = PopulationSampler(recipe)
    >>> system = sampler.draw(7)                 # identical every time, in any process
    >>> systems = sampler.draw_many(range(1000))  # the same systems as draw(i), drawn together
    """

    BLOCK_SIZE = 4096  # systems drawn together (the caustics of a block are arrays)
    GEOMETRY_BATCH = 64  # (deflector, source) pairs drawn at once in lens mode
    GEOMETRY_BATCHES = 64  # batches per candidate before it counts as rejected
    TRIES_PER_CANDIDATE = 64  # deflectors tried (sharing the candidate's streams) before rejection
    LENS_MODE_PLACEMENT_TRIES = 1000  # source places tried behind an explicit-distribution deflector

    def __init__(self, recipe: Recipe, conditions: tuple | None = None,
                 given: Mapping[int, Mapping[str, float]] | None = None):
        """``conditions``: BandConditions (survey order) that every system takes instead of its
        own draw -- the one set of seeing, sky and depth of a field image.  ``given``: per system
        id, values of recipe key paths that replace the drawn ones (the catalogued deflectors of
        an injection); the uniforms are drawn all the same, so the other draws do not move."""
        self.recipe = recipe
        self.conditions = conditions
        self.given = {int(i): dict(v) for i, v in (given or {}).items()}
        self.cosmology = recipe.cosmology.build()
        self.distances = DistanceTable(self.cosmology)
        self._parameters = list(recipe.parameters())
        # one uniform per parameter (fixed ones included, so adding a distribution to one parameter
        # leaves the others' draws unchanged)
        self._fixed_values = {path: float(p.value) for path, p in self._parameters if isinstance(p, Fixed)}
        self._grid_parameters = [(path, p) for path, p in self._parameters if isinstance(p, Grid)]
        self._random_parameters = [(i, path, p) for i, (path, p) in enumerate(self._parameters)
                                   if not isinstance(p, (Fixed, Grid))]
        self._grid_shape = recipe.grid_shape
        # (band, ((BandConditions field, parameter key path), ...)) for the conditions of each system
        # (with [survey.seeing] the FWHM comes from simlens.truth.psf instead of psf.fwhm)
        own = ("zero_point", "sky_brightness", "exposure_time", "gain", "read_noise") + (
            () if recipe.survey.seeing is not None else ("psf.fwhm",)) + ("psf.beta",)
        self._band_keys = [(b, tuple((path.replace("psf.", "psf_"), f"survey.bands.{b.name}.{path}") for path in own))
                           for b in recipe.survey.bands]
        self._seeing_factors = seeing_factors(recipe)
        self._optics = band_optics(recipe)
        self._neighbours = (BackgroundModel(recipe, self.distances, recipe.neighbours, recipe.survey.cutout_size)
                            if recipe.neighbours is not None else None)
        base = str(Path(recipe.origin).parent) if recipe.origin != "<recipe>" else "."
        stamps = recipe.source.stamps
        self._stamps = (load_stamps(str(Path(base) / stamps.catalogue), stamps.format, stamps.psf_fwhm,
                                    stamps.deconvolve_to) if stamps is not None else None)
        self._stamp_lights: dict = {}
        filters = {b.name: b.filter for b in recipe.survey.bands if b.filter is not None}
        lens, source = recipe.lens, recipe.source
        self.mode = source.position.mode or "fixed"
        self.deflectors = None
        if lens.population is not None:
            pop = lens.population
            # Lens mode draws the population of *lenses*: galaxies weighted by their cross-section,
            # sigma^4 exactly (here) and (D_ls/D_s)^2 by rejection (see _PairQueue).
            self.deflectors = DeflectorPopulation(
                VELOCITY_FUNCTIONS[pop.velocity_function], self.distances, pop.redshift_range,
                pop.velocity_dispersion_range, pop.density_evolution, pop.sigma_evolution,
                weight_power=4.0 if self.mode == "lens" else 0.0)
        self.lens_light_model = (LensLightModel(lens.light.scaling, self.distances, filters, base)
                                 if lens.light.scaling is not None else None)
        self.source_model = None
        if source.counts is not None:
            anchor = source.counts.band or recipe.reference_band
            self.source_model = SourceModel(source.counts, self.distances, filters, anchor,
                                            source.clumps.template, base,
                                            source.bulge.template if source.bulge is not None else None)
        self.quasar_colours = (PointSourceColours(source.quasar.spectral_index, filters, recipe.reference_band, base)
                               if source.quasar is not None else None)
        self.epochs = survey_epochs(recipe) if recipe.survey.cadence is not None else None
        self.supernovae = None
        if source.supernova is not None:
            settings = source.supernova
            spectra = (SpectralTimeSeries.from_file(Path(base) / settings.spectra) if settings.spectra is not None else
                       BandLightCurves.from_file(Path(base) / settings.light_curves, recipe.survey.band_names)
                       if settings.light_curves is not None else SpectralTimeSeries.simplified_ia())
            self.supernovae = SupernovaModel(spectra, {b: load_filter(f, base) for b, f in filters.items()})
        self.supernova_redshifts = None
        if source.supernova is not None and source.supernova.rate is not None:
            margin = source.supernova.peak_margin
            self.supernova_redshifts = SupernovaPopulation(
                SUPERNOVA_RATES[source.supernova.rate], self.distances, self.cosmology.h,
                source.supernova.redshift_range, self.epochs.span_days + 2.0 * margin)
        self.quasar_population = None
        if source.quasar is not None and source.quasar.luminosity_function is not None:
            q = source.quasar
            self.quasar_population = QuasarPopulation(
                QUASAR_LUMINOSITY_FUNCTIONS[q.luminosity_function], self.distances, self.cosmology.h, q.redshift_range,
                q.magnitude_range, load_filter(filters[recipe.reference_band], base).mean_wavelength, q.spectral_index)
        self._rest_wavelengths = ({b: load_filter(f, base).mean_wavelength for b, f in filters.items()}
                                  if source.quasar is not None and source.quasar.variability is not None else {})

    @property
    def n_grid_cells(self) -> int:
        return int(math.prod(self._grid_shape)) if self._grid_shape else 1

    @property
    def source_density(self) -> float:
        """Sky mode: sources per arcmin^2 (from source.position.density or the counts)."""
        density = self.recipe.source.position.density
        if density is not None:
            return density
        if self.supernova_redshifts is not None:
            return self.supernova_redshifts.sky_density
        if self.quasar_population is not None:
            return self.quasar_population.sky_density
        return self.source_model.sky_density if self.source_model is not None else math.nan

    # -- the public entry points ---------------------------------------------------------------
    def draw(self, system_id: int) -> System:
        """System ``system_id``: ``draw_many([system_id])[0]``."""
        return self.draw_many([system_id])[0]

    def draw_many(self, system_ids: Sequence[int], image_cuts: ImageCuts | None = None) -> list[System]:
        """The systems ``system_ids`` (in that order; repeated ids give the same system).

        ``image_cuts(system) -> {cut name: passed}`` judges the cuts that need images (the caller
        renders): with ``selection.enforce`` a lens that fails one is replaced by its next
        candidate; otherwise, and for negatives, the results only become ``selection_flags``.
        Raises :class:`SelectionExhausted` when a system has used ``selection.max_candidates``
        candidates in all, image-cut redraws included."""
        ids = [int(i) for i in system_ids]
        if any(i < 0 for i in ids):
            raise ValueError(f"system_id must be >= 0, got {min(ids)}")
        unique = list(dict.fromkeys(ids))
        done: dict[int, System] = {}
        for start in range(0, len(unique), self.BLOCK_SIZE):
            done.update(self._draw_block(unique[start:start + self.BLOCK_SIZE], image_cuts))
        return [done[i] for i in ids]

    def draw_lensed(self, system_ids) -> list[System | None]:
        """Sky mode without cuts (a forecast's fast path): the systems of ``system_ids`` whose
        source is multiply imaged, as :meth:`draw_many` draws them, and None for the others, which
        are left unfinished (no photometry, conditions or class: most of a system's cost)."""
        selection = self.recipe.selection
        if self.mode != "sky" or (selection.enforce and selection.cut_names) or self.recipe.negatives.fraction:
            raise ValueError("draw_lensed draws sky-mode recipes without enforced cuts or negatives only")
        out: list = []
        ids = [int(i) for i in system_ids]
        for start in range(0, len(ids), self.BLOCK_SIZE):
            block = ids[start:start + self.BLOCK_SIZE]
            streams = system_streams_many(self.recipe.seed, block, SYSTEM_STREAMS)
            geometries = _GeometryPhase(self, block, streams).run()
            if any(g is None for g, _ in geometries):  # sky mode takes every candidate
                raise ValueError("draw_lensed: a candidate was rejected; use draw_many")
            lensed = [k for k, (g, _) in enumerate(geometries) if g.placed["multiply_imaged"]]
            self._photometry_and_light([geometries[k] for k in lensed], [streams[k] for k in lensed])
            found: dict = {}
            for k in lensed:
                system, counts = self._finish(block[k], 0, streams[k], geometries[k][0])
                if system is not None:
                    object.__setattr__(system, "rejections", dict(counts))  # the record is still private here
                found[k] = system
            out += [found.get(k) for k in range(len(block))]
        return out

    # -- the candidate loop ----------------------------------------------------------------------
    def _draw_block(self, ids: list[int], image_cuts: ImageCuts | None) -> dict[int, System]:
        limit = self.recipe.selection.max_candidates
        candidate = dict.fromkeys(ids, 0)
        rejections: dict[int, dict] = {i: {} for i in ids}
        done: dict[int, System] = {}
        pending = ids
        while pending:
            streams = system_streams_many(self.recipe.seed, pending, SYSTEM_STREAMS, [candidate[i] for i in pending])
            outcomes = self._candidates(pending, [candidate[i] for i in pending], streams)
            still = []
            for i, (system, counts) in zip(pending, outcomes):
                if system is not None and image_cuts is not None:
                    system, failed = self._judge_images(system, image_cuts)
                    if failed is not None:
                        counts = _merge_counts(counts, {failed: 1})
                _add_counts(rejections[i], counts)
                if system is not None:
                    object.__setattr__(system, "rejections", rejections[i])  # the record is still private here
                    done[i] = system
                    continue
                candidate[i] += 1
                if candidate[i] >= limit:
                    raise SelectionExhausted(_exhausted_message(i, limit, rejections[i]))
                still.append(i)
            pending = still
        return done

    def _judge_images(self, system: System, image_cuts: ImageCuts) -> tuple[System | None, str | None]:
        results = dict(image_cuts(system))
        failed = next((name for name, ok in results.items() if not ok), None)
        # negatives are labelled non-lenses: the cuts flag them but never redraw them
        if failed is not None and self.recipe.selection.enforce and system.system_class == "lens":
            return None, failed
        return dataclasses.replace(system, selection_flags={**system.selection_flags, **results}), None

    def _candidates(self, ids: list[int], candidates: list[int], streams: list) -> list[tuple[System | None, dict]]:
        """One candidate of each system: the System, or None and the rejections by cut."""
        geometries = _GeometryPhase(self, ids, streams).run()
        self._photometry_and_light(geometries, streams)
        out = []
        for i, c, s, (geometry, counts) in zip(ids, candidates, streams, geometries):
            out.append(self._finish(i, c, s, geometry) if geometry is not None else (None, counts))
        return out

    def _photometry_and_light(self, geometries: list, streams: list) -> None:
        """The first draws after the geometry, on arrays: the source's size and colours and the
        lens light (each from its standard normals of the physics stream) and the time-delay scale."""
        rows = [j for j, (g, _) in enumerate(geometries) if g is not None]
        if not rows:
            return
        g = [geometries[j][0] for j in rows]
        source, light = self.source_model, self.lens_light_model
        n_source = source.normals if source is not None else 0
        n_light = light.NORMALS if light is not None and g[0].light is None else 0
        normals = np.stack([streams[j]["physics"].standard_normal(size=n_source + n_light) for j in rows])
        z_lens, z_source = np.array([x.z_lens for x in g]), np.array([x.z_source for x in g])
        if source is not None:
            for x, p in zip(g, source.complete_many([x.anchor_magnitude for x in g], z_source, normals[:, :n_source])):
                x.photometry = p
        if n_light:
            drawn = light.draw_many([x.sigma for x in g], z_lens, [x.v["lens.mass.q"] for x in g],
                                    [x.v["lens.mass.angle"] for x in g], normals[:, n_source:])
            for x, one in zip(g, drawn):
                x.light = one
        behind = np.array([x.behind for x in g])
        days = np.full(len(g), math.nan)
        if behind.any():
            days[behind] = self.distances.fermat_to_days(z_lens[behind], z_source[behind])
        for x, d in zip(g, days):
            x.days_per_arcsec2 = float(d)

    # -- per-row steps of the geometry phase ----------------------------------------------------
    def _subhalos(self, v: dict, theta_e: float, z_lens: float, z_source: float, rng) -> tuple:
        """Masses from dN/dm ~ m^slope on [mass_min, mass_max] (inverse CDF), positions uniform in
        area in the annulus [annulus, annulus_outer] theta_E around the lens centre; with
        ``mass_fraction`` their number is Poisson with the mean that puts that share of the SIS
        host's projected mass in the annulus into subhalos."""
        settings = self.recipe.lens.subhalos
        if theta_e <= 0 or (settings.mass_fraction is None and int(round(v["lens.subhalos.count"])) == 0):
            return ()
        r_in, r_out = v["lens.subhalos.annulus"] * theta_e, v["lens.subhalos.annulus_outer"] * theta_e
        sigma_cr = critical_density_arcsec2(self.distances, z_lens, z_source)  # M_sun / arcsec^2
        if settings.mass_fraction is not None:
            # SIS: kappa = theta_E / (2 theta), so the annulus holds pi Sigma_cr theta_E (r_out - r_in)
            host = math.pi * sigma_cr * theta_e * (r_out - r_in)
            mean = settings.mass_fraction * host / subhalo_mean_mass(settings)
            if mean > MAX_MEAN_SUBHALOS:
                raise SimlensError(f"lens.subhalos.mass_fraction = {settings.mass_fraction:g} puts {mean:.0f} subhalos "
                                   f"on average around a lens of theta_E {theta_e:.2f}\" (more than "
                                   f"{MAX_MEAN_SUBHALOS}); raise lens.subhalos.mass_min or lower the fraction")
            n = int(rng.poisson(mean))
        else:
            n = int(round(v["lens.subhalos.count"]))
        if n == 0:
            return ()
        k = settings.mass_function_slope + 1.0
        lo, hi = settings.mass_min ** k, settings.mass_max ** k
        masses = (lo + rng.uniform(size=n) * (hi - lo)) ** (1.0 / k)
        radii = np.sqrt(r_in**2 + rng.uniform(size=n) * (r_out**2 - r_in**2))
        phi = rng.uniform(0.0, 2.0 * math.pi, size=n)
        return tuple(_subhalo(float(m), float(r * math.cos(p)), float(r * math.sin(p)), theta_e, sigma_cr)
                     for m, r, p in zip(masses, radii, phi))

    def _line_of_sight(self, v: dict, z_lens: float, z_source: float, rng) -> tuple:
        """SIS galaxies uniform in comoving volume between redshift_min and the source, uniform in
        a disc around the lens; sigma from the recipe's distribution, each its own draw."""
        n = int(round(v["lens.line_of_sight.count"]))
        settings = self.recipe.lens.line_of_sight
        if n == 0 or settings.redshift_min >= z_source:
            return ()
        d_lo, d_hi = (float(self.distances.comoving_distance(z)) for z in (settings.redshift_min, z_source))
        galaxies = []
        for _ in range(n):
            d = (d_lo**3 + rng.uniform() * (d_hi**3 - d_lo**3)) ** (1.0 / 3.0)
            z = float(self.distances.redshift_at_comoving_distance(d))
            sigma = float(settings.velocity_dispersion.from_uniform(rng.uniform()))
            x, y = _uniform_in_disc(settings.radius, rng)
            if not (z < z_source and z != z_lens):
                continue
            theta = float(sis_einstein_radius(sigma, self.distances.distance_ratio(z, z_source)))
            light = self._line_of_sight_light(sigma, z, rng) if settings.light else {}
            galaxies.append(LineOfSightGalaxy(z=z, velocity_dispersion=sigma, x=x, y=y, einstein_radius=theta,
                                              **light))
        return tuple(galaxies)

    def _line_of_sight_light(self, sigma: float, z: float, rng) -> dict:
        """A line-of-sight galaxy's light as an early type of its sigma (the lens light's relations,
        their scatter included), round in mass, so its light's axis ratio is the relation's scatter
        about 1; its angle uniform."""
        normals = rng.standard_normal(size=(1, LensLightModel.NORMALS))
        angle = float(rng.uniform(0.0, 180.0))
        light = self.lens_light_model.draw_many([sigma], [z], [1.0], [angle], normals)[0]
        return dict(magnitudes=light.magnitudes, half_light_radius=light.half_light_radius,
                    sersic_index=LINE_OF_SIGHT_SERSIC_INDEX, q=light.q, angle=light.angle)

    def _stars_and_halo(self, v: dict, light, z_lens: float, z_source: float) -> tuple[float, dict]:
        """theta_E and the truth of the stars-plus-halo deflector, whose stars follow the light."""
        mass_to_light = self.recipe.lens.light.scaling.mass_to_light  # today's: with today's luminosity
        parts = stars_and_halo(light.stellar_mass / mass_to_light, mass_to_light,
                               light.half_light_radius, v["lens.light.sersic_index"], v["lens.mass.halo_mass"],
                               v.get("lens.mass.concentration"), z_lens, z_source, self.distances)
        return parts.einstein_radius, dict(
            stellar_kappa_e=parts.stellar_kappa_e, halo_mass=v["lens.mass.halo_mass"],
            halo_concentration=parts.halo_concentration, halo_kappa_s=parts.halo_kappa_s,
            halo_scale_radius=parts.halo_scale_radius, halo_ellipticity=v["lens.mass.halo_ellipticity"])

    # -- the rest of a candidate -----------------------------------------------------------------
    def _finish(self, system_id: int, candidate: int, streams, g: "_Geometry") -> tuple[System | None, dict]:
        """The rest of a candidate after its geometry: photometry, lens light, clumps, conditions,
        the resolvable cut, sky position, class."""
        recipe = self.recipe
        ref = recipe.reference_band
        band_names = recipe.survey.band_names
        source_settings = recipe.source
        selection = recipe.selection
        v, z_lens, z_source, theta_e = g.v, g.z_lens, g.z_source, g.theta_e
        checks = dict(g.checks)

        # -- lens light ----------------------------------------------------------------------
        def magnitudes(base: float, prefix: str) -> dict:
            return {b: base + (0.0 if b == ref else v[f"{prefix}.{b}"]) for b in band_names}

        lens_extra = dict(g.composite_truth)
        deflector = g.deflector
        if recipe.lens.subhalos.light and deflector.get("subhalos"):
            deflector = dict(deflector, subhalos=tuple(self._satellite(h, z_lens) for h in deflector["subhalos"]))
        if g.light is not None:
            light = g.light
            lens_mags, lens_r_e, lens_q, lens_angle = light.magnitudes, light.half_light_radius, light.q, light.angle
            lens_extra.update(lens_absolute_magnitude=light.absolute_magnitude, lens_luminosity=light.luminosity,
                              lens_stellar_mass=light.stellar_mass)
        else:
            lens_mags = magnitudes(v["lens.light.magnitude"], "lens.light.colors")
            lens_r_e, lens_q, lens_angle = v["lens.light.half_light_radius"], v["lens.light.q"], v["lens.light.angle"]
        if recipe.lens.light.envelope is not None:
            lens_extra["lens_envelope"] = self._envelope(v, lens_mags, lens_r_e, lens_q)

        # -- source galaxy: the anchor magnitude is the total (disk + clumps) in the anchor band --
        photometry = g.photometry
        if photometry is not None:
            anchor_mag, source_r_e = photometry.anchor_magnitude, photometry.half_light_radius
            disk_colors, clump_colors = photometry.disk_colors, photometry.clump_colors
        else:
            anchor_mag, source_r_e = v["source.magnitude"], v["source.half_light_radius"]
            disk_colors = {b: 0.0 if b == ref else v[f"source.colors.{b}"] for b in band_names}
            prefix = "source.clumps.colors" if source_settings.clumps.colors else "source.colors"
            clump_colors = {b: 0.0 if b == ref else v[f"{prefix}.{b}"] for b in band_names}
        stamp = {}
        if self._stamps is not None:  # the stamp gives the shape, and so the size
            index = self._stamps.choose(streams["stamps"], z_source, source_settings.stamps.choose)
            stamp = self._stamp(index)
            source_r_e = float(self._stamps.half_light_radius[index])
        n_clumps = int(round(v["source.clumps.count"]))
        clump_fraction = v["source.clumps.flux_fraction"] if n_clumps > 0 else 0.0
        if clump_fraction == 0.0:  # clumps without light are no clumps
            n_clumps = 0
        bulge, bulge_fraction = {}, 0.0
        if source_settings.bulge is not None:  # the galaxy (clumps aside) splits into bulge and disk
            bulge_fraction = v["source.bulge.fraction"]
            if photometry is not None:
                bulge_colors = self.source_model.bulge_colors(z_source)
            elif source_settings.bulge.colors:
                bulge_colors = {b: 0.0 if b == ref else v[f"source.bulge.colors.{b}"] for b in band_names}
            else:
                bulge_colors = disk_colors
            share = 2.5 * math.log10((1.0 - clump_fraction) * bulge_fraction) if bulge_fraction > 0 else -math.inf
            bulge = dict(source_bulge_magnitudes={b: anchor_mag + bulge_colors[b] - share for b in band_names},
                         source_bulge_half_light_radius=v["source.bulge.half_light_radius_ratio"] * source_r_e,
                         source_bulge_sersic_index=v["source.bulge.sersic_index"], source_bulge_q=v["source.bulge.q"])
        disk_share = (1.0 - clump_fraction) * (1.0 - bulge_fraction)
        disk_mags = {b: anchor_mag + disk_colors[b] - 2.5 * math.log10(disk_share) for b in band_names}
        clumps = ()
        if n_clumps > 0:
            rng = streams["physics"]
            if source_settings.clumps.placement == "disk":
                offsets = knots_following_the_disk(n_clumps, source_r_e, v["source.sersic_index"], v["source.q"],
                                                   v["source.angle"], int(rng.integers(1, 2**31 - 1)))
                weights = np.full(n_clumps, 1.0 / n_clumps)
            else:
                weights = rng.uniform(0.5, 1.5, size=n_clumps)
                weights = weights / weights.sum()
                offsets = rng.normal(0.0, v["source.clumps.spread"] * source_r_e, size=(n_clumps, 2))
            clump_anchor = anchor_mag - 2.5 * math.log10(clump_fraction)
            clumps = tuple(
                Clump(x=float(dx), y=float(dy), half_light_radius=v["source.clumps.half_light_radius"],
                      magnitudes={b: clump_anchor + clump_colors[b] - 2.5 * math.log10(w) for b in band_names})
                for (dx, dy), w in zip(offsets, weights))
        supernova = source_settings.supernova
        is_supernova = supernova is not None and float(streams["transient"].uniform()) < supernova.fraction
        quasar_mags, transient = None, {}
        if source_settings.quasar is not None and not is_supernova:
            colours = self.quasar_colours.colors(z_source)
            magnitude = g.anchor_magnitude if self.quasar_population is not None else v["source.quasar.magnitude"]
            quasar_mags = {b: magnitude + colours[b] for b in band_names}
        if is_supernova:
            transient = self._supernova(v, z_source, streams["transient"])
        elif quasar_mags is not None and source_settings.quasar.variability is not None:
            transient = self._variability(v, z_source, quasar_mags, streams["transient"])

        # -- observing conditions ------------------------------------------------------------
        fwhm = (band_fwhm(recipe, self._seeing_factors, v["survey.seeing.fwhm"], streams["seeing"])
                if recipe.survey.seeing is not None else {})
        bands = self.conditions or tuple(
            BandConditions(name=b.name, pixel_scale=recipe.survey.pixel_scale, psf_profile=b.psf.profile,
                           **{name: v[key] for name, key in keys}, **({"psf_fwhm": fwhm[b.name]} if fwhm else {}),
                           **psf_shear(b, v), psf_optics=self._optics[b.name],
                           exposures=b.exposures, resampling=b.resampling)
            for b, keys in self._band_keys)

        # -- a second source plane ------------------------------------------------------------
        second = None
        settings2 = source_settings.second
        if settings2 is not None and g.behind and v["source.second.redshift"] > z_source and theta_e > 0:
            z2 = v["source.second.redshift"]
            factor = float(self.distances.distance_ratio(z_lens, z2)) / g.ratio
            theta_d = float(sis_einstein_radius(v["source.second.deflector_velocity_dispersion"],
                                                self.distances.distance_ratio(z_source, z2)))
            x2, y2 = _uniform_in_disc(v["source.second.radius_in_einstein_radii"] * theta_e * factor, streams["physics"])
            colours = ({b: 0.0 if b == ref else v[f"source.second.colors.{b}"] for b in band_names}
                       if settings2.colors else {b: disk_colors[b] - disk_colors[ref] for b in band_names})
            second = SecondSource(z=z2, magnitudes={b: v["source.second.magnitude"] + colours[b] for b in band_names},
                                  half_light_radius=v["source.second.half_light_radius"],
                                  sersic_index=v["source.second.sersic_index"], q=v["source.second.q"],
                                  angle=v["source.second.angle"], x=x2, y=y2, deflection_factor=factor,
                                  deflector_einstein_radius=theta_d)

        # -- the cut that needs the source size and the seeing -----------------------------------
        if selection.resolvable:
            fwhm = next(b.psf_fwhm for b in bands if b.name == ref)
            checks["resolvable"] = theta_e**2 > source_r_e**2 + (0.5 * fwhm) ** 2
            if selection.enforce and not checks["resolvable"]:
                return None, _merge_counts(g.rejections, {"resolvable": 1})

        # -- sky position and noise seeds (after the cuts, from their own streams) ---------------
        fp = recipe.footprint
        rng = streams["observation"]
        cos_sep = 1.0 - rng.uniform() * (1.0 - math.cos(math.radians(fp.radius)))
        ra, dec = offset_on_sky(fp.ra, fp.dec, rng.uniform(0.0, 360.0), math.degrees(math.acos(cos_sep)))
        noise_seeds = tuple(int(s) for s in streams["observation"].integers(1, 2**31 - 1, size=len(bands)))

        placed = g.placed
        system_class = ("lens" if placed["multiply_imaged"] else
                        "source_in_front" if z_source <= z_lens else "missed_caustics")
        system = System(
            system_id=int(system_id), grid_cell=g.cell, system_class=system_class, ra=ra, dec=dec, z_lens=z_lens,
            z_source=z_source, velocity_dispersion=g.sigma, einstein_radius=theta_e, **deflector,
            line_of_sight=g.line_of_sight, second_source=second,
            cosmology=self.cosmology if (g.line_of_sight or second is not None) else None,
            lens_magnitudes=lens_mags, lens_half_light_radius=lens_r_e,
            lens_sersic_index=v["lens.light.sersic_index"], lens_q=lens_q, lens_angle=lens_angle,
            source_disk_magnitudes=disk_mags, source_half_light_radius=source_r_e,
            source_sersic_index=v["source.sersic_index"], source_q=v["source.q"], source_angle=v["source.angle"],
            clumps=clumps, bands=bands, noise_seeds=noise_seeds, selection_flags=checks, **placed,
            source_absolute_magnitude=photometry.absolute_magnitude if photometry is not None else math.nan,
            quasar_magnitudes=quasar_mags,
            host=(supernova.host if is_supernova else
                  source_settings.quasar.host if source_settings.quasar is not None else True),
            **transient,
            days_per_arcsec2=g.days_per_arcsec2, candidate=candidate, rejections=g.rejections, **lens_extra, **stamp,
            **bulge)
        system = self._classify(system, streams)
        if self._neighbours is not None:
            system = dataclasses.replace(system, neighbours=self._draw_neighbours(system, streams["neighbours"]))
        return system, g.rejections

    def _supernova(self, v: dict, z_source: float, rng) -> dict:
        """A type Ia supernova at the source centre: its stretch, peak (stretch-luminosity relation)
        and the time of its maximum, uniform from ``peak_margin`` before the survey's span to as
        long after it, so that some maxima fall outside the epochs."""
        settings = self.recipe.source.supernova
        stretch = v["source.supernova.stretch"]
        peak = stretched_peak_magnitude(v["source.supernova.peak_absolute_magnitude"], stretch,
                                        settings.stretch_luminosity)
        peak_time = float(rng.uniform(self.epochs.start - settings.peak_margin, self.epochs.end + settings.peak_margin))
        curve = self.supernovae.light_curve(z_source, stretch, peak, float(self.distances.distmod(z_source)), peak_time)
        return dict(transient_kind="sn_ia", light_curve=curve, transient_peak_mjd=peak_time, transient_stretch=stretch,
                    transient_peak_absolute_magnitude=peak)

    def _variability(self, v: dict, z_source: float, quasar_mags: dict, rng) -> dict:
        """The quasar's damped random walk: its absolute magnitude M_i (rest 750 nm) from the
        reference band through the power-law continuum, tau and SF_inf from MacLeod et al. (2010)
        unless the recipe gives them (see simlens.transients.variability)."""
        ref = self.recipe.reference_band
        index = self.recipe.source.quasar.spectral_index
        rest = {b: lam / (1.0 + z_source) for b, lam in self._rest_wavelengths.items()}
        # m_AB(lambda_obs) = M_AB(lambda_obs / (1+z)) + DM - 2.5 log10(1+z) for a flat-in-nu
        # bandwidth; f_nu ~ nu^index then carries M from the rest wavelength to 750 nm
        absolute_i = (quasar_mags[ref] - float(self.distances.distmod(z_source)) + 2.5 * math.log10(1.0 + z_source)
                      - 2.5 * index * math.log10(rest[ref] / QUASAR_I_WAVELENGTH_NM))
        log_mass = v["source.quasar.variability.black_hole_mass"]
        tau = v.get("source.quasar.variability.tau")
        tau = float(MACLEOD_TAU(rest[ref], absolute_i, log_mass, z_source)) if tau is None else tau
        sf_ref = v.get("source.quasar.variability.sf_inf")
        sf_ref = float(MACLEOD_SF_INF(rest[ref], absolute_i, log_mass, z_source)) if sf_ref is None else sf_ref
        sf = {b: sf_ref * (rest[b] / rest[ref]) ** MACLEOD_SF_INF.b for b in quasar_mags}
        walk = DampedRandomWalk(mean_magnitudes=tuple(quasar_mags.items()), sf_inf=tuple(sf.items()),
                                tau=(1.0 + z_source) * tau, seed=int(rng.integers(1, 2**63 - 1)))
        return dict(transient_kind="quasar", light_curve=walk, black_hole_mass=log_mass, variability_tau=tau,
                    quasar_absolute_magnitude_i=absolute_i)

    def _envelope(self, v: dict, lens_mags: dict, lens_r_e: float, lens_q: float) -> LensEnvelope:
        """The lens light split into a core and an envelope that keep its magnitudes and R_e."""
        fraction, ratio = v["lens.light.envelope.fraction"], v["lens.light.envelope.half_light_radius_ratio"]
        n_core, n_envelope = v["lens.light.sersic_index"], v["lens.light.envelope.sersic_index"]
        offsets = {b: v[f"lens.light.envelope.color_offsets.{b}"] for b in self.recipe.lens.light.envelope.color_offsets}
        core_mags, envelope_mags = split_core_and_envelope(lens_mags, self.recipe.reference_band, fraction,
                                                           {b: offsets.get(b, 0.0) for b in lens_mags})
        core_r_e = core_half_light_radius(lens_r_e, fraction, ratio, n_core, n_envelope)
        return LensEnvelope(core_magnitudes=core_mags, core_half_light_radius=core_r_e, magnitudes=envelope_mags,
                            half_light_radius=ratio * core_r_e, sersic_index=n_envelope,
                            q=v.get("lens.light.envelope.q", lens_q))

    def _satellite(self, subhalo: Subhalo, z_lens: float) -> Subhalo:
        """A subhalo with its satellite galaxy: stellar mass from its mass (Moster et al. 2013;
        the truncated mass, below the infall mass the relation was fitted to, so faint), luminosity
        from the lens's mass-to-light ratio and passive evolution, magnitudes through the lens's template, size from the
        late-type relation of Shen et al. (2003; it bends for dwarfs), an exponential disk."""
        stellar = float(SATELLITE_STELLAR_MASS.stellar_mass(subhalo.mass, z_lens))
        scaling = self.recipe.lens.light.scaling
        luminosity = stellar / scaling.mass_to_light
        absolute = SUN_ABSOLUTE_MAGNITUDE_R - 2.5 * math.log10(luminosity) - scaling.luminosity_evolution * z_lens
        k = self.lens_light_model.k.at(z_lens)
        modulus = float(self.distances.distmod(z_lens))
        radius_kpc = 10 ** float(SATELLITE_SIZES.mean_log_radius(absolute, z_lens))
        radius = radius_kpc / (float(self.distances.angular_diameter_distance(z_lens)) * 1e3) * ARCSEC_PER_RADIAN
        return dataclasses.replace(subhalo, magnitudes={b: absolute + modulus + k[b] for b in k},
                                   stellar_mass=stellar, half_light_radius=radius)

    def _stamp(self, index: int) -> dict:
        """The System fields of catalogue stamp ``index`` (its light profile made once per process)."""
        catalogue = self._stamps
        light = self._stamp_lights.get(index)
        if light is None:
            light = self._stamp_lights[index] = ImageLight(flux=1.0, image=catalogue.stamps[index],
                                                           pixel_scale=float(catalogue.pixel_scale[index]))
        return dict(source_stamp=light, source_stamp_index=index,
                    source_stamp_magnitude=float(catalogue.magnitude[index]),
                    source_stamp_redshift=float(catalogue.redshift[index]),
                    source_stamp_psf_fwhm=self.recipe.source.stamps.resolution)

    def _draw_neighbours(self, system: System, rng):
        """The unlensed galaxies and stars of a crowded cutout: over the cutout and the margin the
        PSF reaches into it (its padding), kept clear of the lens."""
        survey = self.recipe.survey
        margin = padding_for(max(major_axis_fwhm(b) for b in system.bands), survey.pixel_scale)
        centre = 0.5 * (survey.cutout_size - 1)
        return self._neighbours.with_margin(margin).draw(rng, [(centre, centre, system.einstein_radius)],
                                                         clearance=self.recipe.neighbours.clearance)

    def _classify(self, system: System, streams) -> System:
        """A share ``negatives.fraction`` of the systems becomes a negative (see negatives.py); the
        others keep the class they were made with.  The negatives stream is made only when needed."""
        negatives = self.recipe.negatives
        rng = streams["negatives"] if negatives.fraction > 0 else None
        if rng is None or rng.uniform() >= negatives.fraction:
            return system
        weights = negatives.weights()
        names = [n for n, w in weights.items() if w > 0]
        p = np.array([weights[n] for n in names], dtype=float)
        kind = names[int(rng.choice(len(names), p=p / p.sum()))]
        scale = system.einstein_radius if system.einstein_radius > 0 else system.lens_half_light_radius
        extra = lookalike_light(kind, rng, scale, system.lens_half_light_radius, system.lens_q, system.lens_angle,
                                dict(system.lens_magnitudes), {b: system.source_magnitude(b) for b in system.lens_magnitudes})
        flags = dict(system.selection_flags)
        if "multiply_imaged" in flags:
            flags["multiply_imaged"] = False
        changes = dict(system_class=kind, lensing=False, multiply_imaged=False, extra_light=extra, second_source=None,
                       selection_flags=flags, source_present=kind == "unlensed_source", tangential_caustic_area=0.0,
                       inner_caustic_area=0.0)
        if kind == "unlensed_source":
            x, y = _uniform_in_annulus(0.3 * scale, 2.5 * scale, rng)
            changes.update(source_x=x, source_y=y)
        return dataclasses.replace(system, **changes)


GALSIM_SERSIC_INDICES = (0.3, 6.2)  # the Sersic indices GalSim draws
SATELLITE_STELLAR_MASS = StellarToHaloMass()
SATELLITE_SIZES = SizeLuminosity()


def knots_following_the_disk(n: int, half_light_radius: float, sersic_index: float, q: float, angle: float,
                             seed: int) -> np.ndarray:
    """``(n, 2)`` knot offsets (arcsec) from the source centre, placed by ``galsim.RandomKnots`` at
    random points of the disk's own light (a Sersic of the source's shape; GalSim's photon shooting)."""
    import galsim  # the sampler needs GalSim only for this placement

    disk = galsim.Sersic(n=float(np.clip(sersic_index, *GALSIM_SERSIC_INDICES)), half_light_radius=half_light_radius)
    disk = disk.shear(q=q, beta=angle * galsim.degrees)
    return np.asarray(galsim.RandomKnots(npoints=n, profile=disk, rng=galsim.BaseDeviate(seed)).points, dtype=float)


@dataclass
class _Geometry:
    """What the geometry phase of one candidate hands to the rest of it."""

    v: dict  # every parameter's value, by key path
    cell: tuple
    sigma: float
    z_lens: float
    z_source: float
    anchor_magnitude: float
    behind: bool
    ratio: float  # D_ls / D_s
    theta_e: float
    checks: dict  # cut -> passed, for the cuts judged so far
    deflector: dict  # the System's mass fields
    line_of_sight: tuple
    placed: dict  # the System's placement fields
    rejections: dict  # earlier tries of this candidate, by cut
    light: object = None  # LensLight, when drawn (stars_and_halo draws it in the geometry phase)
    composite_truth: dict = field(default_factory=dict)
    photometry: object = None  # SourcePhotometry
    days_per_arcsec2: float = math.nan


class _RowValues(Mapping):
    """One system's parameter values (``key path -> float``), read from the arrays of all rows on
    use: most systems of a forecast are never finished, so never read."""

    __slots__ = ("_values", "_row")

    def __init__(self, values: dict, row: int):
        self._values, self._row = values, row

    def __getitem__(self, path: str) -> float:
        return float(self._values[path][self._row])

    def __iter__(self):
        return iter(self._values)

    def __len__(self) -> int:
        return len(self._values)


class _GeometryPhase:
    """The deflector, the source redshift and the source's place, tried several times within each
    candidate's streams (in lens mode a deflector whose caustics miss the source is replaced
    whole): every pending system a row of the arrays."""

    def __init__(self, sampler: PopulationSampler, ids: list[int], streams: list):
        self.sampler, self.recipe = sampler, sampler.recipe
        self.ids, self.streams = ids, streams
        self.physics = [s["physics"] for s in streams]
        self.queue = _PairQueue(sampler, self.physics)
        self.tries = [dict() for _ in ids]
        self.result: list = [None] * len(ids)

    def _parameters(self, rows: np.ndarray) -> dict:
        """Every parameter's value for the systems ``rows`` (arrays), from one vector of uniforms each."""
        s = self.sampler
        u = np.stack([self.streams[k]["parameters"].uniform(size=len(s._parameters)) for k in rows])
        values = {path: np.full(rows.size, value) for path, value in s._fixed_values.items()}
        for index, path, param in s._random_parameters:
            values[path] = param.from_uniform(u[:, index])
        if s._grid_parameters:
            cells = [grid_cell(self.ids[k], s._grid_shape) for k in rows]
            for j, (path, param) in enumerate(s._grid_parameters):
                values[path] = np.array([float(param.at(c[j])) for c in cells])
        for j, k in enumerate(rows):
            for path, value in s.given.get(self.ids[k], {}).items():
                values[path][j] = value
        return values

    def _reject(self, k: int, cut: str) -> None:
        self.tries[k][cut] = self.tries[k].get(cut, 0) + 1

    def _counts(self, k: int) -> dict:
        return _merge_counts(self.queue.nonzero_rejections(k), self.tries[k])

    def run(self) -> list[tuple[_Geometry | None, dict]]:
        s, selection = self.sampler, self.recipe.selection
        model = self.recipe.lens.mass.model
        active = np.arange(len(self.ids))
        for _ in range(s.TRIES_PER_CANDIDATE):
            if active.size == 0:
                break
            values = self._parameters(active)
            sigma, z_lens, z_source, anchor, found = self.queue.next(active, values)
            for k in active[~found]:
                self.result[k] = (None, self._counts(k))
            active, values = active[found], {p: a[found] for p, a in values.items()}
            sigma, z_lens, z_source, anchor = sigma[found], z_lens[found], z_source[found], anchor[found]
            rows = [_RowValues(values, j) for j in range(active.size)]
            behind = z_source > z_lens
            ratio = np.where(behind, s.distances.distance_ratio(np.minimum(z_lens, z_source), z_source), 0.0)
            theta_e = sis_einstein_radius(sigma, ratio)
            lights = [None] * active.size
            composite = [{} for _ in active]
            if LENS_MODELS[model].solves_einstein_radius:  # the stars follow the light: draw it, then solve theta_E
                normals = np.stack([self.physics[k].standard_normal(size=LensLightModel.NORMALS) for k in active])
                lights = s.lens_light_model.draw_many(sigma, z_lens, values["lens.mass.q"], values["lens.mass.angle"],
                                                      normals)
                for j in range(active.size):
                    theta_e[j] = 0.0
                    if behind[j]:
                        theta_e[j], composite[j] = s._stars_and_halo(rows[j], lights[j], z_lens[j], z_source[j])
            checks = [dict() for _ in active]
            passed = np.ones(active.size, dtype=bool)
            if selection.einstein_radius is not None:
                lo, hi = selection.einstein_radius
                inside = (lo <= theta_e) & (theta_e <= hi)
                for j in range(active.size):
                    checks[j]["einstein_radius"] = bool(inside[j])
                if selection.enforce:
                    for k in active[~inside]:
                        self._reject(k, "einstein_radius")
                    passed &= inside
            deflectors, line_of_sight = [None] * active.size, [()] * active.size
            for j in np.flatnonzero(passed):  # per-row draws, in this order, from each row's physics stream
                k, v = active[j], rows[j]
                deflectors[j] = _deflector_fields(model, v, s._subhalos(v, theta_e[j], z_lens[j], z_source[j],
                                                                        self.physics[k]))
                if behind[j]:
                    line_of_sight[j] = s._line_of_sight(v, z_lens[j], z_source[j], self.physics[k])
            caustics = _Caustics.of(self.sampler, np.flatnonzero(passed), theta_e, deflectors, composite, lights,
                                    line_of_sight, z_lens, z_source, rows)
            placed = self._place(active, rows, theta_e, passed, caustics)
            finished = np.zeros(active.size, dtype=bool)
            for j, k in enumerate(active):
                if not passed[j]:
                    continue
                if placed[j] is None:
                    self._reject(k, "placement")
                    continue
                if selection.multiply_imaged:
                    checks[j]["multiply_imaged"] = placed[j]["multiply_imaged"]
                    if selection.enforce and not placed[j]["multiply_imaged"]:
                        self._reject(k, "multiply_imaged")
                        continue
                self.result[k] = (_Geometry(
                    v=rows[j], cell=grid_cell(self.ids[k], s._grid_shape), sigma=float(sigma[j]),
                    z_lens=float(z_lens[j]), z_source=float(z_source[j]), anchor_magnitude=float(anchor[j]),
                    behind=bool(behind[j]), ratio=float(ratio[j]), theta_e=float(theta_e[j]), checks=checks[j],
                    deflector=deflectors[j], line_of_sight=line_of_sight[j], placed=placed[j],
                    rejections=self._counts(k), light=lights[j], composite_truth=composite[j]), None)
                finished[j] = True
            active = active[~finished]
        for k in active:  # every try used
            self.result[k] = (None, self._counts(k))
        return self.result

    def _place(self, active: np.ndarray, rows: list[dict], theta_e: np.ndarray, passed: np.ndarray,
               caustics: "_Caustics") -> list:
        """The source centre and placement truth by the placement mode (System fields) of the rows
        that passed; None where a lens-mode candidate must be redrawn."""
        s = self.sampler
        pos = self.recipe.source.position
        mode = s.mode
        out: list = [None] * active.size
        todo = np.flatnonzero(passed)
        if todo.size == 0:
            return out
        physics = [self.physics[k] for k in active]
        if mode == "fixed":
            if pos.x is not None:
                x = np.array([rows[j]["source.position.x"] for j in todo])
                y = np.array([rows[j]["source.position.y"] for j in todo])
                radius = np.hypot(x, y)
            else:
                factor = np.array([rows[j].get("source.position.radius_in_einstein_radii",
                                               DEFAULT_RADIUS_IN_EINSTEIN_RADII) for j in todo])
                radius = factor * theta_e[todo]
                x, y = np.array([_uniform_in_disc(float(r), physics[j]) for r, j in zip(radius, todo)]).reshape(-1, 2).T
            multiple = caustics.multiply_imaged(todo, x, y)
            for i, j in enumerate(todo):
                out[j] = caustics.placed(j, x[i], y[i], radius[i], False, bool(multiple[i]), mode)
            return out
        reach = caustics.reach[todo]
        if mode == "lens":
            radius = pos.region_radius_in_einstein_radii * theta_e[todo]
        else:  # sky: a disc of 1 / density of area, or wider, holding a Poisson number of sources
            radius = np.full(todo.size, math.sqrt(3600.0 / (math.pi * s.source_density)))
        widened = reach > radius
        radius = np.maximum(radius, 1.02 * reach)
        if mode == "sky":
            return self._place_on_the_sky(out, todo, radius, widened, physics, caustics)
        # Explicit lens distributions keep their deflector and re-place the source; a physical
        # population redraws the whole candidate, which weights lenses by their cross-section.
        tries = 1 if (mode == "sky" or s.deflectors is not None) else s.LENS_MODE_PLACEMENT_TRIES
        left = np.arange(todo.size)
        for _ in range(tries):
            if left.size == 0:
                break
            x, y = np.array([_uniform_in_disc(float(radius[t]), physics[todo[t]]) for t in left]).reshape(-1, 2).T
            multiple = caustics.multiply_imaged(todo[left], x, y)
            accept = multiple | (mode == "sky")
            for i in np.flatnonzero(accept):
                t = left[i]
                out[todo[t]] = caustics.placed(todo[t], x[i], y[i], radius[t], bool(widened[t]), bool(multiple[i]), mode)
            left = left[~accept]
        return out


    def _place_on_the_sky(self, out: list, todo: np.ndarray, radius: np.ndarray, widened: np.ndarray, physics,
                          caustics) -> list:
        """Sky mode: sources fall as a Poisson process of the source density, so a disc of area A
        around the lens holds Poisson(n A) of them, each placed uniformly; the system's source is the
        first inside the caustics (then it is a lens; P = 1 - exp(-n A_caustics), whatever A), else
        the first of them (or, with none in the disc, one placed outside the caustics: a non-lens).
        The candidate's drawn source properties are that source's (every source is alike in law)."""
        density = self.sampler.source_density / 3600.0  # per arcsec^2
        counts = [int(physics[j].poisson(density * math.pi * radius[t] ** 2)) for t, j in enumerate(todo)]
        points = [_uniform_points_in_disc(float(radius[t]), max(n, 1), physics[j]) for t, (j, n) in enumerate(zip(todo, counts))]
        rows = np.repeat(todo, [len(p) for p in points])
        xy = np.concatenate(points)
        inside = caustics.multiply_imaged(rows, xy[:, 0], xy[:, 1])  # all rows' points at once
        first = 0
        for t, (j, n) in enumerate(zip(todo, counts)):
            x, y = points[t][:, 0], points[t][:, 1]
            multiple = inside[first:first + len(x)]
            first += len(x)
            for _ in range(SKY_EMPTY_DISC_TRIES if n == 0 else 0):  # no source here: one outside the caustics
                if not multiple[0]:
                    break
                x, y = (np.array([v]) for v in _uniform_in_disc(float(radius[t]), physics[j]))
                multiple = caustics.multiply_imaged(np.array([j]), x, y)
            k = int(np.argmax(multiple)) if multiple.any() else 0
            out[j] = caustics.placed(j, x[k], y[k], radius[t], bool(widened[t]), bool(multiple[k]) and n > 0, "sky")
        return out


def _deflector_fields(model: str, v: dict, subhalos: tuple) -> dict:
    """The System's mass fields of a candidate (those of the model's own recipe keys included)."""
    own = {name: v[f"lens.mass.{key}"] for name, key in LENS_MODELS[model].recipe_keys.items()
           if name in TRUTH_DEFAULTS}  # stars_and_halo's are solved (_stars_and_halo)
    return dict(mass_model_name=model, mass_q=v["lens.mass.q"], mass_angle=v["lens.mass.angle"],
                **{**TRUTH_DEFAULTS, **own},
                multipoles=tuple((m, v[f"lens.multipoles.m{m}_strength"], v[f"lens.multipoles.m{m}_angle"])
                                 for m in (3, 4) if v[f"lens.multipoles.m{m}_strength"] != 0.0),
                subhalos=subhalos, shear_gamma=v["lens.shear.gamma"], shear_angle=v["lens.shear.angle"])


class _Caustics:
    """The caustics of many candidates' deflectors as padded polygons: ``x, y`` of shape
    (rows, 2, CUT_ANGLES), the tangential caustic then the inner one (radial caustic or cut);
    absent curves are all zeros (never inside, no area).  SIE + shear lenses take the closed form
    on arrays (:func:`simlens.lensing.caustics.isothermal_caustics`); every other deflector, and any
    row the closed form does not apply to, is built and scanned by ``find_caustics``."""

    def __init__(self, n: int):
        self.x = np.zeros((n, 2, CUT_ANGLES))
        self.y = np.zeros((n, 2, CUT_ANGLES))

    @classmethod
    def of(cls, sampler, rows: np.ndarray, theta_e, deflectors, composite, lights, line_of_sight, z_lens, z_source,
           values) -> "_Caustics":
        table = cls(theta_e.size)
        lensed = [j for j in rows if theta_e[j] > 0]
        simple = [j for j in lensed if deflectors[j]["mass_model_name"] == "sie" and not deflectors[j]["subhalos"]
                  and not deflectors[j]["multipoles"] and not line_of_sight[j]]
        scan = sorted(set(lensed) - set(simple))
        if simple:
            scan += table._closed_form(np.array(simple), theta_e, deflectors)
        for j in scan:
            d = deflectors[j]
            mass = build_deflector(_TruthSoFar(theta_e[j], d, composite[j], lights[j], values[j]))
            if line_of_sight[j]:
                mass = multi_plane(mass, z_lens[j], line_of_sight[j], z_source[j], sampler.cosmology)
            found = find_caustics(mass, theta_e[j])
            tangential = found.caustic("tangential")
            inner = next((c for c in found.caustics if c.kind != "tangential"), None)
            for slot, curve in enumerate((tangential, inner)):
                if curve is not None and curve.x.size:
                    table.x[j, slot] = np.pad(curve.x, (0, CUT_ANGLES - curve.x.size), mode="edge")
                    table.y[j, slot] = np.pad(curve.y, (0, CUT_ANGLES - curve.y.size), mode="edge")
        table.reach = np.max(np.hypot(table.x, table.y), axis=(1, 2))
        table.areas = polygon_area(table.x, table.y)
        table.has_inner = table.areas[:, 1] > 0
        return table

    CHUNK_ROWS = 128  # rows per block of the closed-form arithmetic: its temporaries then stay in cache

    def _closed_form(self, rows: np.ndarray, theta_e, deflectors) -> list[int]:
        """Fill the rows ``rows`` (SIE + shear) from the closed form; return those it does not apply to."""
        left = []
        cos, sin = _UNIT_CIRCLE
        for start in range(0, rows.size, self.CHUNK_ROWS):
            chunk = rows[start:start + self.CHUNK_ROWS]
            d = [deflectors[j] for j in chunk]
            b = theta_e[chunk]
            q = np.array([x["mass_q"] for x in d])[:, None]
            angle = np.radians([x["mass_angle"] for x in d])[:, None]
            c, s = np.cos(angle), np.sin(angle)
            xp, yp = c * cos + s * sin, -s * cos + c * sin  # the unit circle in each lens's frame
            ax, ay = rotate_back(*sie_deflection_in_frame(b[:, None], q, xp, yp), c, s)
            hessian = isothermal_hessian(sie_convergence_in_frame(b[:, None], q, xp, yp), cos, sin)
            g1, g2 = shear_components(np.array([x["shear_gamma"] for x in d]), np.array([x["shear_angle"] for x in d]))
            zero = np.zeros(chunk.size)
            ok, _, caustic, cut, has_cut = isothermal_caustics((ax, ay), hessian, (g1, g2, -g1), (zero, zero),
                                                               (0.0, 0.0), b)
            self.x[chunk, 0], self.y[chunk, 0] = caustic
            cut_x, cut_y = cut
            self.x[chunk, 1] = np.where(has_cut[:, None], cut_x, 0.0)
            self.y[chunk, 1] = np.where(has_cut[:, None], cut_y, 0.0)
            bad = chunk[~ok]
            self.x[bad], self.y[bad] = 0.0, 0.0
            left += bad.tolist()
        return left

    def multiply_imaged(self, rows: np.ndarray, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Whether the source-plane point ``(x[i], y[i])`` lies inside a caustic of row ``rows[i]``
        (points beyond the caustics' reach are outside without testing the polygons)."""
        x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
        inside = np.zeros(x.shape, bool)
        near = np.flatnonzero(np.hypot(x, y) <= self.reach[rows])
        if near.size == 0:
            return inside
        rows, x, y = rows[near], x[near], y[near]
        found = inside_polygon(x, y, self.x[rows, 0], self.y[rows, 0])
        inner = self.has_inner[rows]
        if inner.any():
            with_inner = rows[inner]
            found[inner] |= inside_polygon(x[inner], y[inner], self.x[with_inner, 1], self.y[with_inner, 1])
        inside[near] = found
        return inside

    def placed(self, j: int, x: float, y: float, radius: float, widened: bool, multiple: bool, mode: str) -> dict:
        """The System's placement fields of row ``j``."""
        return dict(source_x=float(x), source_y=float(y), placement=mode, region_radius=float(radius),
                    region_widened=bool(widened), multiply_imaged=bool(multiple),
                    tangential_caustic_area=float(self.areas[j, 0]), inner_caustic_area=float(self.areas[j, 1]))


class _TruthSoFar(SimpleNamespace):
    """A candidate's mass fields before its System exists (for :func:`build_deflector`): the
    deflector fields, the solved stars-and-halo truth, and the lens light the stars follow."""

    def __init__(self, einstein_radius: float, deflector: dict, solved: dict, light, v: dict):
        super().__init__(einstein_radius=einstein_radius, **deflector, **solved)
        if light is not None:
            self.lens_half_light_radius, self.lens_q, self.lens_angle = light.half_light_radius, light.q, light.angle
            self.lens_sersic_index = v["lens.light.sersic_index"]


class _PairQueue:
    """The (sigma, z_lens, z_source, source anchor magnitude) pairs of each row's candidate, drawn
    in batches from the row's physics stream and rejected in bulk where it is cheap.  In lens mode a
    source must lie behind its lens and a pair is kept with probability (D_ls/D_s)^2, the distance
    part of the cross-section weight (sigma^4 is exact in the deflector draw); the Einstein-radius
    cut is applied here too (except for stars_and_halo, whose theta_E is solved later).  Other modes
    take every pair.  Rejected pairs are counted by cut."""

    def __init__(self, sampler: PopulationSampler, rngs: list):
        self.sampler, self.rngs = sampler, rngs
        self.lens_mode = sampler.mode == "lens"
        self.bulk = (sampler.deflectors is not None or sampler.source_model is not None
                     or sampler.supernova_redshifts is not None or sampler.quasar_population is not None)
        self.size = sampler.GEOMETRY_BATCH if (self.bulk and self.lens_mode) else 1
        n = len(rngs)
        self.batch = {name: np.zeros((n, self.size)) for name in ("sigma", "z_lens", "z_source", "m")}
        self.flags = {name: np.zeros((n, self.size), dtype=bool) for name in ("behind", "weighted", "kept")}
        self.has_batch = np.zeros(n, dtype=bool)
        self.cursor = np.zeros(n, dtype=np.int64)
        self.counts = np.zeros((n, 3), dtype=np.int64)  # source_in_front, cross_section, einstein_radius

    NAMES = ("source_in_front", "cross_section", "einstein_radius")

    def nonzero_rejections(self, k: int) -> dict:
        return {name: c for name, c in zip(self.NAMES, self.counts[k].tolist()) if c}

    def _new_batches(self, rows: np.ndarray, values: dict, picks: np.ndarray) -> None:
        """Fresh batches for rows ``rows`` (``picks``: their places in ``values``)."""
        s, n = self.sampler, self.size
        calls = ((2 if s.deflectors is not None else 0) + (2 if s.source_model is not None else 0) + self.lens_mode
                 + (s.supernova_redshifts is not None) + 3 * (s.quasar_population is not None))
        u = (np.stack([self.rngs[k].uniform(size=calls * n) for k in rows]).reshape(rows.size, calls, n)
             if calls else np.zeros((rows.size, 0, n)))
        c = 0
        if s.deflectors is not None:
            z_l = s.deflectors.draw_redshift(u[:, 0])
            c = 2
        else:
            z_l = np.repeat(values["lens.redshift"][picks][:, None], n, axis=1)
            sigma = np.repeat(values["lens.velocity_dispersion"][picks][:, None], n, axis=1)
        if s.source_model is not None:
            settings = s.source_model.settings
            m = s.source_model.counts.draw(*settings.magnitude_range, u[:, c])
            z_s = s.source_model.redshifts.draw(m, *settings.redshift_range, u[:, c + 1])
            c += 2
        elif s.quasar_population is not None:  # the luminosity function's redshifts and magnitudes
            z_s, m = s.quasar_population.draw(u[:, c], u[:, c + 1], u[:, c + 2])
            c += 3
        elif s.supernova_redshifts is not None:  # the supernova rate's redshifts
            m = np.full((rows.size, n), math.nan)
            z_s = s.supernova_redshifts.draw_redshift(u[:, c])
            c += 1
        else:
            m = np.full((rows.size, n), math.nan)
            z_s = np.repeat(values["source.redshift"][picks][:, None], n, axis=1)
        if not self.lens_mode:
            if s.deflectors is not None:
                sigma = s.deflectors.draw_sigma(u[:, 1], z_l)
            behind = weighted = kept = np.ones((rows.size, n), dtype=bool)
        else:
            behind = z_s > z_l
            ratio = np.where(behind, s.distances.distance_ratio(np.minimum(z_l, z_s), z_s), 0.0)
            weighted = behind & ((u[:, c] <= ratio**2) if s.deflectors is not None else True)
            if s.deflectors is not None:  # sigma only where a pair can still be kept (the costly part)
                sigma = np.full((rows.size, n), math.nan)
                sigma[weighted] = s.deflectors.draw_sigma(u[:, 1][weighted], z_l[weighted])
            kept = weighted
            selection = s.recipe.selection
            if (selection.einstein_radius is not None and selection.enforce
                    and not LENS_MODELS[s.recipe.lens.mass.model].solves_einstein_radius):
                theta = sis_einstein_radius(sigma, ratio)
                kept = weighted & (theta >= selection.einstein_radius[0]) & (theta <= selection.einstein_radius[1])
        for name, a in (("sigma", sigma), ("z_lens", z_l), ("z_source", z_s), ("m", m)):
            self.batch[name][rows] = a
        for name, a in (("behind", behind), ("weighted", weighted), ("kept", kept)):
            self.flags[name][rows] = a
        self.has_batch[rows] = True
        self.cursor[rows] = 0

    def _count(self, rows: np.ndarray, stop: np.ndarray) -> None:
        columns = np.arange(self.size)[None, :]
        span = (columns >= self.cursor[rows][:, None]) & (columns < stop[:, None])
        behind, weighted, kept = (self.flags[name][rows] for name in ("behind", "weighted", "kept"))
        self.counts[rows, 0] += np.count_nonzero(span & ~behind, axis=1)
        self.counts[rows, 1] += np.count_nonzero(span & behind & ~weighted, axis=1)
        self.counts[rows, 2] += np.count_nonzero(span & weighted & ~kept, axis=1)

    def next(self, active: np.ndarray, values: dict):
        """The next kept pair of every active row: (sigma, z_lens, z_source, m, found)."""
        m = active.size
        out = {name: np.zeros(m) for name in ("sigma", "z_lens", "z_source", "m")}
        found = np.zeros(m, dtype=bool)
        todo = np.arange(m)
        for _ in range(self.sampler.GEOMETRY_BATCHES if self.bulk else 1):
            if todo.size == 0:
                break
            rows = active[todo]
            fresh = ~self.has_batch[rows] | (self.cursor[rows] >= self.size)
            if fresh.any():
                self._new_batches(rows[fresh], values, todo[fresh])
            kept = self.flags["kept"][rows] & (np.arange(self.size)[None, :] >= self.cursor[rows][:, None])
            has = kept.any(axis=1)
            first = np.argmax(kept, axis=1)
            hit_rows, hit_first = rows[has], first[has]
            self._count(hit_rows, hit_first)
            self.cursor[hit_rows] = hit_first + 1
            for name in out:
                out[name][todo[has]] = self.batch[name][hit_rows, hit_first]
            found[todo[has]] = True
            miss = rows[~has]
            self._count(miss, np.full(miss.size, self.size))
            self.has_batch[miss] = False
            todo = todo[~has]
            if not self.bulk:
                break
        return out["sigma"], out["z_lens"], out["z_source"], out["m"], found


def offset_on_sky(ra0: float, dec0: float, position_angle: float, separation: float) -> tuple[float, float]:
    """The point at ``separation`` (deg) from (ra0, dec0) towards ``position_angle`` (deg east of
    north), on the sphere (spherical trigonometry; astropy's SkyCoord.directional_offset_by is the
    reference in the tests)."""
    d0, pa, s = math.radians(dec0), math.radians(position_angle), math.radians(separation)
    sin_dec = math.sin(d0) * math.cos(s) + math.cos(d0) * math.sin(s) * math.cos(pa)
    dec = math.asin(max(-1.0, min(1.0, sin_dec)))
    dra = math.atan2(math.sin(pa) * math.sin(s) * math.cos(d0), math.cos(s) - math.sin(d0) * sin_dec)
    return (ra0 + math.degrees(dra)) % 360.0, math.degrees(dec)


def _uniform_in_annulus(r_in: float, r_out: float, rng) -> tuple[float, float]:
    r = math.sqrt(r_in**2 + rng.uniform() * (r_out**2 - r_in**2))
    phi = rng.uniform(0.0, 2.0 * math.pi)
    return r * math.cos(phi), r * math.sin(phi)


def _uniform_in_disc(radius: float, rng) -> tuple[float, float]:
    return _uniform_in_annulus(0.0, radius, rng)


def _uniform_points_in_disc(radius: float, n: int, rng) -> np.ndarray:
    """``n`` points of :func:`_uniform_in_disc` (the same draws, in one call), shape ``(n, 2)``."""
    u = rng.random(2 * n)
    out = np.empty((n, 2))
    for k in range(n):
        r = math.sqrt(u[2 * k] * radius**2)
        phi = 2.0 * math.pi * u[2 * k + 1]
        out[k] = r * math.cos(phi), r * math.sin(phi)
    return out


def _merge_counts(a: Mapping[str, int], b: Mapping[str, int]) -> dict:
    out = dict(a)
    _add_counts(out, b)
    return out


def _add_counts(total: dict, more: Mapping[str, int]) -> None:
    for name, n in more.items():
        total[name] = total.get(name, 0) + int(n)


def _exhausted_message(system_id: int, limit: int, rejections: dict) -> str:
    worst = ", ".join(f"{name} {n}" for name, n in sorted(rejections.items(), key=lambda kv: -kv[1]))
    return (f"selection: none of {limit} candidates for system {system_id} passed the cuts "
            f"(rejected by: {worst}); loosen the [selection] cuts or widen the populations, or raise "
            f"selection.max_candidates")


SKY_EMPTY_DISC_TRIES = 100  # draws of an unlensed source's place outside the caustics (a small part of the disc)
LINE_OF_SIGHT_SERSIC_INDEX = 4.0  # early types (de Vaucouleurs)
MAX_MEAN_SUBHALOS = 20_000  # the most subhalos a lens may hold on average (a mass_fraction's count)


def subhalo_mean_mass(settings) -> float:
    """The mean mass of dN/dm ~ m^slope on [mass_min, mass_max] (M_sun)."""
    a, lo, hi = settings.mass_function_slope, settings.mass_min, settings.mass_max

    def moment(power):  # integral of m^power dm over the range
        return math.log(hi / lo) if abs(power + 1.0) < 1e-12 else (hi ** (power + 1) - lo ** (power + 1)) / (power + 1)

    return moment(a + 1.0) / moment(a)


def _subhalo(mass: float, x: float, y: float, theta_e: float, sigma_cr_arcsec2: float) -> Subhalo:
    """A truncated SIS of total mass ``pi Sigma_cr b a`` with the tidal truncation ``a = sqrt(b theta_E)``
    of an SIS subhalo in an SIS host (Metcalf & Madau 2001, from memory); solved for b."""
    b = (mass / (math.pi * sigma_cr_arcsec2 * math.sqrt(theta_e))) ** (2.0 / 3.0)
    return Subhalo(x=x, y=y, mass=mass, einstein_radius=b, truncation_radius=math.sqrt(b * theta_e))


# When neither x/y nor radius_in_einstein_radii is given, sources fall uniformly in area inside one
# Einstein radius (for an SIS that is exactly the multiply-imaged region; common practice).
DEFAULT_RADIUS_IN_EINSTEIN_RADII = 1.0

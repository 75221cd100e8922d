"""Drawing systems: one :class:`System` per ``system_id`` from a recipe.

A System holds plain numbers only -- the truth of one lens, its source, and the observing
conditions in every band -- and builds the model objects (mass, lens light, source light) the
renderer needs.  Drawing is deterministic in ``(recipe.seed, system_id)`` (see
:mod:`simlens.sampling`): ``PopulationSampler(recipe).draw(i)`` gives the same system whichever
process asks and whatever it drew before.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Mapping

import numpy as np

from pathlib import Path

from ..lensing.caustics import CausticSet, find_caustics
from ..lensing.stars_and_halo import stars_and_halo
from ..cosmology import critical_surface_density, ARCSEC_PER_RADIAN
from ..cosmology import C_KM_S, DistanceTable
from ..errors import SimlensError
from ..populations.galaxies import LensLightModel, PointSourceColours, SourceModel
from ..imaging.light import CompositeLight, LightProfile, Sersic
from ..populations.negatives import lookalike_light
from ..lensing.mass import (NFW, SIE, SIS, ConvergenceSheet, CoredIsothermal, ExternalShear, MassModel, Multipole, PowerLaw,
                   SersicMass, TruncatedSIS)
from ..recipe import Recipe
from ..recipe.distributions import Fixed, Grid
from .streams import SYSTEM_STREAMS, grid_cell, system_streams
from .conditions import BandConditions
from ..populations.velocity_function import VELOCITY_FUNCTIONS, DeflectorPopulation

__all__ = ["System", "Clump", "Subhalo", "LineOfSightGalaxy", "SecondSource", "PopulationSampler", "SelectionExhausted", "offset_on_sky"]

CLUMP_SERSIC_INDEX = 0.5  # Gaussian clumps


@dataclass(frozen=True)
class Clump:
    """A compact knot of the source: offset from the source centre (arcsec, source plane), size,
    and magnitude per band."""

    x: float
    y: float
    half_light_radius: float
    magnitudes: Mapping[str, float]


@dataclass(frozen=True)
class Subhalo:
    """A truncated-SIS subhalo: position (arcsec, image plane), mass (M_sun), Einstein radius b and
    truncation radius a (arcsec)."""

    x: float
    y: float
    mass: float
    einstein_radius: float
    truncation_radius: float


@dataclass(frozen=True)
class LineOfSightGalaxy:
    """An SIS deflector in its own lens plane: redshift, velocity dispersion (km/s), position
    (arcsec, in its plane) and Einstein radius for the system's source (arcsec)."""

    z: float
    velocity_dispersion: float
    x: float
    y: float
    einstein_radius: float


@dataclass(frozen=True)
class SecondSource:
    """A source galaxy in a second, farther source plane: Sersic light (magnitudes per band), its
    centre (arcsec, in its own plane), the factor that rescales the main lens's deflection to its
    redshift, and the Einstein radius of the first source as an SIS deflector (0: none)."""

    z: float
    magnitudes: Mapping[str, float]
    half_light_radius: float
    sersic_index: float
    q: float
    angle: float
    x: float
    y: float
    deflection_factor: float
    deflector_einstein_radius: float


@dataclass(frozen=True)
class System:
    """The truth of one lens system (plain values; all angles in degrees CCW from +x, positions in
    arcsec relative to the cutout centre, where the lens sits)."""

    system_id: int
    grid_cell: tuple
    ra: float
    dec: float
    z_lens: float
    z_source: float
    velocity_dispersion: float
    einstein_radius: float
    mass_q: float
    mass_angle: float
    mass_model_name: str
    mass_slope: float
    mass_core_radius: float
    multipoles: tuple  # of (order, strength, angle relative to the mass major axis)
    subhalos: tuple  # of Subhalo
    shear_gamma: float
    shear_angle: float
    lens_magnitudes: Mapping[str, float]
    lens_half_light_radius: float
    lens_sersic_index: float
    lens_q: float
    lens_angle: float
    source_disk_magnitudes: Mapping[str, float]
    source_half_light_radius: float
    source_sersic_index: float
    source_q: float
    source_angle: float
    source_x: float
    source_y: float
    clumps: tuple
    bands: tuple  # of BandConditions, in survey order
    noise_seeds: tuple  # one int per band, for GalSim's noise
    # -- physics and placement truth (defaults: not modelled) --
    lens_absolute_magnitude: float = math.nan  # rest frame, AB (scaling relations only)
    lens_luminosity: float = math.nan  # L_sun, rest filter
    lens_stellar_mass: float = math.nan  # M_sun
    source_absolute_magnitude: float = math.nan
    quasar_magnitudes: Mapping[str, float] | None = None  # point source at the source centre
    host: bool = True  # whether the source galaxy (disk, clumps) is drawn
    placement: str = "fixed"  # fixed, lens or sky
    region_radius: float = math.nan  # arcsec: source centres fall uniformly in this disc
    region_widened: bool = False  # the caustics reached beyond the nominal region
    multiply_imaged: bool = False  # source centre inside a caustic or the cut
    tangential_caustic_area: float = 0.0  # arcsec^2
    inner_caustic_area: float = 0.0  # radial caustic or cut, arcsec^2
    days_per_arcsec2: float = math.nan  # time delay per unit Fermat potential
    candidate: int = 0  # which draw of this system passed the selection (0: the first)
    rejections: Mapping[str, int] = dataclasses.field(default_factory=dict)  # earlier candidates, by cut
    selection_flags: Mapping[str, bool] = dataclasses.field(default_factory=dict)  # cut -> passed
    # -- stars_and_halo mass model (simlens.composite_lens); the stars take the lens light's shape --
    stellar_kappa_e: float = 0.0
    halo_mass: float = math.nan  # M200, M_sun
    halo_concentration: float = math.nan
    halo_kappa_s: float = 0.0
    halo_scale_radius: float = math.nan  # arcsec
    halo_ellipticity: float = 0.0
    second_source: SecondSource | None = None
    # -- line of sight (multi-plane) --
    line_of_sight: tuple = ()  # of LineOfSightGalaxy
    cosmology: object = None  # the run's astropy cosmology, for the multi-plane distances
    # -- negatives (simlens.negatives) --
    system_class: str = "lens"  # lens, missed_caustics, source_in_front, or a negative class
    lensing: bool = True  # False: nothing is deflected (negatives)
    source_present: bool = True  # False: no background source (look-alikes)
    extra_light: tuple = ()  # lens-plane look-alike light: (unit-flux profile, {band: mag}) pairs

    # -- models -------------------------------------------------------------------------------
    def mass_model(self) -> MassModel:
        """The deflector: the main profile (its Einstein radius is that of the SIS with the drawn
        velocity dispersion), multipoles, external shear.  A source in front of the lens (sky mode)
        is not deflected at all."""
        composite = self._composite()
        main = build_deflector(self.mass_model_name, self.einstein_radius, self.mass_q, self.mass_angle,
                               self.mass_slope, self.mass_core_radius, self.subhalos, self.multipoles,
                               self.shear_gamma, self.shear_angle, composite=composite, lensing=self.lensing)
        if not self.line_of_sight or not self.lensing:
            return main
        return multi_plane(main, self.z_lens, self.line_of_sight, self.z_source, self.cosmology)

    def _composite(self) -> dict | None:
        if self.mass_model_name != "stars_and_halo" or self.stellar_kappa_e <= 0:
            return None
        return dict(stellar_kappa_e=self.stellar_kappa_e, stellar_r_e=self.lens_half_light_radius,
                    stellar_n=self.lens_sersic_index, stellar_q=self.lens_q, stellar_angle=self.lens_angle,
                    halo_kappa_s=self.halo_kappa_s, halo_scale_radius=self.halo_scale_radius,
                    halo_ellipticity=self.halo_ellipticity)

    def band(self, name: str) -> BandConditions:
        for b in self.bands:
            if b.name == name:
                return b
        raise KeyError(f"system {self.system_id} has no band {name!r}")

    def lens_light(self, band: str) -> LightProfile:
        """The lens galaxy (Sersic), with any look-alike features of a negative, in counts."""
        conditions = self.band(band)
        galaxy = Sersic(flux=conditions.counts_from_magnitude(self.lens_magnitudes[band]),
                        half_light_radius=self.lens_half_light_radius,
                        sersic_index=self.lens_sersic_index, q=self.lens_q, angle=self.lens_angle)
        if not self.extra_light:
            return galaxy
        return CompositeLight((galaxy,) + tuple(shape.with_flux(conditions.counts_from_magnitude(mags[band]))
                                                for shape, mags in self.extra_light))

    def second_source_mass(self) -> MassModel:
        """The deflectors for the second source plane: the main lens (and any line-of-sight
        galaxies) rescaled to its redshift, and the first source as an SIS in its plane."""
        from ..lensing.mass import ScaledDeflector

        second = self.second_source
        main = ScaledDeflector(build_deflector(self.mass_model_name, self.einstein_radius, self.mass_q,
                                               self.mass_angle, self.mass_slope, self.mass_core_radius,
                                               self.subhalos, self.multipoles, self.shear_gamma, self.shear_angle,
                                               composite=self._composite(), lensing=self.lensing),
                               second.deflection_factor)
        planes = [(self.z_lens, main)]
        for g in self.line_of_sight:
            planes.append((g.z, SIS(einstein_radius=g.einstein_radius * g_factor(self, g), center=(g.x, g.y))))
        if second.deflector_einstein_radius > 0:
            planes.append((self.z_source, SIS(einstein_radius=second.deflector_einstein_radius,
                                              center=(self.source_x, self.source_y))))
        if len(planes) == 1:
            return main
        from ..lensing.multiplane import MultiPlaneLens

        planes.sort(key=lambda p: p[0])
        return MultiPlaneLens(planes=tuple(m for _, m in planes), redshifts=tuple(z for z, _ in planes),
                              z_source=second.z, cosmology=self.cosmology)

    def second_source_light(self, band: str) -> LightProfile:
        second = self.second_source
        return Sersic(flux=self.band(band).counts_from_magnitude(second.magnitudes[band]),
                      half_light_radius=second.half_light_radius, sersic_index=second.sersic_index,
                      q=second.q, angle=second.angle, center=(second.x, second.y))

    @property
    def region_area(self) -> float:
        return math.pi * self.region_radius**2

    def quasar_flux(self, band: str) -> float:
        """Counts of the unlensed point source in ``band`` (0 without one)."""
        if self.quasar_magnitudes is None or not self.source_present:
            return 0.0
        return self.band(band).counts_from_magnitude(self.quasar_magnitudes[band])

    def source_light(self, band: str) -> LightProfile:
        """The unlensed source galaxy in the source plane (disk plus clumps), in counts.  A point
        source is not part of it: its images are found and placed by the renderer."""
        conditions = self.band(band)
        if not self.host or not self.source_present:
            return Sersic(flux=0.0, half_light_radius=self.source_half_light_radius,
                          center=(self.source_x, self.source_y))
        disk = Sersic(flux=conditions.counts_from_magnitude(self.source_disk_magnitudes[band]),
                      half_light_radius=self.source_half_light_radius, sersic_index=self.source_sersic_index,
                      q=self.source_q, angle=self.source_angle, center=(self.source_x, self.source_y))
        if not self.clumps:
            return disk
        knots = tuple(
            Sersic(flux=conditions.counts_from_magnitude(c.magnitudes[band]), half_light_radius=c.half_light_radius,
                   sersic_index=CLUMP_SERSIC_INDEX, center=(self.source_x + c.x, self.source_y + c.y))
            for c in self.clumps)
        return CompositeLight((disk,) + knots)

    def source_magnitude(self, band: str) -> float:
        """Total unlensed magnitude of the source galaxy (disk plus clumps) in ``band`` (nan when a
        look-alike negative has no source)."""
        if not self.source_present:
            return math.nan
        flux = 10 ** (-0.4 * self.source_disk_magnitudes[band])
        flux += sum(10 ** (-0.4 * c.magnitudes[band]) for c in self.clumps)
        return -2.5 * math.log10(flux)


def build_deflector(model: str, einstein_radius: float, q: float, angle: float, slope: float,
                    core_radius: float, subhalos: tuple, multipoles: tuple, shear_gamma: float,
                    shear_angle: float, composite: dict | None = None, lensing: bool = True) -> MassModel:
    """The mass model of a system from its truth values (see :meth:`System.mass_model`).  For
    ``stars_and_halo``, ``composite`` holds the stellar Sersic and NFW parameters."""
    theta_e = einstein_radius
    if not lensing or (theta_e <= 0 and composite is None):
        return ConvergenceSheet(kappa=0.0)
    if model == "stars_and_halo":
        c = composite
        lens = (SersicMass(kappa_e=c["stellar_kappa_e"], half_light_radius=c["stellar_r_e"],
                           sersic_index=c["stellar_n"], q=c["stellar_q"], angle=c["stellar_angle"])
                + NFW(kappa_s=c["halo_kappa_s"], scale_radius=c["halo_scale_radius"],
                      ellipticity=c["halo_ellipticity"], angle=angle))
    elif model == "power_law":
        lens = PowerLaw(einstein_radius=theta_e, slope=slope, q=q, angle=angle)
    elif model == "cored_isothermal":
        lens = CoredIsothermal(einstein_radius=theta_e, core_radius=core_radius, q=q, angle=angle)
    else:
        lens = SIE(einstein_radius=theta_e, q=q, angle=angle)
    for sub in subhalos:
        lens = lens + TruncatedSIS(einstein_radius=sub.einstein_radius, truncation_radius=sub.truncation_radius,
                                   center=(sub.x, sub.y))
    for order, strength, relative_angle in (multipoles if theta_e > 0 else ()):
        lens = lens + Multipole(order=order, strength=strength, einstein_radius=theta_e, angle=angle + relative_angle)
    if shear_gamma > 0:
        lens = lens + ExternalShear(gamma=shear_gamma, angle=shear_angle)
    return lens


def g_factor(system: "System", galaxy: "LineOfSightGalaxy") -> float:
    """Rescaling of a line-of-sight galaxy's deflection from the first source to the second."""
    from ..cosmology import distance_ratio

    cosmo = system.cosmology
    return distance_ratio(cosmo, galaxy.z, system.second_source.z) / distance_ratio(cosmo, galaxy.z, system.z_source)


def multi_plane(main: MassModel, z_lens: float, line_of_sight: tuple, z_source: float, cosmology) -> MassModel:
    """The main deflector and the line-of-sight SIS galaxies as a multi-plane lens (planes in
    redshift order; every plane's model normalised for the source, as simlens.multiplane expects)."""
    from ..lensing.multiplane import MultiPlaneLens

    planes = [(z_lens, main)] + [(g.z, SIS(einstein_radius=g.einstein_radius, center=(g.x, g.y)))
                                 for g in line_of_sight]
    planes.sort(key=lambda p: p[0])
    return MultiPlaneLens(planes=tuple(m for _, m in planes), redshifts=tuple(z for z, _ in planes),
                          z_source=z_source, cosmology=cosmology)


def offset_on_sky(ra0: float, dec0: float, position_angle: float, separation: float) -> tuple[float, float]:
    """The point at ``separation`` (deg) from (ra0, dec0) towards ``position_angle`` (deg east of
    north), on the sphere (spherical trigonometry; astropy's SkyCoord.directional_offset_by is the
    reference in the tests)."""
    d0, pa, s = math.radians(dec0), math.radians(position_angle), math.radians(separation)
    sin_dec = math.sin(d0) * math.cos(s) + math.cos(d0) * math.sin(s) * math.cos(pa)
    dec = math.asin(max(-1.0, min(1.0, sin_dec)))
    dra = math.atan2(math.sin(pa) * math.sin(s) * math.cos(d0), math.cos(s) - math.sin(d0) * sin_dec)
    return (ra0 + math.degrees(dra)) % 360.0, math.degrees(dec)


class _GeometryQueue:
    """The (sigma, z_lens, z_source, source anchor magnitude) pairs of one candidate, drawn in
    batches and rejected in bulk where it is cheap.  In lens mode a source must lie behind its lens
    and a pair is kept with probability (D_ls/D_s)^2, the distance part of the cross-section weight
    (sigma^4 is exact in the deflector draw); the Einstein-radius cut is applied here too.  Other
    modes take every pair.  ``rejections`` counts the skipped pairs by cut."""

    def __init__(self, sampler: "PopulationSampler", rng):
        self.sampler, self.rng = sampler, rng
        self.lens_mode = sampler.mode == "lens"
        self.bulk = sampler.deflectors is not None or sampler.source_model is not None
        self.rejections = {"source_in_front": 0, "cross_section": 0, "einstein_radius": 0}
        self._batch = None
        self._cursor = 0

    def _new_batch(self, v: dict) -> None:
        sampler, rng = self.sampler, self.rng
        n = sampler.GEOMETRY_BATCH if (self.bulk and self.lens_mode) else 1
        if sampler.deflectors is not None:
            z_l = sampler.deflectors.draw_redshift(rng.uniform(size=n))
            u_sigma = rng.uniform(size=n)
        else:
            z_l = np.full(n, v["lens.redshift"])
            sigma = np.full(n, v["lens.velocity_dispersion"])
        if sampler.source_model is not None:
            m, z_s = sampler.source_model.draw_magnitudes_and_redshifts(rng, n)
        else:
            m, z_s = np.full(n, math.nan), np.full(n, v["source.redshift"])
        if not self.lens_mode:
            if sampler.deflectors is not None:
                sigma = sampler.deflectors.draw_sigma(u_sigma, z_l)
            ones = np.ones(n, dtype=bool)
            self._batch = (sigma, z_l, z_s, m, ones, ones, ones)
        else:
            u = rng.uniform(size=n)
            behind = z_s > z_l
            ratio = np.where(behind, sampler.distances.distance_ratio(np.minimum(z_l, z_s), z_s), 0.0)
            weighted = behind & ((u <= ratio**2) if sampler.deflectors is not None else True)
            if sampler.deflectors is not None:  # sigma only where a pair can still be kept (the costly part)
                sigma = np.full(n, math.nan)
                sigma[weighted] = sampler.deflectors.draw_sigma(u_sigma[weighted], z_l[weighted])
            kept = weighted
            selection = sampler.recipe.selection
            if (selection.einstein_radius is not None and selection.enforce
                    and sampler.recipe.lens.mass.model != "stars_and_halo"):  # its theta_E is solved later
                theta = 4.0 * math.pi * (sigma / C_KM_S) ** 2 * ratio * ARCSEC_PER_RADIAN
                kept = weighted & (theta >= selection.einstein_radius[0]) & (theta <= selection.einstein_radius[1])
            self._batch = (sigma, z_l, z_s, m, behind, weighted, kept)
        self._cursor = 0

    def _count(self, stop: int) -> None:
        _, _, _, _, behind, weighted, kept = self._batch
        a = self._cursor
        self.rejections["source_in_front"] += int(np.count_nonzero(~behind[a:stop]))
        self.rejections["cross_section"] += int(np.count_nonzero(behind[a:stop] & ~weighted[a:stop]))
        self.rejections["einstein_radius"] += int(np.count_nonzero(weighted[a:stop] & ~kept[a:stop]))

    def next(self, v: dict):
        """The next kept pair as floats, or None when GEOMETRY_BATCHES batches held none."""
        for _ in range(self.sampler.GEOMETRY_BATCHES if self.bulk else 1):
            if self._batch is None or self._cursor >= self._batch[0].size:
                self._new_batch(v)
            kept = self._batch[6]
            remaining = np.flatnonzero(kept[self._cursor:])
            if remaining.size:
                k = self._cursor + int(remaining[0])
                self._count(k)
                self._cursor = k + 1
                sigma, z_l, z_s, m = (float(a[k]) for a in self._batch[:4])
                return sigma, z_l, z_s, m
            self._count(kept.size)
            self._batch = None
            if not self.bulk:
                break
        return None

    def nonzero_rejections(self) -> dict:
        return {k: n for k, n in self.rejections.items() if n}


class SelectionExhausted(SimlensError):
    """No candidate of a system passed the selection within ``selection.max_candidates``."""


class PopulationSampler:
    """Draws :class:`System` objects from a recipe.

    >>> sampler = PopulationSampler(recipe)
    >>> system = sampler.draw(7)      # identical every time, in any process

    A system is drawn as a sequence of *candidates* (``candidate = 0, 1, ...``, each from its own
    random streams); the first that passes the cuts that need no images -- the geometry of the
    placement mode, ``selection.einstein_radius``, ``resolvable`` and ``multiply_imaged`` -- is
    returned, with the number of earlier candidates each cut rejected in ``System.rejections``.
    Cuts on images (magnification, image count, arc S/N) are applied by the renderer's caller,
    which asks for the next candidate with ``draw(system_id, first_candidate=k)``.
    """

    def __init__(self, recipe: Recipe, conditions: tuple | None = None):
        """``conditions``: BandConditions (survey order) that every system takes instead of its
        own draw -- the one set of seeing, sky and depth of a field image."""
        self.recipe = recipe
        self.conditions = conditions
        self.cosmology = recipe.cosmology.build()
        self.distances = DistanceTable(self.cosmology)
        self._parameters = list(recipe.parameters())
        self._grid_paths = [path for path, p in self._parameters if isinstance(p, Grid)]
        # one uniform per parameter (fixed ones included, so adding a distribution to one parameter
        # leaves the others' draws unchanged)
        self._fixed_values = {path: float(p.value) for path, p in self._parameters if isinstance(p, Fixed)}
        self._grid_parameters = [(path, p) for path, p in self._parameters if isinstance(p, Grid)]
        self._random_parameters = [(i, path, p) for i, (path, p) in enumerate(self._parameters)
                                   if not isinstance(p, (Fixed, Grid))]
        self._grid_shape = recipe.grid_shape
        # (band, ((BandConditions field, parameter key path), ...)) for the conditions of each system
        self._band_keys = [(b, tuple((name, f"survey.bands.{b.name}.{path}") for name, path in (
            ("zero_point", "zero_point"), ("sky_brightness", "sky_brightness"), ("exposure_time", "exposure_time"),
            ("gain", "gain"), ("read_noise", "read_noise"), ("psf_fwhm", "psf.fwhm"), ("psf_beta", "psf.beta"))))
            for b in recipe.survey.bands]
        base = str(Path(recipe.origin).parent) if recipe.origin != "<recipe>" else "."
        filters = {b.name: b.filter for b in recipe.survey.bands if b.filter is not None}
        lens, source = recipe.lens, recipe.source
        self.mode = source.position.mode or "fixed"
        self.deflectors = None
        if lens.population is not None:
            pop = lens.population
            # Lens mode draws the population of *lenses*: galaxies weighted by their cross-section,
            # sigma^4 exactly (here) and (D_ls/D_s)^2 by rejection (see _draw_candidate).
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
                                            source.clumps.template, base)
        self.quasar_colours = (PointSourceColours(source.quasar.spectral_index, filters, recipe.reference_band, base)
                               if source.quasar is not None else None)

    @property
    def n_grid_cells(self) -> int:
        return int(math.prod(self._grid_shape)) if self._grid_shape else 1

    @property
    def source_density(self) -> float:
        """Sky mode: sources per arcmin^2 (from source.position.density or the counts)."""
        density = self.recipe.source.position.density
        if density is not None:
            return density
        return self.source_model.sky_density if self.source_model is not None else math.nan

    def draw_parameters(self, system_id: int, streams) -> tuple[dict, tuple]:
        """Every recipe parameter's value for this system, keyed by key path."""
        cell = grid_cell(system_id, self._grid_shape)
        cell_of = dict(zip(self._grid_paths, cell))
        uniforms = streams["parameters"].uniform(size=len(self._parameters)).tolist()
        values = dict(self._fixed_values)
        for index, path, param in self._random_parameters:
            values[path] = float(param.from_uniform(uniforms[index]))
        for path, param in self._grid_parameters:
            values[path] = float(param.at(cell_of[path]))
        return values, cell

    def _draw_subhalos(self, v: dict, theta_e: float, z_lens: float, z_source: float, streams) -> tuple:
        """Masses from dN/dm ~ m^slope on [mass_min, mass_max] (inverse CDF), positions uniform in
        area in the annulus [annulus, annulus_outer] theta_E around the lens centre."""
        n = int(round(v["lens.subhalos.count"]))
        if n == 0 or theta_e <= 0:
            return ()
        rng = streams["physics"]
        settings = self.recipe.lens.subhalos
        k = settings.mass_function_slope + 1.0
        lo, hi = settings.mass_min ** k, settings.mass_max ** k
        masses = (lo + rng.uniform(size=n) * (hi - lo)) ** (1.0 / k)
        r_in, r_out = v["lens.subhalos.annulus"] * theta_e, v["lens.subhalos.annulus_outer"] * theta_e
        radii = np.sqrt(r_in**2 + rng.uniform(size=n) * (r_out**2 - r_in**2))
        phi = rng.uniform(0.0, 2.0 * math.pi, size=n)
        sigma_cr = critical_surface_density(self.cosmology, z_lens, z_source).value  # M_sun / Mpc^2
        d_l = float(self.distances.angular_diameter_distance(z_lens))  # Mpc
        sigma_cr_arcsec2 = sigma_cr * (d_l / ARCSEC_PER_RADIAN) ** 2  # M_sun / arcsec^2
        return tuple(_subhalo(float(m), float(r * math.cos(p)), float(r * math.sin(p)), theta_e, sigma_cr_arcsec2)
                     for m, r, p in zip(masses, radii, phi))

    def _draw_line_of_sight(self, v: dict, z_lens: float, z_source: float, rng) -> tuple:
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
            theta = 4.0 * math.pi * (sigma / C_KM_S) ** 2 * float(self.distances.distance_ratio(z, z_source)) * ARCSEC_PER_RADIAN
            galaxies.append(LineOfSightGalaxy(z=z, velocity_dispersion=sigma, x=x, y=y, einstein_radius=theta))
        return tuple(galaxies)

    def draw_many(self, system_ids) -> list[System]:
        """``[self.draw(i) for i in system_ids]``, several times faster: the geometry of all the
        systems' candidates is computed on arrays (see :mod:`simlens.block_sampling`)."""
        from .block_sampling import draw_many

        return draw_many(self, system_ids)

    def draw(self, system_id: int, first_candidate: int = 0) -> System:
        """The first candidate from ``first_candidate`` on that passes the cuts needing no images."""
        if system_id < 0:
            raise ValueError(f"system_id must be >= 0, got {system_id}")
        selection = self.recipe.selection
        rejections: dict[str, int] = {}
        limit = selection.max_candidates
        for candidate in range(first_candidate, first_candidate + limit):
            system, failed = self._draw_candidate(system_id, candidate)
            if isinstance(failed, str):
                failed = {failed: 1}
            for name, n in (failed or system.rejections).items():  # bulk geometry draws count too
                rejections[name] = rejections.get(name, 0) + n
            if system is not None:
                object.__setattr__(system, "rejections", rejections)  # still private to this call
                return system
        raise SelectionExhausted(_exhausted_message(system_id, limit, rejections))

    def _draw_candidate(self, system_id: int, candidate: int) -> tuple[System | None, str | None]:
        streams = system_streams(self.recipe.seed, system_id, SYSTEM_STREAMS, candidate)
        geometry, rejections = self._geometry(system_id, streams)
        if geometry is None:
            return None, rejections
        return self._finish(system_id, candidate, streams, geometry)

    # What the geometry phase hands to the rest of a candidate (see simlens.block_sampling, which
    # computes the same for many systems at once).
    GEOMETRY_FIELDS = ("v", "cell", "sigma", "z_lens", "z_source", "anchor_magnitude", "behind", "ratio", "theta_e",
                       "mass_q", "mass_angle", "light", "composite_truth", "checks", "deflector", "line_of_sight",
                       "placed", "geometry_rejections")

    def _geometry(self, system_id: int, streams) -> tuple[dict | None, dict | None]:
        """The deflector, the source redshift and the source's place: the tries of one candidate
        (GEOMETRY_FIELDS), or None and the rejections by cut."""
        recipe = self.recipe
        selection = recipe.selection
        queue = _GeometryQueue(self, streams["physics"])
        tries: dict[str, int] = {}

        # -- the deflector, the source redshift and the source's place behind the lens: tried
        #    before the other draws, several times within the candidate's streams (in lens mode a
        #    deflector whose caustics miss the source is replaced whole) --------------------------
        for _ in range(self.TRIES_PER_CANDIDATE):
            v, cell = self.draw_parameters(system_id, streams)
            geometry = queue.next(v)
            if geometry is None:
                return None, _merge_counts(queue.nonzero_rejections(), tries)
            sigma, z_lens, z_source, anchor_magnitude = geometry
            behind = z_source > z_lens
            ratio = float(self.distances.distance_ratio(z_lens, z_source)) if behind else 0.0
            theta_e = 4.0 * math.pi * (sigma / C_KM_S) ** 2 * ratio * ARCSEC_PER_RADIAN
            mass_q, mass_angle = v["lens.mass.q"], v["lens.mass.angle"]
            model = recipe.lens.mass.model
            composite, composite_truth, light = None, {}, None
            if model == "stars_and_halo":
                # the stars follow the light: draw it first; theta_E is then solved for
                light = self.lens_light_model.draw(sigma, z_lens, mass_q, mass_angle, streams["physics"])
                theta_e = 0.0
                if behind:
                    parts = stars_and_halo(light.luminosity, recipe.lens.light.scaling.mass_to_light,
                                           light.half_light_radius, v["lens.light.sersic_index"],
                                           v["lens.mass.halo_mass"], v.get("lens.mass.concentration"),
                                           z_lens, z_source, self.distances)
                    theta_e = parts.einstein_radius
                    composite = dict(stellar_kappa_e=parts.stellar_kappa_e, stellar_r_e=light.half_light_radius,
                                     stellar_n=v["lens.light.sersic_index"], stellar_q=light.q,
                                     stellar_angle=light.angle, halo_kappa_s=parts.halo_kappa_s,
                                     halo_scale_radius=parts.halo_scale_radius,
                                     halo_ellipticity=v["lens.mass.halo_ellipticity"])
                    composite_truth = dict(stellar_kappa_e=parts.stellar_kappa_e, halo_mass=v["lens.mass.halo_mass"],
                                           halo_concentration=parts.halo_concentration,
                                           halo_kappa_s=parts.halo_kappa_s, halo_scale_radius=parts.halo_scale_radius,
                                           halo_ellipticity=v["lens.mass.halo_ellipticity"])
            checks = {}
            if selection.einstein_radius is not None:
                lo, hi = selection.einstein_radius
                checks["einstein_radius"] = lo <= theta_e <= hi
                if selection.enforce and not checks["einstein_radius"]:
                    tries["einstein_radius"] = tries.get("einstein_radius", 0) + 1
                    continue
            deflector = dict(
                mass_model_name=model, mass_q=mass_q, mass_angle=mass_angle,
                mass_slope=v["lens.mass.slope"] if model == "power_law" else 2.0,
                mass_core_radius=v["lens.mass.core_radius"] if model == "cored_isothermal" else 0.0,
                multipoles=tuple((m, v[f"lens.multipoles.m{m}_strength"], v[f"lens.multipoles.m{m}_angle"])
                                 for m in (3, 4) if v[f"lens.multipoles.m{m}_strength"] != 0.0),
                subhalos=self._draw_subhalos(v, theta_e, z_lens, z_source, streams),
                shear_gamma=v["lens.shear.gamma"], shear_angle=v["lens.shear.angle"])
            mass = build_deflector(deflector["mass_model_name"], theta_e, mass_q, mass_angle,
                                   deflector["mass_slope"], deflector["mass_core_radius"], deflector["subhalos"],
                                   deflector["multipoles"], deflector["shear_gamma"], deflector["shear_angle"],
                                   composite=composite)
            line_of_sight = self._draw_line_of_sight(v, z_lens, z_source, streams["physics"]) if behind else ()
            if line_of_sight and theta_e > 0:
                mass = multi_plane(mass, z_lens, line_of_sight, z_source, self.cosmology)
            placed = self._place(mass, theta_e, v, streams["physics"])
            if placed is None:
                tries["placement"] = tries.get("placement", 0) + 1
                continue
            if selection.multiply_imaged:
                checks["multiply_imaged"] = placed["multiply_imaged"]
                if selection.enforce and not placed["multiply_imaged"]:
                    tries["multiply_imaged"] = tries.get("multiply_imaged", 0) + 1
                    continue
            break
        else:
            return None, _merge_counts(queue.nonzero_rejections(), tries)
        geometry_rejections = _merge_counts(queue.nonzero_rejections(), tries)
        return dict(v=v, cell=cell, sigma=sigma, z_lens=z_lens, z_source=z_source, anchor_magnitude=anchor_magnitude,
                    behind=behind, ratio=ratio, theta_e=theta_e, mass_q=mass_q, mass_angle=mass_angle, light=light,
                    composite_truth=composite_truth, checks=checks, deflector=deflector, line_of_sight=line_of_sight,
                    placed=placed, geometry_rejections=geometry_rejections), None

    def _finish(self, system_id: int, candidate: int, streams, geometry: dict) -> tuple[System | None, dict | None]:
        """The rest of a candidate after its geometry: photometry, lens light, clumps, conditions,
        the resolvable cut, sky position, class."""
        recipe = self.recipe
        ref = recipe.reference_band
        band_names = recipe.survey.band_names
        source_settings = recipe.source
        selection = recipe.selection
        (v, cell, sigma, z_lens, z_source, anchor_magnitude, behind, ratio, theta_e, mass_q, mass_angle, light,
         composite_truth, checks, deflector, line_of_sight, placed, geometry_rejections) = (
            geometry[name] for name in self.GEOMETRY_FIELDS)
        photometry = geometry.get("photometry")  # drawn already by simlens.block_sampling
        if photometry is None and self.source_model is not None:
            photometry = self.source_model.complete(anchor_magnitude, z_source, streams["physics"])

        # -- lens light ----------------------------------------------------------------------
        def magnitudes(base: float, prefix: str) -> dict:
            return {b: base + (0.0 if b == ref else v[f"{prefix}.{b}"]) for b in band_names}

        lens_extra = dict(composite_truth)
        if self.lens_light_model is not None:
            if light is None:
                light = self.lens_light_model.draw(sigma, z_lens, mass_q, mass_angle, streams["physics"])
            lens_mags, lens_r_e, lens_q, lens_angle = light.magnitudes, light.half_light_radius, light.q, light.angle
            lens_extra.update(lens_absolute_magnitude=light.absolute_magnitude, lens_luminosity=light.luminosity,
                              lens_stellar_mass=light.stellar_mass)
        else:
            lens_mags = magnitudes(v["lens.light.magnitude"], "lens.light.colors")
            lens_r_e, lens_q, lens_angle = v["lens.light.half_light_radius"], v["lens.light.q"], v["lens.light.angle"]

        # -- source galaxy: the anchor magnitude is the total (disk + clumps) in the anchor band --
        if photometry is not None:
            anchor_mag, source_r_e = photometry.anchor_magnitude, photometry.half_light_radius
            disk_colors, clump_colors = photometry.disk_colors, photometry.clump_colors
        else:
            anchor_mag, source_r_e = v["source.magnitude"], v["source.half_light_radius"]
            disk_colors = {b: 0.0 if b == ref else v[f"source.colors.{b}"] for b in band_names}
            prefix = "source.clumps.colors" if source_settings.clumps.colors else "source.colors"
            clump_colors = {b: 0.0 if b == ref else v[f"{prefix}.{b}"] for b in band_names}
        n_clumps = int(round(v["source.clumps.count"]))
        clump_fraction = v["source.clumps.flux_fraction"] if n_clumps > 0 else 0.0
        disk_mags = {b: anchor_mag + disk_colors[b] - 2.5 * math.log10(1.0 - clump_fraction) for b in band_names}
        clumps = ()
        if n_clumps > 0:
            rng = streams["physics"]
            weights = rng.uniform(0.5, 1.5, size=n_clumps)
            weights = weights / weights.sum()
            offsets = rng.normal(0.0, v["source.clumps.spread"] * source_r_e, size=(n_clumps, 2))
            clump_anchor = anchor_mag - 2.5 * math.log10(clump_fraction)
            clumps = tuple(
                Clump(x=float(dx), y=float(dy), half_light_radius=v["source.clumps.half_light_radius"],
                      magnitudes={b: clump_anchor + clump_colors[b] - 2.5 * math.log10(w) for b in band_names})
                for (dx, dy), w in zip(offsets, weights))
        quasar_mags = None
        if source_settings.quasar is not None:
            colours = self.quasar_colours.colors(z_source)
            quasar_mags = {b: v["source.quasar.magnitude"] + colours[b] for b in band_names}

        # -- observing conditions ------------------------------------------------------------
        bands = self.conditions or tuple(
            BandConditions(name=b.name, pixel_scale=recipe.survey.pixel_scale, psf_profile=b.psf.profile,
                           **{name: v[key] for name, key in keys})
            for b, keys in self._band_keys)

        # -- a second source plane ------------------------------------------------------------------
        second = None
        settings2 = source_settings.second
        if settings2 is not None and behind and v["source.second.redshift"] > z_source and theta_e > 0:
            z2 = v["source.second.redshift"]
            factor = float(self.distances.distance_ratio(z_lens, z2)) / ratio
            sigma_d = v["source.second.deflector_velocity_dispersion"]
            theta_d = 4.0 * math.pi * (sigma_d / C_KM_S) ** 2 * float(self.distances.distance_ratio(z_source, z2)) * ARCSEC_PER_RADIAN
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
                return None, _merge_counts(geometry_rejections, {"resolvable": 1})

        # -- sky position and noise seeds (after the cuts, from their own streams) ---------------
        fp = recipe.footprint
        rng = streams["observation"]
        cos_sep = 1.0 - rng.uniform() * (1.0 - math.cos(math.radians(fp.radius)))
        ra, dec = offset_on_sky(fp.ra, fp.dec, rng.uniform(0.0, 360.0), math.degrees(math.acos(cos_sep)))
        noise_seeds = tuple(int(s) for s in streams["observation"].integers(1, 2**31 - 1, size=len(bands)))

        days_per_arcsec2 = geometry.get("days_per_arcsec2")  # computed already by simlens.block_sampling
        if days_per_arcsec2 is None:
            days_per_arcsec2 = self.distances.fermat_to_days(z_lens, z_source) if behind else math.nan
        system_class = ("lens" if placed["multiply_imaged"] else
                        "source_in_front" if z_source <= z_lens else "missed_caustics")
        system = System(
            system_id=int(system_id), grid_cell=cell, system_class=system_class, ra=ra, dec=dec, z_lens=z_lens, z_source=z_source,
            velocity_dispersion=sigma, einstein_radius=theta_e, **deflector,
            line_of_sight=line_of_sight, second_source=second,
            cosmology=self.cosmology if (line_of_sight or second is not None) else None,
            lens_magnitudes=lens_mags, lens_half_light_radius=lens_r_e,
            lens_sersic_index=v["lens.light.sersic_index"], lens_q=lens_q, lens_angle=lens_angle,
            source_disk_magnitudes=disk_mags, source_half_light_radius=source_r_e,
            source_sersic_index=v["source.sersic_index"], source_q=v["source.q"], source_angle=v["source.angle"],
            clumps=clumps, bands=bands, noise_seeds=noise_seeds, selection_flags=checks, **placed,
            source_absolute_magnitude=photometry.absolute_magnitude if photometry is not None else math.nan,
            quasar_magnitudes=quasar_mags,
            host=source_settings.quasar.host if source_settings.quasar is not None else True,
            days_per_arcsec2=days_per_arcsec2,
            candidate=candidate, rejections=geometry_rejections, **lens_extra)
        system = self._classify(system, streams)
        return system, None

    def _classify(self, system: System, streams) -> System:
        """A share ``negatives.fraction`` of the systems becomes a negative (see negatives.py); the
        others keep the class they were made with.  The negatives stream is made only when needed."""
        negatives = self.recipe.negatives
        rng = streams["negatives"] if negatives.fraction > 0 else None
        if rng is not None and rng.uniform() < negatives.fraction:
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
            changes = dict(system_class=kind, lensing=False, multiply_imaged=False, extra_light=extra,
                           second_source=None,
                           selection_flags=flags,
                           source_present=kind == "unlensed_source", tangential_caustic_area=0.0,
                           inner_caustic_area=0.0)
            if kind == "unlensed_source":
                x, y = _uniform_in_annulus(0.3 * scale, 2.5 * scale, rng)
                changes.update(source_x=x, source_y=y)
            return dataclasses.replace(system, **changes)
        return system

    GEOMETRY_BATCH = 64
    GEOMETRY_BATCHES = 64  # batches per candidate before it counts as rejected
    TRIES_PER_CANDIDATE = 64  # deflectors tried (sharing the candidate's streams) before rejection

    def _place(self, mass: MassModel, theta_e: float, v: dict, rng) -> dict | None:
        """The source centre and placement truth by the placement mode (System fields); None when a
        lens-mode candidate must be redrawn."""
        pos = self.recipe.source.position
        if self.mode == "fixed" and pos.x is not None:
            x, y = v["source.position.x"], v["source.position.y"]
            return self._with_caustics(mass, theta_e, x, y, math.hypot(x, y), False)
        if self.mode == "fixed":
            radius_factor = v.get("source.position.radius_in_einstein_radii", DEFAULT_RADIUS_IN_EINSTEIN_RADII)
            radius = radius_factor * theta_e
            x, y = _uniform_in_disc(radius, rng)
            return self._with_caustics(mass, theta_e, x, y, radius, False)
        caustics = find_caustics(mass, theta_e) if theta_e > 0 else None
        reach = caustics.max_radius if caustics is not None else 0.0
        if self.mode == "lens":
            radius = pos.region_radius_in_einstein_radii * theta_e
        else:  # sky: one source per 1 / density of area (see DEVELOPERS.md, "placement modes")
            radius = math.sqrt(3600.0 / (math.pi * self.source_density))
        widened = reach > radius
        radius = max(radius, 1.02 * reach)
        # Explicit lens distributions keep their deflector and re-place the source; a physical
        # population redraws the whole candidate, which weights lenses by their cross-section.
        tries = 1 if (self.mode == "sky" or self.deflectors is not None) else LENS_MODE_PLACEMENT_TRIES
        for _ in range(tries):
            x, y = _uniform_in_disc(radius, rng)
            multiple = bool(caustics.multiply_imaged(x, y)) if caustics is not None else False
            if multiple or self.mode == "sky":
                return self._with_caustics(mass, theta_e, x, y, radius, widened, caustics, multiple)
        return None

    def _with_caustics(self, mass: MassModel, theta_e: float, x: float, y: float, radius: float, widened: bool,
                       caustics: CausticSet | None = None, multiple: bool | None = None) -> dict:
        if caustics is None and theta_e > 0:
            caustics = find_caustics(mass, theta_e)
        tangential = caustics.caustic("tangential") if caustics is not None else None
        inner = next((c for c in caustics.caustics if c.kind != "tangential"), None) if caustics is not None else None
        return dict(
            source_x=float(x), source_y=float(y), placement=self.mode, region_radius=float(radius),
            region_widened=bool(widened),
            multiply_imaged=(multiple if multiple is not None else
                             bool(caustics.multiply_imaged(x, y)) if caustics is not None else False),
            tangential_caustic_area=tangential.area if tangential is not None else 0.0,
            inner_caustic_area=inner.area if inner is not None else 0.0)


LENS_MODE_PLACEMENT_TRIES = 1000


def _uniform_in_annulus(r_in: float, r_out: float, rng) -> tuple[float, float]:
    r = math.sqrt(r_in**2 + rng.uniform() * (r_out**2 - r_in**2))
    phi = rng.uniform(0.0, 2.0 * math.pi)
    return r * math.cos(phi), r * math.sin(phi)


def _uniform_in_disc(radius: float, rng) -> tuple[float, float]:
    r = radius * math.sqrt(rng.uniform())
    phi = rng.uniform(0.0, 2.0 * math.pi)
    return r * math.cos(phi), r * math.sin(phi)


def _merge_counts(a: dict, b: dict) -> dict:
    out = dict(a)
    for name, n in b.items():
        out[name] = out.get(name, 0) + n
    return out


def _exhausted_message(system_id: int, limit: int, rejections: dict) -> str:
    worst = ", ".join(f"{name} {n}" for name, n in sorted(rejections.items(), key=lambda kv: -kv[1]))
    return (f"selection: none of {limit} candidates for system {system_id} passed the cuts "
            f"(rejected by: {worst}); loosen the [selection] cuts or widen the populations, or raise "
            f"selection.max_candidates")


def _subhalo(mass: float, x: float, y: float, theta_e: float, sigma_cr_arcsec2: float) -> "Subhalo":
    """A truncated SIS of total mass ``pi Sigma_cr b a`` with the tidal truncation ``a = sqrt(b theta_E)``
    of an SIS subhalo in an SIS host (Metcalf & Madau 2001, from memory); solved for b."""
    b = (mass / (math.pi * sigma_cr_arcsec2 * math.sqrt(theta_e))) ** (2.0 / 3.0)
    return Subhalo(x=x, y=y, mass=mass, einstein_radius=b, truncation_radius=math.sqrt(b * theta_e))


# When neither x/y nor radius_in_einstein_radii is given, sources fall uniformly in area inside one
# Einstein radius (for an SIS that is exactly the multiply-imaged region; common practice).
DEFAULT_RADIUS_IN_EINSTEIN_RADII = 1.0

"""The truth record of one lens system: plain numbers, and the model objects they stand for.

A :class:`System` is what the sampler draws (:mod:`simlens.truth.sampler`) and what the truth
catalogue writes: the lens, its source(s) and the observing conditions in every band.  Its methods
build the mass and light models the renderer needs from those numbers.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Mapping

from ..cosmology import distance_ratio
from ..imaging.light import CompositeLight, LightProfile, Sersic
from ..lensing.mass import (NFW, SIE, SIS, ConvergenceSheet, CoredIsothermal, ExternalShear, MassModel, Multipole,
                            PowerLaw, ScaledDeflector, SersicMass, TruncatedSIS)
from ..lensing.multiplane import MultiPlaneLens
from .conditions import BandConditions

__all__ = ["System", "Clump", "Subhalo", "LineOfSightGalaxy", "SecondSource", "build_deflector", "CLUMP_SERSIC_INDEX"]

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
    cosmo = system.cosmology
    return distance_ratio(cosmo, galaxy.z, system.second_source.z) / distance_ratio(cosmo, galaxy.z, system.z_source)


def multi_plane(main: MassModel, z_lens: float, line_of_sight: tuple, z_source: float, cosmology) -> MassModel:
    """The main deflector and the line-of-sight SIS galaxies as a multi-plane lens (planes in
    redshift order; every plane's model normalised for the source, as simlens.multiplane expects)."""
    planes = [(z_lens, main)] + [(g.z, SIS(einstein_radius=g.einstein_radius, center=(g.x, g.y)))
                                 for g in line_of_sight]
    planes.sort(key=lambda p: p[0])
    return MultiPlaneLens(planes=tuple(m for _, m in planes), redshifts=tuple(z for z, _ in planes),
                          z_source=z_source, cosmology=cosmology)

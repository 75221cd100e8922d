"""The truth record of one lens system: plain numbers.

A :class:`System` is what the sampler draws (:mod:`simlens.truth.sampler`) and what the truth
catalogue writes: the lens, its source(s) and the observing conditions in every band.  The model
objects these numbers stand for are built by :func:`simlens.imaging.scene.build_scene`.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Mapping

from .conditions import BandConditions

__all__ = ["System", "Clump", "Subhalo", "LineOfSightGalaxy", "SecondSource", "LensEnvelope"]


@dataclass(frozen=True)
class LensEnvelope:
    """The lens light as two Sersics (``[lens.light.envelope]``): a compact core, with the lens
    light's index, axis ratio and angle, and an extended envelope; magnitudes per band (AB).  The
    system's ``lens_magnitudes`` and ``lens_half_light_radius`` are of their sum."""

    core_magnitudes: Mapping[str, float]
    core_half_light_radius: float  # arcsec, circularised
    magnitudes: Mapping[str, float]
    half_light_radius: float  # arcsec, circularised
    sersic_index: float
    q: float


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
    # its satellite galaxy (lens.subhalos.light): AB magnitudes per band, or None
    magnitudes: Mapping[str, float] | None = None
    stellar_mass: float = math.nan  # M_sun
    half_light_radius: float = math.nan  # arcsec (an exponential disk)


@dataclass(frozen=True)
class LineOfSightGalaxy:
    """An SIS deflector in its own lens plane: redshift, velocity dispersion (km/s), position
    (arcsec, in its plane) and Einstein radius for the system's source (arcsec)."""

    z: float
    velocity_dispersion: float
    x: float
    y: float
    einstein_radius: float
    # its light (lens.line_of_sight.light): an early-type Sersic, AB magnitudes per band, or None
    magnitudes: Mapping[str, float] | None = None
    half_light_radius: float = math.nan  # arcsec, circularised, in its own plane
    sersic_index: float = 4.0
    q: float = 1.0
    angle: float = 0.0  # deg CCW from +x


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
    # -- stars_and_halo mass model (lensing/stars_and_halo.py); the stars take the lens light's shape --
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
    lens_envelope: LensEnvelope | None = None  # two-component lens light ([lens.light.envelope])
    # -- a bulge inside the source's disk ([source.bulge]), aligned with it --
    source_bulge_magnitudes: Mapping[str, float] | None = None
    source_bulge_half_light_radius: float = math.nan  # arcsec
    source_bulge_sersic_index: float = math.nan
    source_bulge_q: float = math.nan
    # -- a source shaped by an image stamp ([source.stamps]) --
    source_stamp: object = None  # imaging.light.ImageLight of unit flux, centred, unturned; or None
    source_stamp_index: int = -1  # its row in the catalogue
    source_stamp_magnitude: float = math.nan  # the catalogue's magnitude and redshift of it
    source_stamp_redshift: float = math.nan
    source_stamp_psf_fwhm: float = math.nan  # arcsec: the stamp's own resolution
    # -- crowded cutouts ([neighbours]): unlensed galaxies and stars, 0-based cutout pixels --
    neighbours: object = None  # populations.background.BackgroundObjects, or None
    # -- a source that varies in time ([source.supernova], [source.quasar.variability]) --
    transient_kind: str = ""  # "sn_ia", "quasar" or "" (none)
    light_curve: object = None  # transients: TabulatedLightCurve or DampedRandomWalk (magnitudes_at)
    transient_peak_mjd: float = math.nan  # supernova: observer-frame time of the rest-frame B maximum
    transient_stretch: float = math.nan
    transient_peak_absolute_magnitude: float = math.nan  # rest-frame B (AB) after the stretch term
    black_hole_mass: float = math.nan  # quasar: log10 M_sun
    variability_tau: float = math.nan  # quasar: rest-frame damping time, days
    quasar_absolute_magnitude_i: float = math.nan  # M_i (rest 750 nm) of the power-law continuum

    def band(self, name: str) -> BandConditions:
        for b in self.bands:
            if b.name == name:
                return b
        raise KeyError(f"system {self.system_id} has no band {name!r}")

    @property
    def region_area(self) -> float:
        return math.pi * self.region_radius**2

    def source_magnitude(self, band: str) -> float:
        """Total unlensed magnitude of the source galaxy (disk, bulge and clumps) in ``band`` (nan when a
        look-alike negative has no source)."""
        if not self.source_present:
            return math.nan
        flux = 10 ** (-0.4 * self.source_disk_magnitudes[band])
        if self.source_bulge_magnitudes is not None:
            flux += 10 ** (-0.4 * self.source_bulge_magnitudes[band])
        flux += sum(10 ** (-0.4 * c.magnitudes[band]) for c in self.clumps)
        return -2.5 * math.log10(flux)

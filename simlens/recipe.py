"""Recipes: TOML files that describe a survey, a cosmology and the lens and source populations.

A recipe is data.  It is read with the standard library's ``tomllib``, checked completely before any
work starts, and turned into the frozen settings objects below -- the same objects the Python API
takes.  Nothing in a recipe is evaluated as code.

The settings classes *are* the schema: each field's metadata says what it accepts (a number or a
distribution, its range, whether it must be an integer, text choices), and one validator walks them.
To add a recipe key, add a field to the right class; the validator, the error messages and
``simlens check`` pick it up.

Numeric parameters (fields made with :func:`parameter`) accept::

    q = 0.8                                   # a fixed value
    q = { uniform = [0.5, 1.0] }
    einstein_radius = { log_uniform = [0.5, 3.0] }
    velocity_dispersion = { normal = [230, 40], within = [150, 350] }
    sersic_index = { choice = [1, 2, 4], weights = [2, 1, 1] }
    psf.fwhm = { grid = [0.6, 0.8, 1.0] }      # systematic values; grids combine as a product

See ``recipes/demo.toml`` for a complete, commented example.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterator, Mapping

from .errors import RecipeError
from .sampling import Choice, Fixed, Grid, LogUniform, Parameter, TruncatedNormal, Uniform

__all__ = [
    "Recipe",
    "SurveySettings",
    "BandSettings",
    "PsfSettings",
    "CosmologySettings",
    "FootprintSettings",
    "LensSettings",
    "MassSettings",
    "ShearSettings",
    "LensLightSettings",
    "SourceSettings",
    "SourcePositionSettings",
    "ClumpSettings",
    "OutputSettings",
    "FieldSettings",
    "FieldGalaxySettings",
    "FieldStarSettings",
    "SelectionSettings",
    "SecondSourceSettings",
    "LineOfSightSettings",
    "NegativeSettings",
    "DeflectorPopulationSettings",
    "LensLightScalingSettings",
    "SourceCountsSettings",
    "QuasarSettings",
    "MultipoleSettings",
    "SubhaloSettings",
    "load_recipe",
    "parse_recipe",
]

_INF = math.inf


# ------------------------------------------------------------------------------------------------
# Field declarations
# ------------------------------------------------------------------------------------------------
def parameter(default: float | None = None, *, low: float = -_INF, high: float = _INF,
              low_open: bool = False, high_open: bool = False, integer: bool = False,
              optional: bool = False, doc: str = "", unit: str = ""):
    """A numeric parameter that may be fixed, a distribution or a grid (see the module docstring)."""
    meta = dict(kind="parameter", low=low, high=high, low_open=low_open, high_open=high_open,
                integer=integer, doc=doc, unit=unit)
    if default is not None:
        return field(default=Fixed(default), metadata=meta)
    if optional:
        return field(default=None, metadata=meta)
    return field(metadata=meta)


def number(default: float | None = None, *, low: float = -_INF, high: float = _INF,
           low_open: bool = False, high_open: bool = False, integer: bool = False,
           optional: bool = False, doc: str = "", unit: str = ""):
    """A plain number (no distribution), e.g. the pixel scale or the seed."""
    meta = dict(kind="number", low=low, high=high, low_open=low_open, high_open=high_open,
                integer=integer, doc=doc, unit=unit)
    if default is not None:
        return field(default=default, metadata=meta)
    if optional:
        return field(default=None, metadata=meta)
    return field(metadata=meta)


def text(default: str | None = None, *, choices: tuple[str, ...] = (), optional: bool = False, doc: str = ""):
    meta = dict(kind="text", choices=choices, doc=doc)
    if default is not None:
        return field(default=default, metadata=meta)
    if optional:
        return field(default=None, metadata=meta)
    return field(metadata=meta)


def flag(default: bool, *, doc: str = ""):
    """A true/false switch."""
    return field(default=default, metadata=dict(kind="flag", doc=doc))


def table(factory, *, doc: str = "", optional: bool = False):
    """A sub-table parsed into the settings class ``factory``."""
    meta = dict(kind="table", cls=factory, doc=doc)
    if optional:
        return field(default=None, metadata=meta)
    return field(default_factory=factory, metadata=meta)


def interval(default: tuple | None = None, *, low: float = -_INF, high: float = _INF, doc: str = "",
             unit: str = "", optional: bool = False):
    """A ``[low, high]`` pair of plain numbers with ``low < high``, inside ``[low, high]`` bounds."""
    meta = dict(kind="interval", low=low, high=high, doc=doc, unit=unit)
    if default is not None:
        return field(default=tuple(default), metadata=meta)
    if optional:
        return field(default=None, metadata=meta)
    return field(metadata=meta)


def band_colors(*, doc: str = ""):
    """``{ band = parameter }`` giving ``m_band - m_reference`` for every non-reference band."""
    return field(default_factory=dict, metadata=dict(kind="band_colors", doc=doc))


# ------------------------------------------------------------------------------------------------
# Settings (frozen; the schema lives in the field metadata)
# ------------------------------------------------------------------------------------------------
@dataclass(frozen=True, kw_only=True)
class PsfSettings:
    profile: str = text("moffat", choices=("moffat", "kolmogorov"),
                        doc="PSF shape: Moffat (with beta) or Kolmogorov")
    fwhm: Parameter = parameter(low=0, low_open=True, unit="arcsec", doc="PSF full width at half maximum")
    beta: Parameter = parameter(3.0, low=1.1, low_open=True, doc="Moffat beta (ignored for kolmogorov)")


@dataclass(frozen=True, kw_only=True)
class BandSettings:
    zero_point: Parameter = parameter(low=0, low_open=True, unit="mag",
                                      doc="AB magnitude of a source giving 1 electron per second")
    sky_brightness: Parameter = parameter(low=0, low_open=True, unit="mag/arcsec^2",
                                          doc="sky surface brightness (AB)")
    exposure_time: Parameter = parameter(low=0, low_open=True, unit="s", doc="total exposure time")
    gain: Parameter = parameter(low=0, low_open=True, unit="electron/adu", doc="detector gain")
    read_noise: Parameter = parameter(0.0, low=0, unit="electron", doc="read noise per pixel (all exposures)")
    psf: PsfSettings = table(PsfSettings, doc="point-spread function")
    filter: str = text(optional=True, doc="filter curve: a GalSim filter name (e.g. 'LSST_r') or a file "
                                          "of 'nm throughput' lines, relative to the recipe; needed "
                                          "for template colours")
    name: str = ""  # filled from the table key


@dataclass(frozen=True, kw_only=True)
class SurveySettings:
    name: str = text("unnamed survey", doc="survey name, copied to outputs")
    pixel_scale: float = number(low=0, low_open=True, unit="arcsec/pixel", doc="pixel scale")
    cutout_size: int = number(64, low=8, high=4096, integer=True, unit="pixel", doc="cutout side")
    supersampling: int = number(4, low=1, high=32, integer=True,
                                doc="rays per pixel side for the lensed scene")
    adaptive_supersampling: bool = flag(True, doc="re-trace pixels with 4x more rays per side where "
                                                  "the lensed source varies within them")
    reference_band: str = text(optional=True, doc="band in which magnitudes are given (default: first)")
    bands: tuple = field(default=(), metadata=dict(kind="bands", doc="one table per band"))

    def band(self, name: str) -> BandSettings:
        for b in self.bands:
            if b.name == name:
                return b
        raise KeyError(name)

    @property
    def band_names(self) -> tuple[str, ...]:
        return tuple(b.name for b in self.bands)


@dataclass(frozen=True, kw_only=True)
class CosmologySettings:
    name: str = text(optional=True, doc="an astropy realisation, e.g. Planck18")
    H0: float = number(optional=True, low=0, low_open=True, unit="km/s/Mpc", doc="Hubble constant")
    Om0: float = number(optional=True, low=0, high=2, doc="matter density today")
    Ode0: float = number(optional=True, low=-1, high=3, doc="dark-energy density (omit for flat)")
    Tcmb0: float = number(0.0, low=0, unit="K", doc="CMB temperature")

    def build(self):
        from .cosmology import flat_or_curved_cosmology, named_cosmology

        if self.name is not None:
            return named_cosmology(self.name)
        return flat_or_curved_cosmology(self.H0, self.Om0, self.Ode0, self.Tcmb0)


@dataclass(frozen=True, kw_only=True)
class FootprintSettings:
    # Default: an invented field, "Corvus Deep Patch" (illustrative, not a real survey field).
    ra: float = number(182.5, low=0, high=360, unit="deg", doc="centre right ascension")
    dec: float = number(-21.0, low=-90, high=90, unit="deg", doc="centre declination")
    radius: float = number(1.0, low=0, low_open=True, high=180, unit="deg", doc="footprint radius")


MASS_MODELS = ("sie", "power_law", "cored_isothermal", "stars_and_halo")


@dataclass(frozen=True, kw_only=True)
class MassSettings:
    model: str = text("sie", choices=MASS_MODELS, doc="mass profile of the lens galaxies")
    q: Parameter = parameter(0.8, low=0, low_open=True, high=1, doc="mass axis ratio")
    angle: Parameter = parameter(0.0, unit="deg", doc="major-axis angle, CCW from +x")
    slope: Parameter = parameter(2.0, low=1, low_open=True, high=3, high_open=True,
                                 doc="3D density slope (power_law; 2 = isothermal)")
    core_radius: Parameter = parameter(0.05, low=0, low_open=True, unit="arcsec",
                                       doc="core radius (cored_isothermal)")
    halo_mass: Parameter = parameter(optional=True, low=1e9, high=1e16, unit="M_sun",
                                     doc="NFW halo M200 (stars_and_halo: Sersic stars following the light + NFW)")
    concentration: Parameter = parameter(optional=True, low=1, high=50,
                                         doc="NFW c200 (stars_and_halo; default: Duffy et al. 2008)")
    halo_ellipticity: Parameter = parameter(0.0, low=0, high=0.25,
                                            doc="ellipticity of the halo's potential (stars_and_halo; along the mass angle)")


@dataclass(frozen=True, kw_only=True)
class MultipoleSettings:
    m3_strength: Parameter = parameter(0.0, low=-0.2, high=0.2, doc="m = 3 multipole amplitude a_3")
    m3_angle: Parameter = parameter(0.0, unit="deg", doc="m = 3 angle, relative to the mass major axis")
    m4_strength: Parameter = parameter(0.0, low=-0.2, high=0.2, doc="m = 4 multipole amplitude a_4")
    m4_angle: Parameter = parameter(0.0, unit="deg",
                                    doc="m = 4 angle relative to the mass major axis (0 disky, 45 boxy)")


@dataclass(frozen=True, kw_only=True)
class SubhaloSettings:
    count: Parameter = parameter(0, low=0, high=1000, integer=True, doc="subhalos per lens")
    mass_min: float = number(1e6, low=0, low_open=True, unit="M_sun", doc="lightest subhalo")
    mass_max: float = number(1e10, low=0, low_open=True, unit="M_sun", doc="heaviest subhalo")
    mass_function_slope: float = number(-1.9, low=-3, high=-1.01,
                                        doc="dN/dm ~ m^slope (-1.9: Springel et al. 2008, from memory)")
    annulus: Parameter = parameter(0.5, low=0, doc="inner radius of the placement annulus, in Einstein radii")
    annulus_outer: Parameter = parameter(1.5, low=0, low_open=True,
                                         doc="outer radius of the placement annulus, in Einstein radii")


@dataclass(frozen=True, kw_only=True)
class LineOfSightSettings:
    count: Parameter = parameter(0, low=0, high=30, integer=True,
                                 doc="SIS galaxies along the line of sight, each in its own lens plane")
    velocity_dispersion: Parameter = parameter(100.0, low=10, high=500, unit="km/s",
                                               doc="their velocity dispersions (drawn for each)")
    radius: float = number(8.0, low=0, low_open=True, unit="arcsec",
                           doc="they fall uniformly in a disc of this radius around the lens")
    redshift_min: float = number(0.02, low=0, low_open=True, doc="nearest redshift; the farthest is the source's")


@dataclass(frozen=True, kw_only=True)
class ShearSettings:
    gamma: Parameter = parameter(0.0, low=0, high=0.5, doc="external shear strength")
    angle: Parameter = parameter(0.0, unit="deg", doc="shear angle, CCW from +x")


VELOCITY_FUNCTION_NAMES = ("choi2007", "sheth2003")
TEMPLATE_NAMES = ("elliptical", "spiral", "late_spiral", "irregular")


@dataclass(frozen=True, kw_only=True)
class DeflectorPopulationSettings:
    velocity_function: str = text("choi2007", choices=VELOCITY_FUNCTION_NAMES,
                                  doc="published velocity dispersion function (modified Schechter)")
    redshift_range: tuple = interval((0.1, 1.0), low=0.0, high=6.0, doc="lens redshifts")
    velocity_dispersion_range: tuple = interval((100.0, 400.0), low=10.0, high=1500.0, unit="km/s",
                                                doc="velocity dispersions")
    density_evolution: float = number(0.0, low=-10, high=10, doc="phi_*(z) = phi_*(0) (1 + z)^this")
    sigma_evolution: float = number(0.0, low=-5, high=5, doc="sigma_*(z) = sigma_*(0) (1 + z)^this")


@dataclass(frozen=True, kw_only=True)
class LensLightScalingSettings:
    template: str = text("elliptical", choices=TEMPLATE_NAMES, doc="spectral template of the lens light")
    rest_filter: str = text("LSST_r", doc="rest-frame filter of the relations (r band)")
    faber_jackson_slope: float = number(4.0, low=1, high=8, doc="L ~ sigma^slope (Faber & Jackson 1976)")
    faber_jackson_magnitude: float = number(-21.6, low=-30, high=-10, unit="mag",
                                            doc="rest-frame absolute magnitude (AB) at the reference sigma")
    faber_jackson_sigma: float = number(200.0, low=10, high=1000, unit="km/s", doc="reference sigma")
    faber_jackson_scatter: float = number(0.4, low=0, high=3, unit="mag", doc="scatter in magnitude")
    plane_a: float = number(1.49, low=0, high=5, doc="fundamental plane: log R_e = a log sigma + b mu_e + c")
    plane_b: float = number(0.30, low=0.2, low_open=True, high=1.0, doc="fundamental plane b (mu_e in mag/arcsec^2)")
    plane_c: float = number(-8.778, low=-30, high=30, doc="fundamental plane c (R_e in kpc)")
    plane_scatter: float = number(0.1, low=0, high=1, doc="scatter of log10 R_e (dex)")
    q_scatter: float = number(0.1, low=0, high=1, doc="light axis ratio = mass axis ratio + N(0, this)")
    angle_scatter: float = number(10.0, low=0, high=90, unit="deg", doc="light angle = mass angle + N(0, this)")
    mass_to_light: float = number(optional=True, low=0, low_open=True,
                                  doc="stellar M/L in the rest filter (M_sun/L_sun), for the stellar-mass truth")


@dataclass(frozen=True, kw_only=True)
class LensLightSettings:
    magnitude: Parameter = parameter(optional=True, low=0, high=40, unit="mag", doc="AB magnitude in the reference band")
    colors: dict = band_colors(doc="m_band - m_reference for each other band")
    half_light_radius: Parameter = parameter(optional=True, low=0, low_open=True, unit="arcsec",
                                             doc="circularised R_e")
    scaling: LensLightScalingSettings = table(LensLightScalingSettings, optional=True,
                                              doc="luminosity, size and colours from the velocity dispersion "
                                                  "(Faber-Jackson, fundamental plane, a template)")
    sersic_index: Parameter = parameter(4.0, low=0.3, high=8.0, doc="Sersic n")
    q: Parameter = parameter(0.8, low=0, low_open=True, high=1, doc="light axis ratio")
    angle: Parameter = parameter(0.0, unit="deg", doc="light major-axis angle, CCW from +x")


@dataclass(frozen=True, kw_only=True)
class LensSettings:
    redshift: Parameter = parameter(optional=True, low=0, low_open=True, doc="lens redshift")
    velocity_dispersion: Parameter = parameter(optional=True, low=0, low_open=True, high=2000, unit="km/s",
                                               doc="stellar velocity dispersion (sets the Einstein radius)")
    population: DeflectorPopulationSettings = table(DeflectorPopulationSettings, optional=True,
                                                    doc="draw (sigma, z) jointly from a velocity dispersion "
                                                        "function and the comoving volume")
    mass: MassSettings = table(MassSettings, doc="mass profile")
    multipoles: MultipoleSettings = table(MultipoleSettings, doc="multipole perturbations of the mass")
    subhalos: SubhaloSettings = table(SubhaloSettings, doc="truncated-SIS subhalos around the Einstein ring")
    line_of_sight: LineOfSightSettings = table(LineOfSightSettings,
                                               doc="galaxies at other redshifts (multi-plane lensing)")
    shear: ShearSettings = table(ShearSettings, doc="external shear")
    light: LensLightSettings = table(LensLightSettings, doc="lens light (Sersic)")


@dataclass(frozen=True, kw_only=True)
class SourceCountsSettings:
    band: str = text(optional=True, doc="band of the counts and magnitude range (default: reference band)")
    magnitude_range: tuple = interval((20.0, 26.0), low=5.0, high=35.0, unit="mag", doc="unlensed magnitudes")
    redshift_range: tuple = interval((0.2, 5.0), low=0.0, high=7.0, doc="source redshifts")
    density: float = number(46.0, low=0, low_open=True, unit="arcmin^-2",
                            doc="N(< pivot) (default: LSST Science Book 2009, i band, from memory)")
    pivot: float = number(25.0, low=5, high=35, unit="mag", doc="pivot magnitude of the counts")
    slope: float = number(0.31, low=0.01, high=1.0, doc="N(<m) ~ 10^(slope m)")
    z0_slope: float = number(0.0417, low=0, high=1, doc="p(z|m) ~ z^2 exp(-z/z0), z0 = z0_slope m + z0_intercept")
    z0_intercept: float = number(-0.744, low=-20, high=20, doc="see z0_slope")
    template: str = text("spiral", choices=TEMPLATE_NAMES, doc="spectral template of the disk")
    rest_filter: str = text("LSST_r", doc="rest-frame filter of the size-luminosity relation (r band)")
    size_scatter: bool = flag(True, doc="log-normal scatter of the size-luminosity relation (Shen et al. 2003)")


@dataclass(frozen=True, kw_only=True)
class QuasarSettings:
    magnitude: Parameter = parameter(low=0, high=40, unit="mag",
                                     doc="unlensed AB magnitude of the point source, reference band")
    spectral_index: float = number(-0.44, low=-3, high=2,
                                   doc="f_nu ~ nu^index (Vanden Berk et al. 2001, from memory); colours from it")
    host: bool = flag(True, doc="keep the source galaxy as the quasar's host (false: a bare point source)")


PLACEMENT_MODES = ("lens", "sky")


@dataclass(frozen=True, kw_only=True)
class SourcePositionSettings:
    mode: str = text(optional=True, choices=PLACEMENT_MODES,
                     doc="'lens': uniform in a region around the caustics, multiply imaged only; 'sky': "
                         "at the sources' sky density (strong lenses at their real rate)")
    region_radius_in_einstein_radii: float = number(
        1.3, low=1.0, high=10, doc="lens mode: radius of the placement disc; it must hold the caustics "
                                   "(widened, and flagged in the truth, where they reach farther)")
    density: float = number(optional=True, low=0, low_open=True, unit="arcmin^-2",
                            doc="sky mode: source density (default: from source.counts)")
    radius_in_einstein_radii: Parameter = parameter(
        optional=True, low=0, doc="uniform in area inside this many Einstein radii of the lens centre")
    x: Parameter = parameter(optional=True, unit="arcsec", doc="source-plane x offset from the lens centre")
    y: Parameter = parameter(optional=True, unit="arcsec", doc="source-plane y offset from the lens centre")


@dataclass(frozen=True, kw_only=True)
class ClumpSettings:
    count: Parameter = parameter(0, low=0, high=50, integer=True, doc="number of star-forming clumps")
    flux_fraction: Parameter = parameter(0.2, low=0, high=1, high_open=True,
                                         doc="fraction of the source flux in all clumps together")
    half_light_radius: Parameter = parameter(0.08, low=0, low_open=True, unit="arcsec",
                                             doc="clump half-light radius (Gaussian clumps)")
    spread: Parameter = parameter(1.0, low=0, low_open=True,
                                  doc="clump offsets: Gaussian sigma in units of the source R_e")
    colors: dict = band_colors(doc="clump colours, m_band - m_reference (default: the source's)")
    template: str = text(optional=True, choices=TEMPLATE_NAMES,
                         doc="spectral template of the clumps (with source.counts; default: the disk's)")


@dataclass(frozen=True, kw_only=True)
class SecondSourceSettings:
    redshift: Parameter = parameter(low=0, low_open=True, doc="redshift of the second source (behind the first)")
    magnitude: Parameter = parameter(low=0, high=40, unit="mag", doc="unlensed AB magnitude, reference band")
    colors: dict = band_colors(doc="m_band - m_reference (default: the first source's disk colours)")
    half_light_radius: Parameter = parameter(0.2, low=0, low_open=True, unit="arcsec", doc="circularised R_e")
    sersic_index: Parameter = parameter(1.0, low=0.3, high=8.0, doc="Sersic n")
    q: Parameter = parameter(0.7, low=0, low_open=True, high=1, doc="axis ratio")
    angle: Parameter = parameter(0.0, unit="deg", doc="major-axis angle, CCW from +x")
    radius_in_einstein_radii: Parameter = parameter(1.0, low=0, doc="uniform in area inside this many "
                                                    "Einstein radii (for this source) of the lens centre")
    deflector_velocity_dispersion: Parameter = parameter(
        0.0, low=0, high=500, unit="km/s",
        doc="the first source as an SIS deflector of the second (0: it does not deflect)")


@dataclass(frozen=True, kw_only=True)
class SourceSettings:
    redshift: Parameter = parameter(optional=True, low=0, low_open=True, doc="source redshift")
    magnitude: Parameter = parameter(optional=True, low=0, high=40, unit="mag",
                                     doc="unlensed AB magnitude, reference band")
    colors: dict = band_colors(doc="m_band - m_reference for each other band")
    half_light_radius: Parameter = parameter(optional=True, low=0, low_open=True, unit="arcsec",
                                             doc="circularised R_e")
    counts: SourceCountsSettings = table(SourceCountsSettings, optional=True,
                                         doc="magnitudes, redshifts, sizes and colours from published "
                                             "number counts, p(z|m), a size-luminosity relation, a template")
    quasar: QuasarSettings = table(QuasarSettings, optional=True, doc="a point source at the source centre")
    second: SecondSourceSettings = table(SecondSourceSettings, optional=True,
                                         doc="a second source plane behind the first (double source plane lens)")
    sersic_index: Parameter = parameter(1.0, low=0.3, high=8.0, doc="Sersic n")
    q: Parameter = parameter(0.7, low=0, low_open=True, high=1, doc="axis ratio")
    angle: Parameter = parameter(0.0, unit="deg", doc="major-axis angle, CCW from +x")
    position: SourcePositionSettings = table(SourcePositionSettings, doc="where the source lies")
    clumps: ClumpSettings = table(ClumpSettings, doc="compact star-forming knots")


@dataclass(frozen=True, kw_only=True)
class SelectionSettings:
    einstein_radius: tuple = interval(optional=True, low=0, unit="arcsec", doc="accepted Einstein radii")
    resolvable: bool = flag(False, doc="theta_E^2 > r_source^2 + (FWHM/2)^2 in the reference band "
                                       "(a common rule of survey forecasts, from memory)")
    multiply_imaged: bool = flag(False, doc="the source centre lies inside a caustic")
    min_magnification: float = number(optional=True, low=0, doc="minimum extended-source magnification")
    min_images: int = number(optional=True, low=1, high=10, integer=True,
                             doc="minimum number of images of the source centre in the cutout")
    min_arc_snr: float = number(optional=True, low=0, doc="minimum arc S/N in arc_snr_band")
    arc_snr_band: str = text(optional=True, doc="band of min_arc_snr (default: reference band)")
    enforce: bool = flag(True, doc="true: redraw systems until they pass; false: only flag them in the truth")
    max_candidates: int = number(2000, low=1, high=10_000_000, integer=True,
                                 doc="give up (with an error) after this many candidates for one system")

    @property
    def cut_names(self) -> tuple[str, ...]:
        names = []
        if self.einstein_radius is not None:
            names.append("einstein_radius")
        if self.resolvable:
            names.append("resolvable")
        if self.multiply_imaged:
            names.append("multiply_imaged")
        if self.min_magnification is not None:
            names.append("magnification")
        if self.min_images is not None:
            names.append("n_images")
        if self.min_arc_snr is not None:
            names.append("arc_snr")
        return tuple(names)


@dataclass(frozen=True, kw_only=True)
class NegativeSettings:
    fraction: float = number(0.0, low=0, high=1, doc="fraction of the systems made non-lenses")
    unlensed_source: float = number(1.0, low=0, doc="weight: the source unlensed, behind or beside the galaxy")
    ring_galaxy: float = number(1.0, low=0, doc="weight: a blue star-forming ring around the galaxy")
    spiral_arms: float = number(1.0, low=0, doc="weight: blue spiral arms around the galaxy")
    tidal_features: float = number(1.0, low=0, doc="weight: red shells or streams, sometimes a merging companion")
    edge_on_disk: float = number(1.0, low=0, doc="weight: a blue edge-on disk next to the galaxy")
    blue_companions: float = number(1.0, low=0, doc="weight: compact blue galaxies near the galaxy")

    def weights(self) -> dict:
        from .negatives import NEGATIVE_CLASSES

        return {name: getattr(self, name) for name in NEGATIVE_CLASSES}


@dataclass(frozen=True, kw_only=True)
class FieldGalaxySettings:
    band: str = text(optional=True, doc="band of the counts and magnitude range (default: source.counts.band, "
                                         "else the reference band)")
    magnitude_range: tuple = interval((18.0, 25.5), low=5.0, high=35.0, unit="mag",
                                      doc="magnitudes of the background galaxies in the counts band")
    redshift_range: tuple = interval((0.02, 4.0), low=0.0, high=7.0, doc="their redshifts")
    density: float = number(46.0, low=0, unit="arcmin^-2",
                            doc="N(< pivot); 0: no galaxies (default: LSST Science Book 2009, i band, from memory)")
    pivot: float = number(25.0, low=5, high=35, unit="mag", doc="pivot magnitude of the counts")
    slope: float = number(0.31, low=0.01, high=1.0, doc="N(<m) ~ 10^(slope m)")
    early_type_fraction: float = number(0.2, low=0, high=1,
                                        doc="share of early types (de Vaucouleurs, elliptical template); "
                                            "illustrative, from memory")
    max_half_light_radius: float = number(5.0, low=0, low_open=True, unit="arcsec",
                                          doc="sizes are capped here (the brightest nearby galaxies)")
    lens_clearance: float = number(2.5, low=0, unit="Einstein radii",
                                   doc="no background galaxy centre this close to a lens (it would be lensed)")


@dataclass(frozen=True, kw_only=True)
class FieldStarSettings:
    magnitude_range: tuple = interval((16.0, 25.5), low=5.0, high=35.0, unit="mag",
                                      doc="magnitudes of the stars in the reference band")
    density: float = number(0.4, low=0, unit="arcmin^-2",
                            doc="N(< pivot); 0: no stars (illustrative high-latitude value, from memory)")
    pivot: float = number(21.0, low=5, high=35, unit="mag", doc="pivot magnitude of the star counts")
    slope: float = number(0.12, low=0.01, high=1.0,
                          doc="N(<m) ~ 10^(slope m) (faint high-latitude counts; illustrative, from memory)")
    temperature_range: tuple = interval((3500.0, 7500.0), low=1000.0, high=50000.0, unit="K",
                                        doc="black-body temperatures for the star colours (uniform)")


@dataclass(frozen=True, kw_only=True)
class FieldSettings:
    size: int = number(2048, low=64, high=16384, integer=True, unit="pixel", doc="field image side")
    lenses: int = number(10, low=1, high=100_000, integer=True,
                         doc="lens systems per field (the recipe's count is spread over the fields)")
    lens_stamp_size: int = number(128, low=16, high=4096, integer=True, unit="pixel",
                                  doc="side of the stamp each lens system is rendered on")
    galaxies: FieldGalaxySettings = table(FieldGalaxySettings, doc="unlensed background galaxies")
    stars: FieldStarSettings = table(FieldStarSettings, doc="stars")

    def cells_per_side(self) -> int:
        """Lenses sit in distinct cells of a grid of stamp-sized cells (no two stamps overlap)."""
        return self.size // self.lens_stamp_size


@dataclass(frozen=True, kw_only=True)
class OutputSettings:
    shard_size: int = number(100, low=1, high=100_000, integer=True,
                             doc="systems per shard file (the unit of parallel work and of resuming)")
    per_system_files: bool = flag(False, doc="also write one FITS file per system (for looking at)")
    noiseless: bool = flag(True, doc="write the noiseless lensed-source and lens-light planes in shards")
    mask_threshold: float = number(1.0, low=0, low_open=True,
                                   doc="mask pixels where the noiseless lensed source exceeds this many "
                                       "times the pixel's noise sigma")


@dataclass(frozen=True, kw_only=True)
class Recipe:
    """A validated recipe.  Build with :func:`load_recipe` / :func:`parse_recipe`, or directly."""

    survey: SurveySettings = table(SurveySettings, doc="the survey")
    lens: LensSettings = table(LensSettings, doc="the lens population")
    source: SourceSettings = table(SourceSettings, doc="the source population")
    cosmology: CosmologySettings = table(CosmologySettings, doc="cosmology")
    footprint: FootprintSettings = table(FootprintSettings, doc="sky area for RA/Dec")
    selection: SelectionSettings = table(SelectionSettings, doc="cuts on the truth")
    negatives: NegativeSettings = table(NegativeSettings, doc="labelled non-lenses: classes and their share")
    output: OutputSettings = table(OutputSettings, doc="what a run writes")
    field: FieldSettings = table(FieldSettings, optional=True,
                                 doc="make whole survey fields with lenses at known places instead of cutouts")
    name: str = text("simlens-run", doc="run name (default: the recipe file's stem)")
    count: int = number(100, low=1, high=10_000_000, integer=True, doc="number of systems")
    seed: int = number(0, low=0, high=2**63 - 1, integer=True, doc="random seed of the run")
    source_text: str = ""  # the recipe file's text, kept for the manifest
    origin: str = "<recipe>"  # where it came from

    # -- convenience ----------------------------------------------------------------------------
    def with_overrides(self, *, count: int | None = None, seed: int | None = None) -> "Recipe":
        changes = {}
        if count is not None:
            _check_number(self.origin, "count", count, Recipe.__dataclass_fields__["count"].metadata)
            changes["count"] = int(count)
        if seed is not None:
            _check_number(self.origin, "seed", seed, Recipe.__dataclass_fields__["seed"].metadata)
            changes["seed"] = int(seed)
        return dataclasses.replace(self, **changes)

    @property
    def reference_band(self) -> str:
        return self.survey.reference_band or self.survey.bands[0].name

    def parameters(self) -> Iterator[tuple[str, Parameter]]:
        """Every numeric parameter as ``(key_path, Parameter)``, in a fixed schema order."""
        yield from _walk_parameters(self, "")

    def grid_parameters(self) -> list[tuple[str, Grid]]:
        return [(path, p) for path, p in self.parameters() if isinstance(p, Grid)]

    @property
    def grid_shape(self) -> tuple[int, ...]:
        return tuple(len(p.values) for _, p in self.grid_parameters())


def _walk_parameters(obj, prefix: str) -> Iterator[tuple[str, Parameter]]:
    for f in dataclasses.fields(obj):
        kind = f.metadata.get("kind")
        value = getattr(obj, f.name)
        path = f"{prefix}{f.name}"
        if kind == "parameter" and value is not None:
            yield path, value
        elif kind == "table" and value is not None:
            yield from _walk_parameters(value, path + ".")
        elif kind == "bands":
            for band in value:
                yield from _walk_parameters(band, f"{path}.{band.name}.")
        elif kind == "band_colors":
            for band_name in sorted(value):
                yield f"{path}.{band_name}", value[band_name]


# ------------------------------------------------------------------------------------------------
# Parsing and validation
# ------------------------------------------------------------------------------------------------
def load_recipe(path: str | Path) -> Recipe:
    """Read and validate a recipe file; raises :class:`~simlens.errors.RecipeError`."""
    path = Path(path)
    try:
        raw = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise RecipeError(str(path), "", "file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise RecipeError(str(path), "", f"cannot be read: {exc}") from None
    return parse_recipe(raw, origin=str(path), default_name=path.stem)


def parse_recipe(raw: str, origin: str = "<recipe>", default_name: str = "simlens-run") -> Recipe:
    """Validate recipe text (TOML) into a :class:`Recipe`."""
    try:
        data = tomllib.loads(raw)
    except tomllib.TOMLDecodeError as exc:
        raise RecipeError(origin, "", f"is not valid TOML: {exc}") from None
    data = dict(data)
    data.setdefault("name", default_name)
    recipe = _build(Recipe, data, origin, "")
    recipe = dataclasses.replace(recipe, source_text=raw, origin=origin)
    _check_consistency(recipe)
    return recipe


_INTERNAL_FIELDS = {"source_text", "origin"}


def _build(cls, data: Any, origin: str, prefix: str):
    where = prefix.rstrip(".") or "(top level)"
    if not isinstance(data, Mapping):
        raise RecipeError(origin, where, f"must be a table, got {_show(data)}", "a TOML table [ ... ]")
    fields = {f.name: f for f in dataclasses.fields(cls)
              if f.name not in _INTERNAL_FIELDS and not (cls is BandSettings and f.name == "name")}
    for key in data:
        if key not in fields:
            hint = difflib.get_close_matches(key, list(fields), n=1, cutoff=0.5)
            accepted = f"did you mean '{hint[0]}'?" if hint else "one of " + ", ".join(sorted(fields))
            raise RecipeError(origin, f"{prefix}{key}", "unknown key", accepted)
    values = {}
    for name, f in fields.items():
        path = f"{prefix}{name}"
        kind = f.metadata.get("kind")
        if name not in data:
            if f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
                if kind == "bands":
                    raise RecipeError(origin, path, "is missing", "at least one [survey.bands.NAME] table")
                raise RecipeError(origin, path, "is missing", f.metadata.get("doc", ""))
            continue
        value = data[name]
        if kind == "parameter":
            values[name] = _parse_parameter(origin, path, value, f.metadata)
        elif kind == "number":
            values[name] = _check_number(origin, path, value, f.metadata)
        elif kind == "text":
            values[name] = _check_text(origin, path, value, f.metadata)
        elif kind == "flag":
            if not isinstance(value, bool):
                raise RecipeError(origin, path, f"must be true or false, got {_show(value)}", "true, false")
            values[name] = value
        elif kind == "table":
            values[name] = _build(f.metadata["cls"], value, origin, path + ".")
        elif kind == "bands":
            values[name] = _parse_bands(origin, path, value)
        elif kind == "band_colors":
            values[name] = _parse_colors(origin, path, value)
        elif kind == "interval":
            values[name] = _check_interval(origin, path, value, f.metadata)
        else:  # pragma: no cover - schema bug
            raise AssertionError(f"field {cls.__name__}.{name} has no kind")
    return cls(**values)


def _parse_bands(origin: str, path: str, value: Any) -> tuple:
    if not isinstance(value, Mapping) or not value:
        raise RecipeError(origin, path, f"must hold one table per band, got {_show(value)}",
                          "[survey.bands.g], [survey.bands.r], ...")
    bands = []
    for band_name, band_data in value.items():
        if not band_name.replace("_", "").replace("-", "").isalnum():
            raise RecipeError(origin, f"{path}.{band_name}", "band names must be letters, digits, '_' or '-'")
        band = _build(BandSettings, band_data, origin, f"{path}.{band_name}.")
        bands.append(dataclasses.replace(band, name=band_name))
    return tuple(bands)


def _parse_colors(origin: str, path: str, value: Any) -> dict:
    if not isinstance(value, Mapping):
        raise RecipeError(origin, path, f"must be a table of band = colour, got {_show(value)}",
                          "e.g. colors = { g = 0.8, i = -0.3 }")
    return {band: _parse_parameter(origin, f"{path}.{band}", v, dict(kind="parameter", low=-20, high=20))
            for band, v in value.items()}


_FORMS = ("a number, { uniform = [low, high] }, { log_uniform = [low, high] }, "
          "{ normal = [mean, sigma], within = [low, high] }, { choice = [...], weights = [...] } "
          "or { grid = [...] }")


def _is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _parse_parameter(origin: str, path: str, value: Any, meta: Mapping) -> Parameter:
    integer = meta.get("integer", False)
    if _is_number(value):
        param: Parameter = Fixed(value)
    elif isinstance(value, Mapping):
        forms = {"uniform", "log_uniform", "normal", "choice", "grid"}
        chosen = [k for k in value if k in forms]
        extras = {k for k in value if k not in forms}
        if len(chosen) != 1:
            raise RecipeError(origin, path, f"needs exactly one distribution, got {_show(value)}", _FORMS)
        form = chosen[0]
        allowed_extras = {"normal": {"within"}, "choice": {"weights"}}.get(form, set())
        if extras - allowed_extras:
            bad = sorted(extras - allowed_extras)[0]
            hint = sorted(allowed_extras)
            raise RecipeError(origin, f"{path}.{bad}", f"unknown key for a {form} distribution",
                              f"{hint[0]}" if hint else "no other key")
        args = value[form]
        try:
            param = _make_distribution(form, args, value)
        except (TypeError, ValueError) as exc:
            raise RecipeError(origin, path, f"{exc}", _FORMS) from None
        if integer and form in ("uniform", "log_uniform", "normal"):
            raise RecipeError(origin, path, f"must be an integer, so a {form} distribution does not fit",
                              "an integer, { choice = [...] } or { grid = [...] }")
    else:
        raise RecipeError(origin, path, f"must be a number or a distribution, got {_show(value)}", _FORMS)
    if integer:
        values = [param.value] if isinstance(param, Fixed) else list(param.values)
        if not all(float(v).is_integer() for v in values):
            raise RecipeError(origin, path, f"must be an integer, got {_show(value)}", "whole numbers")
    _check_support(origin, path, param, meta)
    return param


def _number_list(args: Any, form: str, size: int | None = None) -> tuple[float, ...]:
    if not isinstance(args, list) or not all(_is_number(a) for a in args):
        raise ValueError(f"{form} needs a list of numbers, got {_show(args)}")
    if size is not None and len(args) != size:
        raise ValueError(f"{form} needs {size} numbers, got {len(args)}")
    return tuple(args)


def _make_distribution(form: str, args: Any, table_: Mapping) -> Parameter:
    if form == "uniform":
        low, high = _number_list(args, "uniform", 2)
        return Uniform(low, high)
    if form == "log_uniform":
        low, high = _number_list(args, "log_uniform", 2)
        return LogUniform(low, high)
    if form == "normal":
        mean, sigma = _number_list(args, "normal", 2)
        low, high = _number_list(table_.get("within", [-_INF, _INF]), "within", 2)
        return TruncatedNormal(mean, sigma, low, high)
    if form == "choice":
        values = _number_list(args, "choice")
        weights = table_.get("weights")
        return Choice(values, None if weights is None else _number_list(weights, "weights"))
    values = _number_list(args, "grid")
    return Grid(values)


def _range_text(meta: Mapping) -> str:
    lo, hi = meta["low"], meta["high"]
    left = "(" if meta.get("low_open") or lo == -_INF else "["
    right = ")" if meta.get("high_open") or hi == _INF else "]"
    return f"{left}{lo:g}, {hi:g}{right}"


def _inside(v: float, meta: Mapping) -> bool:
    lo, hi = meta["low"], meta["high"]
    above = v > lo if meta.get("low_open") else v >= lo
    below = v < hi if meta.get("high_open") else v <= hi
    return above and below and not math.isnan(v)


def _check_support(origin: str, path: str, param: Parameter, meta: Mapping) -> None:
    lo, hi = param.support
    for v in (lo, hi):
        if not _inside(v, meta):
            what = f"{param.describe()} can give {v:g}" if not isinstance(param, Fixed) else f"{v:g}"
            unit = f" {meta['unit']}" if meta.get("unit") else ""
            raise RecipeError(origin, path, f"out of range: {what}",
                              f"values in {_range_text(meta)}{unit}" + (
                                  "; bound a normal with within = [low, high]"
                                  if isinstance(param, TruncatedNormal) else ""))


def _check_number(origin: str, path: str, value: Any, meta: Mapping):
    if not _is_number(value):
        raise RecipeError(origin, path, f"must be a number, got {_show(value)}",
                          f"a number in {_range_text(meta)}")
    if meta.get("integer") and not float(value).is_integer():
        raise RecipeError(origin, path, f"must be a whole number, got {value!r}", "an integer")
    if not _inside(float(value), meta):
        raise RecipeError(origin, path, f"out of range: {value!r}", f"values in {_range_text(meta)}")
    return int(value) if meta.get("integer") else float(value)


def _check_interval(origin: str, path: str, value: Any, meta: Mapping) -> tuple[float, float]:
    if not (isinstance(value, list) and len(value) == 2 and all(_is_number(v) for v in value)):
        raise RecipeError(origin, path, f"must be [low, high], got {_show(value)}", "two numbers, low < high")
    lo, hi = float(value[0]), float(value[1])
    if not lo < hi:
        raise RecipeError(origin, path, f"needs low < high, got [{lo:g}, {hi:g}]", "two numbers, low < high")
    bounds = dict(meta, low_open=False, high_open=False)
    for v in (lo, hi):
        if not _inside(v, bounds):
            unit = f" {meta['unit']}" if meta.get("unit") else ""
            raise RecipeError(origin, path, f"out of range: {v:g}", f"values in {_range_text(bounds)}{unit}")
    return lo, hi


def _check_text(origin: str, path: str, value: Any, meta: Mapping) -> str:
    choices = meta.get("choices", ())
    if not isinstance(value, str):
        raise RecipeError(origin, path, f"must be text, got {_show(value)}",
                          " or ".join(repr(c) for c in choices) if choices else "a quoted string")
    if choices and value not in choices:
        hint = difflib.get_close_matches(value, choices, n=1, cutoff=0.5)
        raise RecipeError(origin, path, f"unknown value {value!r}" + (f"; did you mean {hint[0]!r}?" if hint else ""),
                          ", ".join(repr(c) for c in choices))
    return value


_SAFE_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,99}$")


def _check_consistency(recipe: Recipe) -> None:
    """Checks that involve several keys."""
    origin = recipe.origin
    if not _SAFE_NAME.match(recipe.name):
        # The name becomes the default run folder outputs/<name>: it must not reach outside it.
        raise RecipeError(origin, "name", f"{recipe.name!r} cannot name a run folder",
                          "letters, digits, '_', '-' and '.', starting with a letter or digit, no '/'")
    survey = recipe.survey
    names = survey.band_names
    if not names:
        raise RecipeError(origin, "survey.bands", "is missing", "at least one [survey.bands.NAME] table")
    if survey.reference_band is not None and survey.reference_band not in names:
        raise RecipeError(origin, "survey.reference_band", f"{survey.reference_band!r} is not a band",
                          ", ".join(repr(n) for n in names))
    ref = recipe.reference_band
    others = [n for n in names if n != ref]
    lens, source = recipe.lens, recipe.source
    _check_either(origin, "lens", lens.population is not None, "population",
                  {"redshift": lens.redshift, "velocity_dispersion": lens.velocity_dispersion})
    _check_either(origin, "lens.light", lens.light.scaling is not None, "scaling",
                  {"magnitude": lens.light.magnitude, "half_light_radius": lens.light.half_light_radius},
                  colors=lens.light.colors)
    _check_either(origin, "source", source.counts is not None, "counts",
                  {"redshift": source.redshift, "magnitude": source.magnitude,
                   "half_light_radius": source.half_light_radius}, colors=source.colors)
    if source.counts is not None and source.clumps.colors:
        raise RecipeError(origin, "source.clumps.colors", "is set together with source.counts",
                          "source.clumps.template (colours come from templates with source.counts)")
    if source.counts is None and source.clumps.template is not None:
        raise RecipeError(origin, "source.clumps.template", "needs source.counts (template colours)",
                          "source.clumps.colors, or a [source.counts] table")
    if source.counts is not None and source.counts.band is not None and source.counts.band not in names:
        raise RecipeError(origin, "source.counts.band", f"{source.counts.band!r} is not a band",
                          ", ".join(repr(n) for n in names))
    color_sets = [("lens.light.colors", lens.light.colors, lens.light.scaling is None),
                  ("source.colors", source.colors, source.counts is None),
                  ("source.clumps.colors", source.clumps.colors, False)]
    if source.second is not None:
        color_sets.append(("source.second.colors", source.second.colors, False))
    for path, colors, required in color_sets:
        for band in colors:
            if band not in others:
                why = "is the reference band (its colour is 0 by definition)" if band == ref else "is not a band"
                raise RecipeError(origin, f"{path}.{band}", why,
                                  "the bands " + ", ".join(repr(n) for n in others) if others else "no colours")
        if required or colors:
            missing = [n for n in others if n not in colors]
            if missing:
                raise RecipeError(origin, path, f"has no colour for band {missing[0]!r}",
                                  f"m_band - m_{ref} for each of " + ", ".join(repr(n) for n in others))
    needs_filters = [what for what, on in (("lens.light.scaling", lens.light.scaling is not None),
                                           ("source.counts", source.counts is not None),
                                           ("source.quasar", source.quasar is not None)) if on]
    base = str(Path(origin).parent) if origin != "<recipe>" else "."
    for band in survey.bands:
        if band.filter is None:
            if needs_filters:
                raise RecipeError(origin, f"survey.bands.{band.name}.filter", "is missing",
                                  f"a filter curve for the template colours that {needs_filters[0]} asks for, "
                                  "e.g. filter = 'LSST_" + band.name[:1] + "'")
            continue
        _check_filter(origin, f"survey.bands.{band.name}.filter", band.filter, base)
    for path, settings in (("lens.light.scaling", lens.light.scaling), ("source.counts", source.counts)):
        if settings is not None:
            _check_filter(origin, f"{path}.rest_filter", settings.rest_filter, base)
    if recipe.field is not None:
        _check_field(recipe, needs_filters)
    neg = recipe.negatives
    if neg.fraction > 0 and sum(neg.weights().values()) <= 0:
        raise RecipeError(origin, "negatives", f"fraction = {neg.fraction:g} but every class weight is 0",
                          "a positive weight for at least one class")
    sel = recipe.selection
    if sel.arc_snr_band is not None and sel.arc_snr_band not in names:
        raise RecipeError(origin, "selection.arc_snr_band", f"{sel.arc_snr_band!r} is not a band",
                          ", ".join(repr(n) for n in names))
    mass, defaults = recipe.lens.mass, MassSettings()
    for key, model in (("slope", "power_law"), ("core_radius", "cored_isothermal"),
                       ("halo_ellipticity", "stars_and_halo")):
        if mass.model != model and getattr(mass, key) != getattr(defaults, key):
            raise RecipeError(origin, f"lens.mass.{key}", f"applies to model = '{model}' only, "
                              f"not to model = '{mass.model}'", f"remove it, or set model = '{model}'")
    for key in ("halo_mass", "concentration"):
        if mass.model != "stars_and_halo" and getattr(mass, key) is not None:
            raise RecipeError(origin, f"lens.mass.{key}", "applies to model = 'stars_and_halo' only",
                              "remove it, or set model = 'stars_and_halo'")
    if mass.model == "stars_and_halo":
        if mass.halo_mass is None:
            raise RecipeError(origin, "lens.mass.halo_mass", "is missing for model = 'stars_and_halo'",
                              "an NFW M200 in M_sun, e.g. { log_uniform = [1e12, 1e13] }")
        scaling = recipe.lens.light.scaling
        if scaling is None or scaling.mass_to_light is None:
            raise RecipeError(origin, "lens.light.scaling.mass_to_light",
                              "is needed for model = 'stars_and_halo' (the stars' mass follows the light)",
                              "a [lens.light.scaling] table with mass_to_light")
    if isinstance(recipe.lens.line_of_sight.velocity_dispersion, Grid):
        raise RecipeError(origin, "lens.line_of_sight.velocity_dispersion",
                          "is drawn for each line-of-sight galaxy, so a grid does not fit",
                          "a number or a distribution")
    subs = recipe.lens.subhalos
    if not subs.mass_min < subs.mass_max:
        raise RecipeError(origin, "lens.subhalos.mass_max", f"{subs.mass_max:g} is not above mass_min {subs.mass_min:g}",
                          "mass_min < mass_max")
    if subs.annulus.support[1] >= subs.annulus_outer.support[0]:
        raise RecipeError(origin, "lens.subhalos.annulus_outer", "can be inside the inner radius (annulus)",
                          "annulus_outer above annulus for every draw")
    z_lens = lens.population.redshift_range if lens.population is not None else lens.redshift.support
    z_source = source.counts.redshift_range if source.counts is not None else source.redshift.support
    pos = source.position
    if pos.mode is None and z_source[0] <= z_lens[1]:
        raise RecipeError(origin, "source.counts.redshift_range" if source.counts is not None else "source.redshift",
                          f"can be {z_source[0]:g}, not behind lenses at redshift up to {z_lens[1]:g} "
                          f"({'lens.population.redshift_range' if lens.population is not None else 'lens.redshift'})",
                          "source redshifts all above the largest lens redshift, or a placement mode "
                          "(source.position.mode = 'lens' redraws pairs, 'sky' keeps foreground sources)")
    if z_source[1] <= z_lens[0]:
        raise RecipeError(origin, "source", f"no source can lie behind a lens: sources reach z = {z_source[1]:g}, "
                          f"lenses start at z = {z_lens[0]:g}", "overlapping redshift ranges")
    explicit = pos.radius_in_einstein_radii is not None or pos.x is not None or pos.y is not None
    if pos.mode is not None and explicit:
        raise RecipeError(origin, "source.position", f"gives mode = {pos.mode!r} and explicit positions",
                          "either mode, or radius_in_einstein_radii, or x and y")
    if pos.radius_in_einstein_radii is not None and (pos.x is not None or pos.y is not None):
        raise RecipeError(origin, "source.position", "gives both radius_in_einstein_radii and x/y",
                          "either radius_in_einstein_radii, or x and y")
    if (pos.x is None) != (pos.y is None):
        raise RecipeError(origin, "source.position", "gives only one of x and y", "both x and y")
    if pos.mode == "sky" and pos.density is None and source.counts is None:
        raise RecipeError(origin, "source.position.density", "is missing for mode = 'sky'",
                          "a source density (arcmin^-2), or a [source.counts] table")
    if pos.mode != "sky" and pos.density is not None:
        raise RecipeError(origin, "source.position.density", "applies to mode = 'sky' only",
                          "remove it, or set mode = 'sky'")
    cosmo = recipe.cosmology
    if cosmo.name is not None:
        from .cosmology import available_names

        if any(v is not None for v in (cosmo.H0, cosmo.Om0, cosmo.Ode0)):
            raise RecipeError(origin, "cosmology", "gives both a name and parameters",
                              "either name = 'Planck18' or H0, Om0 (and optionally Ode0)")
        if cosmo.name not in available_names():
            hint = difflib.get_close_matches(cosmo.name, available_names(), n=1, cutoff=0.4)
            raise RecipeError(origin, "cosmology.name", f"unknown cosmology {cosmo.name!r}"
                              + (f"; did you mean {hint[0]!r}?" if hint else ""),
                              ", ".join(available_names()))
    elif cosmo.H0 is None or cosmo.Om0 is None:
        raise RecipeError(origin, "cosmology", "needs a name or both H0 and Om0",
                          "name = 'Planck18', or H0 = 70, Om0 = 0.3")


def _check_field(recipe: Recipe, needs_filters: list) -> None:
    origin, f = recipe.origin, recipe.field
    if f.lens_stamp_size > f.size:
        raise RecipeError(origin, "field.lens_stamp_size", f"{f.lens_stamp_size} is larger than the field ({f.size})",
                          "a stamp smaller than field.size")
    cells = f.cells_per_side() ** 2
    if f.lenses > cells:
        raise RecipeError(origin, "field.lenses", f"{f.lenses} lenses do not fit: the field holds {cells} "
                          f"non-overlapping stamps of {f.lens_stamp_size} pixels",
                          f"at most {cells}, a larger field.size or a smaller field.lens_stamp_size")
    if f.lens_stamp_size < recipe.survey.cutout_size:
        raise RecipeError(origin, "field.lens_stamp_size", f"{f.lens_stamp_size} is smaller than the cutout "
                          f"({recipe.survey.cutout_size})", "at least survey.cutout_size")
    names = recipe.survey.band_names
    if f.galaxies.band is not None and f.galaxies.band not in names:
        raise RecipeError(origin, "field.galaxies.band", f"{f.galaxies.band!r} is not a band",
                          ", ".join(repr(n) for n in names))
    if f.galaxies.density > 0:
        missing = [b.name for b in recipe.survey.bands if b.filter is None]
        if missing:
            raise RecipeError(origin, f"survey.bands.{missing[0]}.filter", "is missing",
                              "a filter curve for the background galaxies' template colours (or "
                              "field.galaxies.density = 0)")
    if f.stars.density > 0:
        missing = [b.name for b in recipe.survey.bands if b.filter is None]
        if missing:
            raise RecipeError(origin, f"survey.bands.{missing[0]}.filter", "is missing",
                              "a filter curve for the stars' black-body colours (or field.stars.density = 0)")


def _check_either(origin: str, where: str, table_given: bool, table_name: str, keys: Mapping,
                  colors: Mapping | None = None) -> None:
    """Either the sub-table ``table_name`` (a physical model) or all the explicit ``keys``."""
    given = [k for k, v in keys.items() if v is not None] + (["colors"] if colors else [])
    if table_given and given:
        raise RecipeError(origin, f"{where}.{given[0]}", f"is set together with [{where}.{table_name}]",
                          f"either [{where}.{table_name}] or explicit " + ", ".join(keys))
    if not table_given:
        missing = [k for k, v in keys.items() if v is None]
        if missing:
            raise RecipeError(origin, f"{where}.{missing[0]}", "is missing",
                              f"a value or distribution, or a [{where}.{table_name}] table")


def _check_filter(origin: str, path: str, spec: str, base: str) -> None:
    from .photometry import load_filter

    try:
        load_filter(spec, base)
    except (OSError, ValueError) as exc:
        raise RecipeError(origin, path, str(exc), "a GalSim filter name or a two-column text file") from None


def _show(value: Any) -> str:
    text_ = repr(value)
    return text_ if len(text_) <= 60 else text_[:57] + "..."



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
import math
from dataclasses import dataclass, field
from typing import Iterator

from ..lensing.lens_models import LENS_MODELS
from ..populations.photometry import TEMPLATES
from ..populations.velocity_function import VELOCITY_FUNCTIONS
from .distributions import Fixed, Grid, Parameter
from .values import check_number

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
    "VariabilitySettings",
    "SupernovaSettings",
    "CadenceSettings",
    "MultipoleSettings",
    "SubhaloSettings",
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
class OpticsSettings:
    diameter: float = number(low=0.1, high=50, unit="m", doc="telescope aperture diameter")
    obscuration: float = number(0.0, low=0, high=0.9, doc="central obscuration, as a fraction of the diameter")
    wavelength: float = number(optional=True, low=100, high=5000, unit="nm",
                               doc="wavelength of the optical PSF (default: the band filter's mean wavelength)")
    defocus: float = number(0.0, low=-2, high=2, unit="waves", doc="Zernike defocus (Noll 4), RMS waves")
    astigmatism_1: float = number(0.0, low=-2, high=2, unit="waves", doc="Zernike astigmatism (Noll 5)")
    astigmatism_2: float = number(0.0, low=-2, high=2, unit="waves", doc="Zernike astigmatism (Noll 6)")
    coma_1: float = number(0.0, low=-2, high=2, unit="waves", doc="Zernike coma (Noll 7)")
    coma_2: float = number(0.0, low=-2, high=2, unit="waves", doc="Zernike coma (Noll 8)")
    spherical: float = number(0.0, low=-2, high=2, unit="waves", doc="Zernike spherical aberration (Noll 11)")


@dataclass(frozen=True, kw_only=True)
class PsfSettings:
    profile: str = text("moffat", choices=("moffat", "kolmogorov"),
                        doc="PSF shape: Moffat (with beta) or Kolmogorov")
    fwhm: Parameter = parameter(optional=True, low=0.01, high=10, unit="arcsec",
                                doc="PSF full width at half maximum (required unless [survey.seeing] is given)")
    beta: Parameter = parameter(3.0, low=1.1, low_open=True, high=50, doc="Moffat beta (ignored for kolmogorov)")
    ellipticity: Parameter = parameter(optional=True, low=0, high=0.5,
                                       doc="PSF ellipticity: the reduced shear |g| applied to the PSF "
                                           "(area-preserving; absent: round)")
    ellipticity_angle: Parameter = parameter(optional=True, low=-360, high=360, unit="deg",
                                             doc="PSF major axis, CCW from +x (default 0)")
    optics: OpticsSettings = table(OpticsSettings, optional=True,
                                   doc="an optical PSF (GalSim's OpticalPSF) convolved with the atmospheric one")


@dataclass(frozen=True, kw_only=True)
class BandSettings:
    zero_point: Parameter = parameter(low=10, high=40, unit="mag",
                                      doc="AB magnitude of a source giving 1 electron per second")
    sky_brightness: Parameter = parameter(low=10, high=32, unit="mag/arcsec^2",
                                          doc="sky surface brightness (AB)")
    exposure_time: Parameter = parameter(low=0, low_open=True, high=1e7, unit="s", doc="total exposure time")
    gain: Parameter = parameter(low=0.01, high=1000, unit="electron/adu", doc="detector gain")
    read_noise: Parameter = parameter(0.0, low=0, high=1000, unit="electron",
                                      doc="read noise per pixel (all exposures)")
    psf: PsfSettings = table(PsfSettings, doc="point-spread function")
    exposures: int = number(1, low=1, high=10000, integer=True,
                            doc="exposures summed into the image (they share exposure_time)")
    resampling: str = text("none", choices=("none", "bilinear", "lanczos3"),
                           doc="kernel resampling each dithered exposure onto the image's pixels, "
                               "which correlates the noise of neighbouring pixels ('none': white noise)")
    filter: str = text(optional=True, doc="filter curve: a GalSim filter name (e.g. 'LSST_r') or a file "
                                          "of 'nm throughput' lines, relative to the recipe; needed "
                                          "for template colours")
    revisit: float = number(optional=True, low=0.5, high=365, unit="day",
                            doc="days between this band's visits in the cadence model ([survey.cadence]; "
                                "absent: not visited)")
    name: str = ""  # filled from the table key


@dataclass(frozen=True, kw_only=True)
class CadenceSettings:
    visits: str = text(optional=True, doc="a file of visits, 'mjd band' per line (optionally 'fwhm "
                                          "sky_brightness' after), relative to the recipe: instead of the model")
    start: float = number(61000.0, low=0, high=100_000, unit="day", doc="MJD of the first night")
    length: float = number(365.0, low=1, high=3660, unit="day", doc="days from the first night to the last")
    season: float = number(365.25, low=1, high=365.25, unit="day",
                           doc="days each year, from the start's anniversary, that the field is observable")
    jitter: float = number(0.0, low=0, high=10, unit="day",
                           doc="rms offset of each visit's time from the regular revisit gap")
    weather_loss: float = number(0.0, low=0, high=0.95, doc="fraction of nights lost to weather (all their visits)")


@dataclass(frozen=True, kw_only=True)
class SeeingSettings:
    fwhm: Parameter = parameter(low=0.01, high=10, unit="arcsec",
                                doc="PSF FWHM at `wavelength`, drawn once per system for all bands")
    wavelength: float = number(500.0, low=100, high=5000, unit="nm", doc="wavelength at which `fwhm` is given")
    exponent: float = number(-0.2, low=-1.0, high=1.0,
                             doc="each band's FWHM scales as (its mean wavelength / `wavelength`)^exponent; "
                                 "-1/5 for Kolmogorov turbulence")
    band_scatter: float = number(0.0, low=0.0, high=0.5,
                                 doc="fractional Gaussian scatter of each band's FWHM about that law")


@dataclass(frozen=True, kw_only=True)
class SurveySettings:
    name: str = text("unnamed survey", doc="survey name, copied to outputs")
    pixel_scale: float = number(low=0.005, high=5, unit="arcsec/pixel", doc="pixel scale")
    cutout_size: int = number(64, low=8, high=4096, integer=True, unit="pixel", doc="cutout side")
    supersampling: int = number(4, low=1, high=32, integer=True,
                                doc="rays per pixel side for the lensed scene")
    adaptive_supersampling: bool = flag(True, doc="re-trace pixels with 4x more rays per side where "
                                                  "the lensed source varies within them")
    reference_band: str = text(optional=True, doc="band in which magnitudes are given (default: first)")
    bands: tuple = field(default=(), metadata=dict(kind="bands", doc="one table per band"))
    seeing: SeeingSettings = table(SeeingSettings, optional=True,
                                   doc="one seeing for all bands, scaled with wavelength (instead of each "
                                       "band's psf.fwhm)")
    cadence: CadenceSettings = table(CadenceSettings, optional=True,
                                     doc="the survey's epochs: visits, each with its own seeing and sky "
                                         "(multi-epoch cutouts of transients)")

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
    H0: float = number(optional=True, low=20, high=200, unit="km/s/Mpc", doc="Hubble constant")
    Om0: float = number(optional=True, low=0, high=2, doc="matter density today")
    Ode0: float = number(optional=True, low=-1, high=3, doc="dark-energy density (omit for flat)")
    Tcmb0: float = number(0.0, low=0, high=10, unit="K", doc="CMB temperature")

    def build(self):
        from ..cosmology import flat_or_curved_cosmology, named_cosmology

        if self.name is not None:
            return named_cosmology(self.name)
        return flat_or_curved_cosmology(self.H0, self.Om0, self.Ode0, self.Tcmb0)


@dataclass(frozen=True, kw_only=True)
class FootprintSettings:
    # Default: an invented field, "Corvus Deep Patch" (illustrative, not a real survey field).
    ra: float = number(182.5, low=0, high=360, unit="deg", doc="centre right ascension")
    dec: float = number(-21.0, low=-90, high=90, unit="deg", doc="centre declination")
    radius: float = number(1.0, low=0, low_open=True, high=180, unit="deg", doc="footprint radius")


MASS_MODELS = tuple(LENS_MODELS)  # the registry of simlens.lensing.lens_models


@dataclass(frozen=True, kw_only=True)
class MassSettings:
    model: str = text("sie", choices=MASS_MODELS, doc="mass profile of the lens galaxies")
    q: Parameter = parameter(0.8, low=0, low_open=True, high=1, doc="mass axis ratio")
    angle: Parameter = parameter(0.0, low=-360, high=360, unit="deg", doc="major-axis angle, CCW from +x")
    slope: Parameter = parameter(2.0, low=1, low_open=True, high=3, high_open=True,
                                 doc="3D density slope (power_law; 2 = isothermal)")
    core_radius: Parameter = parameter(0.05, low=0, low_open=True, high=10, unit="arcsec",
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
    m3_angle: Parameter = parameter(0.0, low=-360, high=360, unit="deg", doc="m = 3 angle, relative to the mass major axis")
    m4_strength: Parameter = parameter(0.0, low=-0.2, high=0.2, doc="m = 4 multipole amplitude a_4")
    m4_angle: Parameter = parameter(0.0, low=-360, high=360, unit="deg",
                                    doc="m = 4 angle relative to the mass major axis (0 disky, 45 boxy)")


@dataclass(frozen=True, kw_only=True)
class SubhaloSettings:
    count: Parameter = parameter(0, low=0, high=1000, integer=True, doc="subhalos per lens")
    mass_min: float = number(1e6, low=1e3, high=1e13, unit="M_sun", doc="lightest subhalo")
    mass_max: float = number(1e10, low=1e3, high=1e13, unit="M_sun", doc="heaviest subhalo")
    mass_function_slope: float = number(-1.9, low=-3, high=-1.01,
                                        doc="dN/dm ~ m^slope (-1.9: Springel et al. 2008, from memory)")
    annulus: Parameter = parameter(0.5, low=0, high=20, doc="inner radius of the placement annulus, in Einstein radii")
    annulus_outer: Parameter = parameter(1.5, low=0, low_open=True, high=20,
                                         doc="outer radius of the placement annulus, in Einstein radii")
    mass_fraction: float = number(optional=True, low=0, low_open=True, high=0.1,
                                  doc="draw the count instead: Poisson, with this share of the SIS host's "
                                      "projected mass in the annulus in subhalos of [mass_min, mass_max] "
                                      "(f_sub: Dalal & Kochanek 2002: 0.02, 0.006-0.07 at 90 %; Vegetti et al. "
                                      "2014: 0.0076 for 4e6-4e9 M_sun; from memory)")
    light: bool = flag(False, doc="satellites: draw each subhalo's galaxy (stellar mass from Moster et al. 2013, "
                                  "the lens's template and mass-to-light ratio; needs lens.light.scaling)")


@dataclass(frozen=True, kw_only=True)
class LineOfSightSettings:
    count: Parameter = parameter(0, low=0, high=30, integer=True,
                                 doc="SIS galaxies along the line of sight, each in its own lens plane")
    velocity_dispersion: Parameter = parameter(100.0, low=10, high=500, unit="km/s",
                                               doc="their velocity dispersions (drawn for each)")
    radius: float = number(8.0, low=0, low_open=True, high=120, unit="arcsec",
                           doc="they fall uniformly in a disc of this radius around the lens")
    redshift_min: float = number(0.02, low=0, low_open=True, high=10, doc="nearest redshift; the farthest is the source's")
    light: bool = flag(False, doc="draw their light: early types by the Faber-Jackson relation, fundamental plane "
                                  "and template of lens.light.scaling; those behind the lens seen through it")


@dataclass(frozen=True, kw_only=True)
class ShearSettings:
    gamma: Parameter = parameter(0.0, low=0, high=0.5, doc="external shear strength")
    angle: Parameter = parameter(0.0, low=-360, high=360, unit="deg", doc="shear angle, CCW from +x")


VELOCITY_FUNCTION_NAMES = tuple(VELOCITY_FUNCTIONS)  # simlens.populations.velocity_function
TEMPLATE_NAMES = tuple(TEMPLATES)  # simlens.populations.photometry
LENS_LIGHT_RELATIONS = ("bernardi2003", "faber_jackson_plane")
# the keys of [lens.light.scaling] read only by relations = "faber_jackson_plane"
FABER_JACKSON_PLANE_KEYS = ("faber_jackson_slope", "faber_jackson_magnitude", "faber_jackson_sigma",
                            "faber_jackson_scatter", "plane_a", "plane_b", "plane_c", "plane_scatter")


@dataclass(frozen=True, kw_only=True)
class DeflectorPopulationSettings:
    velocity_function: str = text("choi2007", choices=VELOCITY_FUNCTION_NAMES,
                                  doc="published velocity dispersion function (modified Schechter)")
    redshift_range: tuple = interval((0.1, 1.0), low=0.0, high=6.0, doc="lens redshifts")
    velocity_dispersion_range: tuple = interval((100.0, 400.0), low=10.0, high=1500.0, unit="km/s",
                                                doc="velocity dispersions")
    density_evolution: float = number(0.0, low=-10, high=10, doc="phi_*(z) = phi_*(0) (1 + z)^this")
    sigma_evolution: float = number(0.0, low=-1, high=1, doc="sigma_*(z) = sigma_*(0) (1 + z)^this")


@dataclass(frozen=True, kw_only=True)
class LensLightScalingSettings:
    template: str = text("elliptical", choices=TEMPLATE_NAMES, doc="spectral template of the lens light")
    rest_filter: str = text("LSST_r", doc="rest-frame filter of the relations (r band)")
    relations: str = text("bernardi2003", choices=LENS_LIGHT_RELATIONS,
                          doc="bernardi2003: luminosity and size given sigma from the joint (M, R_e, sigma) "
                              "Gaussian of Bernardi et al. 2003 (on the fundamental plane, correlated scatter); "
                              "faber_jackson_plane: M from the faber_jackson_* keys, then R_e from the plane_* keys")
    faber_jackson_slope: float = number(4.0, low=1, high=8, doc="L ~ sigma^slope (Faber & Jackson 1976); this and "
                                        "the keys to plane_scatter only with relations = faber_jackson_plane")
    faber_jackson_magnitude: float = number(-21.6, low=-25, high=-17, unit="mag",
                                            doc="rest-frame absolute magnitude (AB) at the reference sigma")
    faber_jackson_sigma: float = number(200.0, low=100, high=400, unit="km/s", doc="reference sigma")
    faber_jackson_scatter: float = number(0.4, low=0, high=3, unit="mag", doc="scatter in magnitude")
    plane_a: float = number(1.49, low=0, high=5, doc="fundamental plane: log R_e = a log sigma + b mu_e + c")
    plane_b: float = number(0.30, low=0.2, low_open=True, high=1.0, doc="fundamental plane b (mu_e in mag/arcsec^2)")
    plane_c: float = number(-8.778, low=-30, high=30, doc="fundamental plane c (R_e in kpc)")
    plane_scatter: float = number(0.1, low=0, high=1, doc="scatter of log10 R_e at fixed sigma and M (dex)")
    q_scatter: float = number(0.11, low=0, high=0.5,
                              doc="q_mass / q_light ~ N(1, this) (Koopmans et al. 2006, SLACS: 0.99 +- 0.11, "
                                  "from memory)")
    angle_scatter: float = number(10.0, low=0, high=90, unit="deg",
                                  doc="light angle = mass angle + N(0, this) (Koopmans et al. 2006: mass and "
                                      "light aligned within about 10 deg, from memory)")
    mass_to_light: float = number(optional=True, low=0, low_open=True, high=100,
                                  doc="stellar M/L in the rest filter (M_sun/L_sun), for the stellar-mass truth")
    luminosity_evolution: float = number(0.85, low=-5, high=5, unit="mag",
                                         doc="passive evolution: M(z) = M(0) - this z at fixed sigma and size "
                                             "(early types, r band: 0.85, Bernardi et al. 2003, from memory)")


@dataclass(frozen=True, kw_only=True)
class LensEnvelopeSettings:
    fraction: Parameter = parameter(0.5, low=0, low_open=True, high=1, high_open=True,
                                    doc="envelope share of the lens light in the reference band (about half in "
                                        "multi-component fits of massive ellipticals, Huang et al. 2013, from memory)")
    half_light_radius_ratio: Parameter = parameter(4.0, low=1, high=30,
                                                   doc="envelope R_e over the core's; together they keep the "
                                                       "galaxy's drawn R_e")
    sersic_index: Parameter = parameter(1.0, low=0.3, high=8.0, doc="envelope Sersic n (the core takes lens.light's)")
    q: Parameter = parameter(optional=True, low=0, low_open=True, high=1,
                             doc="envelope axis ratio (default: the lens light's)")
    color_offsets: dict = band_colors(doc="envelope colour minus the core's, per non-reference band (negative: "
                                          "bluer outskirts; g = -0.2 with r the reference and the other defaults "
                                          "gives d(g-r)/dlog R = -0.11, near the -0.1 of Tortora et al. 2010, "
                                          "from memory); the galaxy's total colours stay the drawn ones")


@dataclass(frozen=True, kw_only=True)
class LensLightSettings:
    magnitude: Parameter = parameter(optional=True, low=0, high=40, unit="mag", doc="AB magnitude in the reference band")
    colors: dict = band_colors(doc="m_band - m_reference for each other band")
    half_light_radius: Parameter = parameter(optional=True, low=0, low_open=True, high=30, unit="arcsec",
                                             doc="circularised R_e")
    scaling: LensLightScalingSettings = table(LensLightScalingSettings, optional=True,
                                              doc="luminosity, size and colours from the velocity dispersion "
                                                  "(Faber-Jackson, fundamental plane, a template)")
    sersic_index: Parameter = parameter(4.0, low=0.3, high=8.0, doc="Sersic n")
    q: Parameter = parameter(0.8, low=0, low_open=True, high=1, doc="light axis ratio")
    angle: Parameter = parameter(0.0, low=-360, high=360, unit="deg", doc="light major-axis angle, CCW from +x")
    envelope: LensEnvelopeSettings = table(LensEnvelopeSettings, optional=True,
                                           doc="two-component light: a compact core (the Sersic above) and an "
                                               "extended envelope, with a colour gradient")


@dataclass(frozen=True, kw_only=True)
class LensSettings:
    redshift: Parameter = parameter(optional=True, low=0, low_open=True, high=10, doc="lens redshift")
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
    density: float = number(46.0, low=0, low_open=True, high=10_000, unit="arcmin^-2",
                            doc="N(< pivot) (default: LSST Science Book 2009, i band, from memory)")
    pivot: float = number(25.0, low=5, high=35, unit="mag", doc="pivot magnitude of the counts")
    slope: float = number(0.31, low=0.01, high=1.0, doc="N(<m) ~ 10^(slope m)")
    z0_slope: float = number(0.0417, low=0, high=1, doc="p(z|m) ~ z^2 exp(-z/z0), z0 = z0_slope m + z0_intercept")
    z0_intercept: float = number(-0.744, low=-20, high=20, doc="see z0_slope")
    template: str = text("spiral", choices=TEMPLATE_NAMES, doc="spectral template of the disk")
    rest_filter: str = text("LSST_r", doc="rest-frame filter of the size-luminosity relation (r band)")
    size_scatter: bool = flag(True, doc="log-normal scatter of the size-luminosity relation")
    size_relation: str = text("mixed", choices=("mixed", "shen2003", "shibuya2015"),
                              doc="source sizes: Shen et al. 2003 (rest-frame r, at fixed luminosity), Shibuya "
                                  "et al. 2015 (rest-frame UV, star-forming galaxies), or mixed: Shen below "
                                  "size_redshift, Shibuya above")
    size_redshift: float = number(1.0, low=0, high=10, doc="where the mixed size relation turns from Shen to Shibuya")


@dataclass(frozen=True, kw_only=True)
class VariabilitySettings:
    black_hole_mass: Parameter = parameter(8.5, low=5, high=11, unit="log10 M_sun",
                                           doc="log10 of the black-hole mass (MacLeod et al. 2010 relations)")
    tau: Parameter = parameter(optional=True, low=1, high=1e5, unit="day",
                               doc="rest-frame damping time (default: MacLeod et al. 2010)")
    sf_inf: Parameter = parameter(optional=True, low=0, high=3, unit="mag",
                                  doc="asymptotic structure function in the reference band (default: "
                                      "MacLeod et al. 2010; other bands scaled by its wavelength term)")


@dataclass(frozen=True, kw_only=True)
class SupernovaSettings:
    peak_absolute_magnitude: Parameter = parameter(
        -19.4, low=-22, high=-16, unit="mag",
        doc="rest-frame B (AB) at maximum for stretch 1: about -19.3 Vega for H0 = 70 (Riess et al. 1998, "
            "Perlmutter et al. 1999; from memory)")
    stretch: Parameter = parameter(1.0, low=0.5, high=1.6, doc="time-axis stretch s (Perlmutter et al. 1997)")
    stretch_luminosity: float = number(1.5, low=0, high=5,
                                       doc="alpha of M = M_0 - alpha (s - 1) (about 1.5: Goldhaber et al. 2001, from memory)")
    peak_margin: float = number(60.0, low=0, high=1000, unit="day",
                                doc="maxima fall uniformly from this long before the first epoch to this long after the last")
    spectra: str = text(optional=True, doc="a spectral time series file ('phase_day wavelength_nm f_lambda' "
                                           "lines), relative to the recipe (default: the built-in simplified one)")
    light_curves: str = text(optional=True, doc="instead of a spectrum: light curves in the survey's bands, "
                                                "'phase_day band magnitude_offset' lines (offsets from the peak "
                                                "absolute magnitude, no K-correction), relative to the recipe")
    host: bool = flag(True, doc="keep the source galaxy as the supernova's host (false: a bare point source)")
    fraction: float = number(1.0, low=0, high=1,
                             doc="share of systems whose point source is the supernova; the others have "
                                 "the [source.quasar], if given, or none")
    rate: str = text(optional=True, choices=("dilday2010",),
                     doc="draw the supernovae's redshifts (instead of source.redshift) and, in sky mode, "
                         "their sky density from a published volumetric rate over the epochs' window")
    redshift_range: tuple = interval((0.02, 1.5), low=0.001, high=3.0,
                                     doc="with a rate: the supernovae's redshifts")


@dataclass(frozen=True, kw_only=True)
class QuasarSettings:
    magnitude: Parameter = parameter(optional=True, low=0, high=40, unit="mag",
                                     doc="unlensed AB magnitude of the point source, reference band "
                                         "(required unless luminosity_function)")
    luminosity_function: str = text(optional=True, choices=("richards2005",),
                                    doc="draw the quasars' redshifts and magnitudes (instead of source.redshift "
                                        "and magnitude) and, in sky mode, their density from a published "
                                        "luminosity function")
    magnitude_range: tuple = interval((16.0, 24.0), low=10, high=30, unit="mag",
                                      doc="with a luminosity function: the reference band's magnitudes")
    redshift_range: tuple = interval((0.3, 5.0), low=0.01, high=7.0,
                                     doc="with a luminosity function: the quasars' redshifts")
    spectral_index: float = number(-0.44, low=-3, high=2,
                                   doc="f_nu ~ nu^index (Vanden Berk et al. 2001, from memory); colours from it")
    host: bool = flag(True, doc="keep the source galaxy as the quasar's host (false: a bare point source)")
    variability: VariabilitySettings = table(VariabilitySettings, optional=True,
                                             doc="a damped random walk in time ([survey.cadence] epochs)")


PLACEMENT_MODES = ("lens", "sky")


@dataclass(frozen=True, kw_only=True)
class SourcePositionSettings:
    mode: str = text(optional=True, choices=PLACEMENT_MODES,
                     doc="'lens': uniform in a region around the caustics, multiply imaged only; 'sky': "
                         "at the sources' sky density (strong lenses at their real rate)")
    region_radius_in_einstein_radii: float = number(
        1.3, low=1.0, high=10, doc="lens mode: radius of the placement disc; it must hold the caustics "
                                   "(widened, and flagged in the truth, where they reach farther)")
    density: float = number(optional=True, low=0, low_open=True, high=10_000, unit="arcmin^-2",
                            doc="sky mode: source density (default: from source.counts)")
    radius_in_einstein_radii: Parameter = parameter(
        optional=True, low=0, high=20, doc="uniform in area inside this many Einstein radii of the lens centre")
    x: Parameter = parameter(optional=True, low=-100, high=100, unit="arcsec",
                             doc="source-plane x offset from the lens centre")
    y: Parameter = parameter(optional=True, low=-100, high=100, unit="arcsec",
                             doc="source-plane y offset from the lens centre")


@dataclass(frozen=True, kw_only=True)
class ClumpSettings:
    count: Parameter = parameter(0, low=0, high=50, integer=True, doc="number of star-forming clumps")
    flux_fraction: Parameter = parameter(0.2, low=0, high=1, high_open=True,
                                         doc="fraction of the source flux in all clumps together")
    half_light_radius: Parameter = parameter(0.08, low=0, low_open=True, high=5, unit="arcsec",
                                             doc="clump half-light radius (Gaussian clumps)")
    spread: Parameter = parameter(1.0, low=0, low_open=True, high=10,
                                  doc="clump offsets: Gaussian sigma in units of the source R_e (placement 'gaussian')")
    placement: str = text("gaussian", choices=("gaussian", "disk"),
                          doc="'gaussian': offsets of Gaussian spread, fluxes uniform in [0.5, 1.5]; 'disk': "
                              "galsim.RandomKnots, knots of equal flux following the disk's light")
    colors: dict = band_colors(doc="clump colours, m_band - m_reference (default: the source's)")
    template: str = text(optional=True, choices=TEMPLATE_NAMES,
                         doc="spectral template of the clumps (with source.counts; default: the disk's)")


@dataclass(frozen=True, kw_only=True)
class BulgeSettings:
    fraction: Parameter = parameter(0.3, low=0, high=1, high_open=True,
                                    doc="bulge share of the galaxy's light (clumps aside) in the magnitude's band")
    half_light_radius_ratio: Parameter = parameter(0.5, low=0.05, high=2,
                                                   doc="bulge R_e over the disk's (source.half_light_radius)")
    sersic_index: Parameter = parameter(4.0, low=0.3, high=8.0, doc="bulge Sersic n (4: de Vaucouleurs)")
    q: Parameter = parameter(0.8, low=0, low_open=True, high=1, doc="bulge axis ratio (aligned with the disk)")
    colors: dict = band_colors(doc="bulge colours, m_band - m_reference (default: the disk's)")
    template: str = text("elliptical", choices=TEMPLATE_NAMES,
                         doc="spectral template of the bulge (with source.counts): redder than the disk's")


@dataclass(frozen=True, kw_only=True)
class StampSettings:
    catalogue: str = text(doc="FITS table of galaxy stamps (stamp, pixel_scale, magnitude, band[, redshift]), "
                              "relative to the recipe")
    choose: str = text("random", choices=("random", "nearest_redshift"),
                       doc="which stamp a source takes: uniform, or among those nearest its redshift")
    format: str = text("table", choices=("table", "galsim_real"),
                       doc="table: simlens's FITS table or cube; galsim_real: GalSim's real-galaxy catalogue "
                           "(read by galsim.RealGalaxyCatalog, its images beside it)")
    psf_fwhm: float = number(0.0, low=0, high=5, unit="arcsec",
                             doc="the stamps' own PSF FWHM (a Gaussian): the resolution limit recorded in the "
                                 "truth, or what deconvolve_to removes from table stamps")
    deconvolve_to: float = number(optional=True, low=0, low_open=True, high=2, unit="arcsec",
                                  doc="remove the stamps' PSF (and pixel) and re-convolve them with a Gaussian of "
                                      "this FWHM, which then is the resolution limit (GalSim's deconvolution)")

    @property
    def resolution(self) -> float:
        """The FWHM (arcsec) to which the stamps' light is resolved, as the truth states it."""
        return self.deconvolve_to if self.deconvolve_to is not None else self.psf_fwhm


@dataclass(frozen=True, kw_only=True)
class SecondSourceSettings:
    redshift: Parameter = parameter(low=0, low_open=True, high=12, doc="redshift of the second source (behind the first)")
    magnitude: Parameter = parameter(low=0, high=40, unit="mag", doc="unlensed AB magnitude, reference band")
    colors: dict = band_colors(doc="m_band - m_reference (default: the first source's disk colours)")
    half_light_radius: Parameter = parameter(0.2, low=0, low_open=True, high=30, unit="arcsec", doc="circularised R_e")
    sersic_index: Parameter = parameter(1.0, low=0.3, high=8.0, doc="Sersic n")
    q: Parameter = parameter(0.7, low=0, low_open=True, high=1, doc="axis ratio")
    angle: Parameter = parameter(0.0, low=-360, high=360, unit="deg", doc="major-axis angle, CCW from +x")
    radius_in_einstein_radii: Parameter = parameter(1.0, low=0, high=20, doc="uniform in area inside this many "
                                                    "Einstein radii (for this source) of the lens centre")
    deflector_velocity_dispersion: Parameter = parameter(
        0.0, low=0, high=500, unit="km/s",
        doc="the first source as an SIS deflector of the second (0: it does not deflect)")


@dataclass(frozen=True, kw_only=True)
class SourceSettings:
    redshift: Parameter = parameter(optional=True, low=0, low_open=True, high=12, doc="source redshift")
    magnitude: Parameter = parameter(optional=True, low=0, high=40, unit="mag",
                                     doc="unlensed AB magnitude, reference band")
    colors: dict = band_colors(doc="m_band - m_reference for each other band")
    half_light_radius: Parameter = parameter(optional=True, low=0, low_open=True, high=30, unit="arcsec",
                                             doc="circularised R_e")
    counts: SourceCountsSettings = table(SourceCountsSettings, optional=True,
                                         doc="magnitudes, redshifts, sizes and colours from published "
                                             "number counts, p(z|m), a size-luminosity relation, a template")
    quasar: QuasarSettings = table(QuasarSettings, optional=True, doc="a point source at the source centre")
    supernova: SupernovaSettings = table(SupernovaSettings, optional=True,
                                         doc="a type Ia supernova at the source centre ([survey.cadence] epochs)")
    second: SecondSourceSettings = table(SecondSourceSettings, optional=True,
                                         doc="a second source plane behind the first (double source plane lens)")
    sersic_index: Parameter = parameter(1.0, low=0.3, high=8.0, doc="Sersic n")
    q: Parameter = parameter(0.7, low=0, low_open=True, high=1, doc="axis ratio")
    angle: Parameter = parameter(0.0, low=-360, high=360, unit="deg", doc="major-axis angle, CCW from +x")
    position: SourcePositionSettings = table(SourcePositionSettings, doc="where the source lies")
    clumps: ClumpSettings = table(ClumpSettings, doc="compact star-forming knots")
    stamps: StampSettings = table(StampSettings, optional=True,
                                  doc="source shapes from a catalogue of high-resolution galaxy images")
    bulge: BulgeSettings = table(BulgeSettings, optional=True,
                                 doc="a bulge inside the disk, with its own template: a colour gradient")


@dataclass(frozen=True, kw_only=True)
class SelectionSettings:
    einstein_radius: tuple = interval(optional=True, low=0, high=100, unit="arcsec", doc="accepted Einstein radii")
    resolvable: bool = flag(False, doc="theta_E^2 > r_source^2 + (FWHM/2)^2 in the reference band "
                                       "(a common rule of survey forecasts, from memory)")
    multiply_imaged: bool = flag(False, doc="the source centre lies inside a caustic")
    min_magnification: float = number(optional=True, low=0, high=10_000, doc="minimum extended-source magnification")
    min_images: int = number(optional=True, low=1, high=10, integer=True,
                             doc="minimum number of images of the source centre in the cutout")
    min_arc_snr: float = number(optional=True, low=0, high=1e6, doc="minimum arc S/N in arc_snr_band")
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
    unlensed_source: float = number(1.0, low=0, high=1e6, doc="weight: the source unlensed, behind or beside the galaxy")
    ring_galaxy: float = number(1.0, low=0, high=1e6, doc="weight: a blue star-forming ring around the galaxy")
    spiral_arms: float = number(1.0, low=0, high=1e6, doc="weight: blue spiral arms around the galaxy")
    tidal_features: float = number(1.0, low=0, high=1e6, doc="weight: red shells or streams, sometimes a merging companion")
    edge_on_disk: float = number(1.0, low=0, high=1e6, doc="weight: a blue edge-on disk next to the galaxy")
    blue_companions: float = number(1.0, low=0, high=1e6, doc="weight: compact blue galaxies near the galaxy")

    def weights(self) -> dict:
        from ..populations.negatives import NEGATIVE_CLASSES

        return {name: getattr(self, name) for name in NEGATIVE_CLASSES}


@dataclass(frozen=True, kw_only=True)
class FieldGalaxySettings:
    band: str = text(optional=True, doc="band of the counts and magnitude range (default: source.counts.band, "
                                         "else the reference band)")
    magnitude_range: tuple = interval((18.0, 25.5), low=5.0, high=35.0, unit="mag",
                                      doc="magnitudes of the background galaxies in the counts band")
    redshift_range: tuple = interval((0.02, 4.0), low=0.0, high=7.0, doc="their redshifts")
    density: float = number(46.0, low=0, high=10_000, unit="arcmin^-2",
                            doc="N(< pivot); 0: no galaxies (default: LSST Science Book 2009, i band, from memory)")
    pivot: float = number(25.0, low=5, high=35, unit="mag", doc="pivot magnitude of the counts")
    slope: float = number(0.31, low=0.01, high=1.0, doc="N(<m) ~ 10^(slope m)")
    early_type_fraction: float = number(0.2, low=0, high=1,
                                        doc="share of early types (de Vaucouleurs, elliptical template); "
                                            "illustrative, from memory")
    max_half_light_radius: float = number(5.0, low=0, low_open=True, high=60, unit="arcsec",
                                          doc="sizes are capped here (the brightest nearby galaxies)")
    lens_clearance: float = number(2.5, low=0, high=100, unit="Einstein radii",
                                   doc="no background galaxy centre this close to a lens (it would be lensed)")


@dataclass(frozen=True, kw_only=True)
class FieldStarSettings:
    magnitude_range: tuple = interval((16.0, 25.5), low=5.0, high=35.0, unit="mag",
                                      doc="magnitudes of the stars in the reference band")
    density: float = number(0.4, low=0, high=10_000, unit="arcmin^-2",
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
class NeighbourSettings:
    galaxies: FieldGalaxySettings = table(FieldGalaxySettings,
                                          doc="unlensed galaxies in each cutout and its PSF margin (as [field.galaxies])")
    stars: FieldStarSettings = table(FieldStarSettings, doc="stars in each cutout and its PSF margin")
    clearance: float = number(1.0, low=0, high=60, unit="arcsec",
                              doc="no neighbour's centre this close to the lens (galaxies also keep "
                                  "galaxies.lens_clearance Einstein radii away)")


@dataclass(frozen=True, kw_only=True)
class OutputSettings:
    shard_size: int = number(100, low=1, high=100_000, integer=True,
                             doc="systems per shard file (the unit of parallel work and of resuming)")
    per_system_files: bool = flag(False, doc="also write one FITS file per system (for looking at)")
    noiseless: bool = flag(True, doc="write the noiseless lensed-source and lens-light planes in shards")
    variance: bool = flag(True, doc="write each pixel's expected noise variance (a VARIANCE plane in shards, "
                                    "B_VAR in per-system files)")
    mask_threshold: float = number(1.0, low=0, low_open=True, high=1e6,
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
    neighbours: NeighbourSettings = table(NeighbourSettings, optional=True,
                                          doc="crowded cutouts: unlensed galaxies and stars around each lens")
    name: str = text("simlens-run", doc="run name (default: the recipe file's stem)")
    count: int = number(100, low=1, high=10_000_000, integer=True, doc="number of systems")
    seed: int = number(0, low=0, high=2**63 - 1, integer=True, doc="random seed of the run")
    source_text: str = ""  # the recipe file's text, kept for the manifest
    origin: str = "<recipe>"  # where it came from

    # -- convenience ----------------------------------------------------------------------------
    def with_overrides(self, *, count: int | None = None, seed: int | None = None) -> "Recipe":
        changes = {}
        if count is not None:
            check_number(self.origin, "count", count, Recipe.__dataclass_fields__["count"].metadata)
            changes["count"] = int(count)
        if seed is not None:
            check_number(self.origin, "seed", seed, Recipe.__dataclass_fields__["seed"].metadata)
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



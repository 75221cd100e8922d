"""Checks of a recipe that involve several keys, one function a section; run by parse_recipe."""

from __future__ import annotations

import math

import difflib
import re
from pathlib import Path
from typing import Mapping

from ..errors import RecipeError, SimlensError
from .distributions import Grid
from ..lensing.lens_models import LENS_MODELS
from .schema import MassSettings, Recipe
from .values import shown

__all__ = ["check_recipe"]

# Field counts: the deepest surveys reach a few hundred galaxies per arcmin^2 (common practice:
# Hubble Ultra Deep Field counts, from memory); far beyond that is a mistake, and a hang.
MAX_OBJECTS_PER_ARCMIN2 = 2000.0

_SAFE_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,99}$")


def check_recipe(recipe: Recipe) -> None:
    """Every check across keys, section by section; the first failure raises a RecipeError."""
    _check_name(recipe)
    _check_survey(recipe)
    _check_colours(recipe)
    needs_filters = _check_filters(recipe)
    if recipe.field is not None:
        _check_field(recipe, needs_filters)
    if recipe.neighbours is not None:
        _check_neighbours(recipe)
    if recipe.source.stamps is not None:
        _check_stamps(recipe)
    _check_negatives(recipe)
    _check_selection(recipe)
    _check_mass(recipe)
    _check_lens_scaling(recipe)
    _check_line_of_sight_and_subhalos(recipe)
    _check_redshifts(recipe)
    _check_position(recipe)
    _check_cosmology(recipe)
    _check_transients(recipe)


def _require_band(origin: str, path: str, value: str | None, names) -> None:
    """A key naming a band must name one of the survey's."""
    if value is not None and value not in names:
        raise RecipeError(origin, path, f"{shown(value)} is not a band", ", ".join(repr(n) for n in names))


def _require_filters(recipe: Recipe, why: str) -> None:
    """Every band needs a filter curve for ``why`` (template or black-body colours)."""
    missing = [b.name for b in recipe.survey.bands if b.filter is None]
    if missing:
        raise RecipeError(recipe.origin, f"survey.bands.{missing[0]}.filter", "is missing",
                          f"a filter curve for {why}, e.g. filter = 'LSST_" + missing[0][:1] + "'")


def _check_name(recipe: Recipe) -> None:
    if not _SAFE_NAME.match(recipe.name):
        # The name becomes the default run folder outputs/<name>: it must not reach outside it.
        raise RecipeError(recipe.origin, "name", f"{shown(recipe.name)} cannot name a run folder",
                          "letters, digits, '_', '-' and '.', starting with a letter or digit, no '/'")


def _check_survey(recipe: Recipe) -> None:
    survey = recipe.survey
    if not survey.band_names:
        raise RecipeError(recipe.origin, "survey.bands", "is missing", "at least one [survey.bands.NAME] table")
    _require_band(recipe.origin, "survey.reference_band", survey.reference_band, survey.band_names)
    for band in survey.bands:
        path = f"survey.bands.{band.name}.psf.fwhm"
        if survey.seeing is None and band.psf.fwhm is None:
            raise RecipeError(recipe.origin, path, "required", "the band's PSF FWHM in arcsec, or one [survey.seeing] "
                                                               "table for all bands")
        if survey.seeing is not None and band.psf.fwhm is not None:
            raise RecipeError(recipe.origin, path, "is given together with [survey.seeing]",
                              "either each band's psf.fwhm or [survey.seeing], not both")
    if survey.seeing is not None:
        _require_filters(recipe, "[survey.seeing] (each band's FWHM follows its filter's mean wavelength)")
    for band in survey.bands:
        if band.psf.optics is not None and band.psf.optics.wavelength is None and band.filter is None:
            raise RecipeError(recipe.origin, f"survey.bands.{band.name}.psf.optics.wavelength", "is missing",
                              "the optical PSF's wavelength in nm, or the band's filter (its mean wavelength)")


def _check_colours(recipe: Recipe) -> None:
    """Either a physical model or explicit values (with a colour per non-reference band)."""
    origin, lens, source = recipe.origin, recipe.lens, recipe.source
    names, ref = recipe.survey.band_names, recipe.reference_band
    others = [n for n in names if n != ref]
    _check_either(origin, "lens", lens.population is not None, "population",
                  {"redshift": lens.redshift, "velocity_dispersion": lens.velocity_dispersion})
    _check_either(origin, "lens.light", lens.light.scaling is not None, "scaling",
                  {"magnitude": lens.light.magnitude, "half_light_radius": lens.light.half_light_radius},
                  colors=lens.light.colors)
    rated = source.supernova is not None and source.supernova.rate is not None
    counted = source.quasar is not None and source.quasar.luminosity_function is not None
    if rated and source.redshift is not None:
        raise RecipeError(origin, "source.redshift", "is set together with source.supernova.rate, which draws it",
                          "source.supernova.redshift_range")
    if counted and source.redshift is not None:
        raise RecipeError(origin, "source.redshift", "is set together with source.quasar.luminosity_function, "
                          "which draws it", "source.quasar.redshift_range")
    if source.quasar is not None and (source.quasar.magnitude is None) != counted:
        raise RecipeError(origin, "source.quasar.magnitude", "is missing" if not counted else
                          "is set together with luminosity_function, which draws it",
                          "a magnitude, or a luminosity_function with magnitude_range" if not counted
                          else "source.quasar.magnitude_range")
    if counted and (source.counts is not None or source.supernova is not None or source.position.density is not None):
        raise RecipeError(origin, "source.quasar.luminosity_function", "is set together with [source.counts], "
                          "[source.supernova] or source.position.density",
                          "explicit host galaxies (source.magnitude, ...): the function gives redshifts and density")
    rated = rated or counted
    _check_either(origin, "source", source.counts is not None, "counts",
                  {"magnitude": source.magnitude, "half_light_radius": source.half_light_radius,
                   **({} if rated else {"redshift": source.redshift})}, colors=source.colors)
    if source.counts is not None and source.clumps.colors:
        raise RecipeError(origin, "source.clumps.colors", "is set together with source.counts",
                          "source.clumps.template (colours come from templates with source.counts)")
    if source.counts is None and source.clumps.template is not None:
        raise RecipeError(origin, "source.clumps.template", "needs source.counts (template colours)",
                          "source.clumps.colors, or a [source.counts] table")
    if source.counts is not None:
        _require_band(origin, "source.counts.band", source.counts.band, names)
    color_sets = [("lens.light.colors", lens.light.colors, lens.light.scaling is None),
                  ("source.colors", source.colors, source.counts is None),
                  ("source.clumps.colors", source.clumps.colors, False)]
    if source.second is not None:
        color_sets.append(("source.second.colors", source.second.colors, False))
    envelope = lens.light.envelope
    if envelope is not None:  # offsets: a band left out has none
        color_sets.append(("lens.light.envelope.color_offsets", envelope.color_offsets, None))
        if lens.mass.model == "stars_and_halo":
            raise RecipeError(origin, "lens.light.envelope", "is not supported with lens.mass.model = "
                              "'stars_and_halo' (its stars follow one Sersic of the lens light)",
                              "remove [lens.light.envelope], or use another mass model")
    for path, colors, required in color_sets:
        for band in colors:
            if band not in others:
                why = "is the reference band (its colour is 0 by definition)" if band == ref else "is not a band"
                raise RecipeError(origin, f"{path}.{band[:80]}", why,
                                  "the bands " + ", ".join(repr(n) for n in others) if others else "no colours")
        if required or (colors and required is not None):
            missing = [n for n in others if n not in colors]
            if missing:
                raise RecipeError(origin, path, f"has no colour for band {missing[0]!r}",
                                  f"m_band - m_{ref} for each of " + ", ".join(repr(n) for n in others))


def _check_filters(recipe: Recipe) -> list:
    """Filter curves load; the models that need them have them.  Returns the keys needing them."""
    origin, lens, source = recipe.origin, recipe.lens, recipe.source
    needs_filters = [what for what, on in (("lens.light.scaling", lens.light.scaling is not None),
                                           ("source.counts", source.counts is not None),
                                           ("source.quasar", source.quasar is not None)) if on]
    if needs_filters:
        _require_filters(recipe, f"the template colours that {needs_filters[0]} asks for")
    base = str(Path(origin).parent) if origin != "<recipe>" else "."
    for band in recipe.survey.bands:
        if band.filter is not None:
            _check_filter(origin, f"survey.bands.{band.name}.filter", band.filter, base)
    for path, settings in (("lens.light.scaling", lens.light.scaling), ("source.counts", source.counts)):
        if settings is not None:
            _check_filter(origin, f"{path}.rest_filter", settings.rest_filter, base)
    return needs_filters


def _check_stamps(recipe: Recipe) -> None:
    """A stamp catalogue is a readable catalogue of stamps (simlens.populations.stamps)."""
    from ..populations.stamps import load_stamps  # astropy loads only for recipes with stamps

    stamps = recipe.source.stamps
    base = Path(recipe.origin).parent if recipe.origin != "<recipe>" else Path(".")
    path = base / stamps.catalogue
    try:
        found = path.is_file()
    except OSError:  # a name the file system cannot hold
        found = False
    if not found:
        raise RecipeError(recipe.origin, "source.stamps.catalogue", f"{shown(stamps.catalogue)}: no such file "
                          f"(looked for {path})", "a FITS stamp catalogue, relative to the recipe")
    if stamps.deconvolve_to is not None and stamps.format == "table" and stamps.psf_fwhm <= 0:
        raise RecipeError(recipe.origin, "source.stamps.deconvolve_to", "needs the stamps' own PSF to remove",
                          "psf_fwhm = the FWHM of their (Gaussian) PSF in arcsec")
    try:
        load_stamps(str(path), stamps.format, stamps.psf_fwhm, stamps.deconvolve_to)
    except SimlensError as exc:
        raise RecipeError(recipe.origin, "source.stamps.catalogue", str(exc), "a FITS table with stamp, "
                          "pixel_scale, magnitude and band columns (see the README)") from None


def _check_negatives(recipe: Recipe) -> None:
    neg = recipe.negatives
    if neg.fraction > 0 and sum(neg.weights().values()) <= 0:
        raise RecipeError(recipe.origin, "negatives", f"fraction = {neg.fraction:g} but every class weight is 0",
                          "a positive weight for at least one class")


def _check_selection(recipe: Recipe) -> None:
    _require_band(recipe.origin, "selection.arc_snr_band", recipe.selection.arc_snr_band, recipe.survey.band_names)


def _check_mass(recipe: Recipe) -> None:
    origin = recipe.origin
    mass, defaults = recipe.lens.mass, MassSettings()
    for model in LENS_MODELS.values():  # a model's own keys (the registry) are refused by the others
        for key in model.recipe_keys.values():
            if mass.model != model.name and getattr(mass, key) != getattr(defaults, key):
                raise RecipeError(origin, f"lens.mass.{key}", f"applies to model = '{model.name}' only, "
                                  f"not to model = '{mass.model}'", f"remove it, or set model = '{model.name}'")
    if mass.model == "stars_and_halo":
        if mass.halo_mass is None:
            raise RecipeError(origin, "lens.mass.halo_mass", "is missing for model = 'stars_and_halo'",
                              "an NFW M200 in M_sun, e.g. { log_uniform = [1e12, 1e13] }")
        scaling = recipe.lens.light.scaling
        if scaling is None or scaling.mass_to_light is None:
            raise RecipeError(origin, "lens.light.scaling.mass_to_light",
                              "is needed for model = 'stars_and_halo' (the stars' mass follows the light)",
                              "a [lens.light.scaling] table with mass_to_light")


# The sizes a fundamental plane may give a lens of 200 km/s at the Faber-Jackson luminosity (kpc):
# early types of that sigma have R_e of a few kpc (common practice); the plane's coefficients are
# tied, so one changed alone moves R_e by orders of magnitude.
PLANE_RADIUS_RANGE = (0.1, 100.0)


def _check_lens_scaling(recipe: Recipe) -> None:
    """The Faber-Jackson relation and the fundamental plane together give a lens of 200 km/s a
    size in PLANE_RADIUS_RANGE."""
    import numpy as np

    from ..populations.scaling_relations import FaberJackson, FundamentalPlane
    from .schema import FABER_JACKSON_PLANE_KEYS, LensLightScalingSettings

    s = recipe.lens.light.scaling
    if s is None:
        return
    if s.relations != "faber_jackson_plane":
        defaults = LensLightScalingSettings()
        changed = [k for k in FABER_JACKSON_PLANE_KEYS if getattr(s, k) != getattr(defaults, k)]
        if changed:
            raise RecipeError(recipe.origin, f"lens.light.scaling.{changed[0]}",
                              f"{', '.join(changed)} only apply with relations = \"faber_jackson_plane\"; "
                              f"relations = \"{s.relations}\" draws luminosity and size from its own joint law",
                              "add relations = \"faber_jackson_plane\" to use your coefficients, or remove them")
        return
    fj = FaberJackson(s.faber_jackson_slope, s.faber_jackson_magnitude, s.faber_jackson_sigma, 0.0)
    with np.errstate(all="ignore"):
        log_r = float(FundamentalPlane(s.plane_a, s.plane_b, s.plane_c).mean_log_radius(200.0, fj.mean_magnitude(200.0)))
    low, high = PLANE_RADIUS_RANGE
    if not (math.log10(low) <= log_r <= math.log10(high)):
        shown_r = f"{10 ** log_r:.3g} kpc" if abs(log_r) < 300 else "a size out of all range"
        raise RecipeError(recipe.origin, "lens.light.scaling",
                          f"the Faber-Jackson relation and the fundamental plane (plane_a, plane_b, plane_c) give a "
                          f"lens of 200 km/s {shown_r}, outside {low:g}-{high:g} kpc",
                          "the coefficients of one published plane together (default: Bernardi et al. 2003), "
                          "and a Faber-Jackson magnitude near -21.6")


def _check_line_of_sight_and_subhalos(recipe: Recipe) -> None:
    origin = recipe.origin
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
    if subs.mass_fraction is not None and subs.count != type(subs)().count:
        raise RecipeError(origin, "lens.subhalos.count", "is given together with mass_fraction, which draws it",
                          "remove count, or remove mass_fraction")
    if recipe.lens.line_of_sight.light and recipe.lens.light.scaling is None:
        raise RecipeError(origin, "lens.line_of_sight.light", "needs the relations of [lens.light.scaling] "
                          "(Faber-Jackson, fundamental plane, template)", "a [lens.light.scaling] table, or light = false")
    if subs.light and recipe.lens.light.scaling is None:
        raise RecipeError(origin, "lens.subhalos.light", "needs the lens's template and mass-to-light ratio",
                          "a [lens.light.scaling] table, or light = false")


def _check_redshifts(recipe: Recipe) -> None:
    origin, lens, source = recipe.origin, recipe.lens, recipe.source
    z_lens = lens.population.redshift_range if lens.population is not None else lens.redshift.support
    z_source = (source.counts.redshift_range if source.counts is not None else source.redshift.support
                if source.redshift is not None else source.supernova.redshift_range if source.supernova is not None
                else source.quasar.redshift_range)
    if source.position.mode is None and z_source[0] <= z_lens[1]:
        raise RecipeError(origin, "source.counts.redshift_range" if source.counts is not None else "source.redshift",
                          f"can be {z_source[0]:g}, not behind lenses at redshift up to {z_lens[1]:g} "
                          f"({'lens.population.redshift_range' if lens.population is not None else 'lens.redshift'})",
                          "source redshifts all above the largest lens redshift, or a placement mode "
                          "(source.position.mode = 'lens' redraws pairs, 'sky' keeps foreground sources)")
    if z_source[1] <= z_lens[0]:
        raise RecipeError(origin, "source", f"no source can lie behind a lens: sources reach z = {z_source[1]:g}, "
                          f"lenses start at z = {z_lens[0]:g}", "overlapping redshift ranges")


def _check_position(recipe: Recipe) -> None:
    origin, pos = recipe.origin, recipe.source.position
    explicit = pos.radius_in_einstein_radii is not None or pos.x is not None or pos.y is not None
    if pos.mode is not None and explicit:
        raise RecipeError(origin, "source.position", f"gives mode = {pos.mode!r} and explicit positions",
                          "either mode, or radius_in_einstein_radii, or x and y")
    if pos.radius_in_einstein_radii is not None and (pos.x is not None or pos.y is not None):
        raise RecipeError(origin, "source.position", "gives both radius_in_einstein_radii and x/y",
                          "either radius_in_einstein_radii, or x and y")
    if (pos.x is None) != (pos.y is None):
        raise RecipeError(origin, "source.position", "gives only one of x and y", "both x and y")
    rated = ((recipe.source.supernova is not None and recipe.source.supernova.rate is not None)
             or (recipe.source.quasar is not None and recipe.source.quasar.luminosity_function is not None))
    if pos.mode == "sky" and pos.density is None and recipe.source.counts is None and not rated:
        raise RecipeError(origin, "source.position.density", "is missing for mode = 'sky'",
                          "a source density (arcmin^-2), a [source.counts] table, source.supernova.rate or "
                          "source.quasar.luminosity_function")
    if pos.mode != "sky" and pos.density is not None:
        raise RecipeError(origin, "source.position.density", "applies to mode = 'sky' only",
                          "remove it, or set mode = 'sky'")


def _check_cosmology(recipe: Recipe) -> None:
    origin, cosmo = recipe.origin, recipe.cosmology
    if cosmo.name is not None:
        from ..cosmology import available_names

        if any(v is not None for v in (cosmo.H0, cosmo.Om0, cosmo.Ode0)):
            raise RecipeError(origin, "cosmology", "gives both a name and parameters",
                              "either name = 'Planck18' or H0, Om0 (and optionally Ode0)")
        if cosmo.name not in available_names():
            hint = difflib.get_close_matches(cosmo.name, available_names(), n=1, cutoff=0.4)
            raise RecipeError(origin, "cosmology.name", f"unknown cosmology {shown(cosmo.name)}"
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
    _check_background(recipe, "field", f)


def _check_neighbours(recipe: Recipe) -> None:
    if recipe.field is not None:
        raise RecipeError(recipe.origin, "neighbours", "is given with [field], which draws its own background",
                          "[field.galaxies] and [field.stars] for fields; [neighbours] only for cutout runs")
    _check_background(recipe, "neighbours", recipe.neighbours)


def _check_background(recipe: Recipe, section: str, settings) -> None:
    """The ``galaxies`` and ``stars`` counts of ``[field]`` or ``[neighbours]``."""
    origin = recipe.origin
    _require_band(origin, f"{section}.galaxies.band", settings.galaxies.band, recipe.survey.band_names)
    for what, counts in (("galaxies", settings.galaxies), ("stars", settings.stars)):
        # N(< m) = density 10^(slope (m - pivot)) at the faint end: what an image will hold
        faint = counts.density * 10 ** (counts.slope * (counts.magnitude_range[1] - counts.pivot))
        if faint > MAX_OBJECTS_PER_ARCMIN2:
            raise RecipeError(origin, f"{section}.{what}", f"the counts give {faint:.3g} {what} per arcmin^2 brighter "
                              f"than {counts.magnitude_range[1]:g} mag (density, pivot, slope)",
                              f"at most {MAX_OBJECTS_PER_ARCMIN2:g} per arcmin^2; a fainter pivot, a lower density "
                              f"or slope, or a brighter magnitude_range end")
    if settings.galaxies.density > 0:
        _require_filters(recipe, f"the background galaxies' template colours (or {section}.galaxies.density = 0)")
    if settings.stars.density > 0:
        _require_filters(recipe, f"the stars' black-body colours (or {section}.stars.density = 0)")


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
    from ..populations.photometry import load_filter

    try:
        load_filter(spec, base)
    except (OSError, ValueError) as exc:
        raise RecipeError(origin, path, str(exc), "a GalSim filter name or a two-column text file") from None




def _check_transients(recipe: Recipe) -> None:
    """Sources that vary need epochs, filter curves (their colours come from spectra) and cutouts."""
    origin, source, cadence = recipe.origin, recipe.source, recipe.survey.cadence
    varying = [path for path, on in (("source.supernova", source.supernova is not None),
                                     ("source.quasar.variability", source.quasar is not None
                                      and source.quasar.variability is not None)) if on]
    if varying and cadence is None:
        raise RecipeError(origin, varying[0], "needs the survey's epochs", "a [survey.cadence] table")
    if varying and not (source.supernova is not None and source.supernova.light_curves is not None
                        and source.quasar is None):
        _require_filters(recipe, f"{varying[0]} (its colours come from its spectrum)")
    supernova = source.supernova
    if supernova is not None and supernova.rate is not None:
        if source.counts is not None:
            raise RecipeError(origin, "source.supernova.rate", "is set together with [source.counts]",
                              "explicit host galaxies (source.magnitude, ...): the rate gives the redshifts")
        if supernova.fraction < 1 or source.position.density is not None:
            key = "fraction" if supernova.fraction < 1 else "density"
            raise RecipeError(origin, f"source.supernova.{key}" if key == "fraction" else "source.position.density",
                              "is set together with source.supernova.rate, which gives every source and their density",
                              "no fraction below 1, no density")
    if cadence is None:
        return
    if recipe.field is not None:
        raise RecipeError(origin, "survey.cadence", "is not supported in field runs ([field])",
                          "cutout runs for epochs; a field image is one epoch")
    if recipe.neighbours is not None:
        raise RecipeError(origin, "survey.cadence", "is not supported with [neighbours]",
                          "a crowded cutout or epochs, not both (the neighbours would keep one PSF)")
    if cadence.visits is None and not any(b.revisit is not None for b in recipe.survey.bands):
        raise RecipeError(origin, "survey.cadence", "has no visits file and no band with a revisit gap",
                          "survey.bands.NAME.revisit = days, or survey.cadence.visits = 'file'")
    if source.supernova is not None and source.supernova.spectra is not None and source.supernova.light_curves is not None:
        raise RecipeError(origin, "source.supernova.light_curves", "is given together with spectra",
                          "a spectral time series or light curves in the survey's bands")
    if source.supernova is not None and (source.supernova.spectra or source.supernova.light_curves) is not None:
        base = Path(origin).parent if origin != "<recipe>" else Path(".")
        from ..transients.supernova import BandLightCurves, SpectralTimeSeries

        key = "spectra" if source.supernova.spectra is not None else "light_curves"
        try:
            if key == "spectra":
                SpectralTimeSeries.from_file(base / source.supernova.spectra)
            else:
                BandLightCurves.from_file(base / source.supernova.light_curves, recipe.survey.band_names)
        except (OSError, ValueError) as exc:
            raise RecipeError(origin, f"source.supernova.{key}", str(exc),
                              "'phase_day wavelength_nm f_lambda' lines, all wavelengths at every phase"
                              if key == "spectra" else "'phase_day band magnitude_offset' lines for every band") from None
    from ..transients.cadence import survey_epochs

    survey_epochs(recipe)  # refuses no visits, too many, grids over conditions, bad visit files

"""The survey's epochs: when each band visits the field, and each visit's seeing, sky and depth.

One set of epochs serves every system of a run (the lenses of one survey field share its visits and
its nights' weather), drawn from the run's seed alone (:func:`simlens.truth.streams.cadence_streams`),
so a system's epoch images stay a function of ``(seed, system_id)``.

The cadence model: each band with a ``revisit`` gap is visited at ``start + k * revisit`` (plus a
Gaussian ``jitter``), kept while the field is in season (the first ``season`` days of each year
from the start) and the night is not lost to weather (each night lost with probability
``weather_loss``, all its visits together).  A ``visits`` file gives the visits instead.  Each
visit draws the band's conditions from the recipe's distributions (``[survey.seeing]`` or
``psf.fwhm``, ``sky_brightness``, ...), independently from visit to visit.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from ..errors import RecipeError, clip
from ..recipe import Recipe
from ..recipe.distributions import Grid
from ..truth.conditions import BandConditions
from ..truth.psf import FWHM_LIMITS, band_optics, psf_shear, seeing_factors
from ..truth.streams import cadence_streams

__all__ = ["Epochs", "survey_epochs", "MAX_EPOCHS", "five_sigma_depth"]

MAX_EPOCHS = 3000  # epochs per run: a cube holds systems x epochs cutouts
DAYS_PER_YEAR = 365.25


@dataclass(frozen=True, eq=False)
class Epochs:
    """The visits of a survey in time order: MJD, band and that visit's :class:`BandConditions`."""

    time: np.ndarray  # MJD
    band: tuple  # band name per epoch
    conditions: tuple  # BandConditions per epoch
    start: float = math.nan  # the survey's span (MJD): the cadence's first night and start + length,
    end: float = math.nan  # or a visits file's first and last visit

    @property
    def span_days(self) -> float:
        return self.end - self.start

    def __len__(self) -> int:
        return int(self.time.size)

    @property
    def widest_fwhm(self) -> float:
        from ..truth.psf import major_axis_fwhm

        return max((major_axis_fwhm(c) for c in self.conditions), default=0.0)

    def rows(self) -> list[dict]:
        """One row per epoch for the EPOCHS table (see simlens.output.truth.EPOCH_COLUMNS)."""
        return [dict(epoch=k, mjd=float(t), band=b, conditions=c) for k, (t, b, c)
                in enumerate(zip(self.time, self.band, self.conditions))]


def five_sigma_depth(band: BandConditions) -> float:
    """The 5-sigma point-source depth (AB) of a visit, sky-limited: the flux whose S/N over the
    PSF's noise-equivalent area ``1 / sum(p_i^2)`` (the effective PSF image, unit sum) is 5 at the
    sky's noise (common practice for survey depths)."""
    from ..imaging.observe import effective_psf_image

    psf = effective_psf_image(band)
    area = 1.0 / float(np.sum(psf**2))
    return band.magnitude_from_counts(5.0 * band.background_sigma * math.sqrt(area))


def _visits_from_model(recipe: Recipe, rng: np.random.Generator) -> tuple[np.ndarray, list[str], dict]:
    cadence = recipe.survey.cadence
    times, bands = [], []
    for band in recipe.survey.bands:
        if band.revisit is None:
            continue
        t = cadence.start + np.arange(0.0, cadence.length + 1e-9, band.revisit)
        if cadence.jitter > 0:
            t = t + cadence.jitter * rng.standard_normal(t.size)
        times.append(t)
        bands += [band.name] * t.size
    t = np.concatenate(times) if times else np.empty(0)
    keep = (t >= cadence.start) & (t <= cadence.start + cadence.length)
    keep &= np.mod(t - cadence.start, DAYS_PER_YEAR) < cadence.season
    if cadence.weather_loss > 0:
        nights = int(math.ceil(cadence.length)) + 1
        lost = rng.uniform(size=nights) < cadence.weather_loss
        keep &= ~lost[np.clip(np.floor(t - cadence.start).astype(int), 0, nights - 1)]
    return t[keep], [b for b, k in zip(bands, keep) if k], {}


def _visits_from_file(recipe: Recipe) -> tuple[np.ndarray, list[str], dict]:
    base = Path(recipe.origin).parent if recipe.origin != "<recipe>" else Path(".")
    path = base / recipe.survey.cadence.visits
    where = "survey.cadence.visits"
    try:
        lines = path.read_text(encoding="utf-8").splitlines()
    except (OSError, UnicodeDecodeError) as exc:
        raise RecipeError(recipe.origin, where, f"{clip(str(path), 200)}: cannot be read ({type(exc).__name__})",
                          "a text file of 'mjd band' lines") from None
    times, bands, given = [], [], {}
    for number, line in enumerate(lines, 1):
        words = line.split("#", 1)[0].split()
        if not words:
            continue
        try:
            if len(words) not in (2, 4):
                raise ValueError
            t = float(words[0])
            extra = tuple(float(w) for w in words[2:])
            if not math.isfinite(t) or not all(math.isfinite(v) for v in extra):
                raise ValueError
        except ValueError:
            raise RecipeError(recipe.origin, where, f"{clip(str(path), 200)} line {number}: not 'mjd band' or "
                              f"'mjd band fwhm sky_brightness'", "numbers and a band name per line") from None
        if words[1] not in recipe.survey.band_names:
            raise RecipeError(recipe.origin, where, f"{clip(str(path), 200)} line {number}: "
                              f"{clip(repr(words[1]))} is not a band", ", ".join(recipe.survey.band_names))
        if extra:
            given[len(times)] = extra
        times.append(t)
        bands.append(words[1])
    return np.array(times, float), bands, given


def survey_epochs(recipe: Recipe) -> Epochs:
    """The run's epochs in time order (see the module docstring); a RecipeError where there are
    none or more than MAX_EPOCHS."""
    cadence = recipe.survey.cadence
    if cadence is None:
        raise ValueError("the recipe has no [survey.cadence]")
    streams = cadence_streams(recipe.seed)
    times, bands, given = (_visits_from_file(recipe) if cadence.visits is not None
                           else _visits_from_model(recipe, streams["visits"]))
    if not len(times):
        raise RecipeError(recipe.origin, "survey.cadence", "gives no visits",
                          "a revisit gap for at least one band (survey.bands.NAME.revisit), a season and "
                          "weather that leave nights, or a visits file")
    if len(times) > MAX_EPOCHS:
        raise RecipeError(recipe.origin, "survey.cadence", f"gives {len(times)} visits",
                          f"at most {MAX_EPOCHS}: longer revisit gaps, a shorter length or season")
    order = np.argsort(times, kind="stable")
    rng = streams["conditions"]
    factors = seeing_factors(recipe)
    optics = band_optics(recipe)
    conditions = []
    for k in order:  # conditions in time order, so that they follow the visits
        conditions.append(_visit_conditions(recipe, bands[k], rng, factors, optics, given.get(int(k))))
    time = np.asarray(times)[order]
    start, end = ((float(time[0]), float(time[-1])) if cadence.visits is not None
                  else (cadence.start, cadence.start + cadence.length))
    return Epochs(time=time, band=tuple(bands[k] for k in order), conditions=tuple(conditions), start=start, end=end)


def _visit_conditions(recipe: Recipe, name: str, rng, factors: dict, optics: dict, given) -> BandConditions:
    survey = recipe.survey
    band = survey.band(name)
    prefix = f"survey.bands.{name}."
    values = {}
    for path, param in recipe.parameters():
        if path.startswith(prefix) or path == "survey.seeing.fwhm":
            if isinstance(param, Grid):
                raise RecipeError(recipe.origin, path, "is a grid, which does not combine with [survey.cadence]",
                                  "a number or a distribution: each visit draws its own conditions")
            values[path] = float(param.from_uniform(rng.uniform()))
    if survey.seeing is not None:
        fwhm = values["survey.seeing.fwhm"] * factors[name]
    else:
        fwhm = values[prefix + "psf.fwhm"]
    sky = values[prefix + "sky_brightness"]
    if given is not None:
        fwhm, sky = given
    conditions = BandConditions(
        name=name, pixel_scale=survey.pixel_scale, zero_point=values[prefix + "zero_point"], sky_brightness=sky,
        exposure_time=values[prefix + "exposure_time"], gain=values[prefix + "gain"],
        read_noise=values[prefix + "read_noise"], psf_profile=band.psf.profile,
        psf_fwhm=float(np.clip(fwhm, *FWHM_LIMITS)), psf_beta=values[prefix + "psf.beta"],
        psf_optics=optics[name], exposures=band.exposures, resampling=band.resampling)
    return replace(conditions, **psf_shear(band, values))

"""How many lenses a survey holds: a forecast from the recipe's populations (``simlens forecast``).

The recipe's deflector population (``[lens.population]``: a velocity dispersion function over its
redshift and sigma ranges) and source population (``[source.counts]``, or explicit distributions
with ``source.position.density``) are drawn in sky mode: each
drawn system is one deflector galaxy with the sources a Poisson process of the counts puts around
it.  A system is *detectable* by a rule set:

- ``collett2015`` (Collett 2015, ApJ 811, 20; as summarised from memory): the source is multiply
  imaged; in some band b the lens is resolved, theta_E^2 > r_s^2 + (FWHM_b / 2)^2 (r_s the
  source's half-light radius); the source's total magnification exceeds 3; and the lensed source,
  with the lens light subtracted (its noise kept), has S/N > 20 in that band, the S/N summed over
  the pixels where the lensed source exceeds the noise (sum S / sqrt(sum var); Collett's
  definition as we read it).  ``collett2015_matched`` takes the optimal matched-filter S/N
  (simlens's arc S/N, sqrt(sum S^2 / var) over all pixels) instead: higher for faint, spread arcs.  Magnification and
  S/N need images: they come from a fast noiseless estimate (:func:`estimated_source_view`: the
  renderer's rays and refined source, the band's PSF sampled once, block sums, the CCD-equation
  variance of sky, read noise and the lens light; no GalSim stage, no noise)
  for the systems that pass the cuts without images.
- ``selection``: the recipe's own ``[selection]`` cuts, judged as ``make`` judges them (images
  rendered where a cut needs them); the detectable share is accepted systems over candidates.
- ``multiply_imaged``: every multiply imaged source, no cut: the lensing optical depth times the
  source density (the limit Turner, Ostriker & Gott 1984 give in closed form).
- ``om10_supernova`` (recipes with ``source.supernova.rate``; the criteria of Oguri & Marshall 2010,
  MNRAS 405, 2579, as recalled: from memory): a multiply imaged supernova whose images are
  separated by at least 2/3 of the reference band's FWHM and whose second brightest image (third
  brightest of a quad) is brighter than the survey's limit: here in one visit at least of the
  reference band, against that visit's 5-sigma depth, at the image's own delay (OM10 ask it at
  maximum; the visits add the seasons and the weather).  Its counts are per year: the supernovae
  drawn are those with maxima in the survey's span (plus the peak margins), scaled to 365.25 days.
- ``om10_quasar`` (recipes with ``source.quasar.luminosity_function``; OM10's criteria, from
  memory): images at least 2/3 of the FWHM apart, a double's fainter image at least a tenth of the
  brighter, and the fainter image of a double (third brightest of a quad) brighter than the
  reference band's 10-sigma point-source depth.  Lensed supernovae and quasars are rare (a few
  in a million deflectors), so they are drawn at RARE_SOURCE_DRAW_DENSITY per arcmin^2 and the counts
  divided by that boost: exact while a deflector's caustics rarely hold two of them (the kept
  first one undercounts by about half the mean number inside, 0.5 % at theta_E = 1.5").

The rate is the deflectors' sky density times the detectable share; its errors are the sampling
error (Poisson on the detected count) and the Poisson scatter of the count in the survey's area.
"""

from __future__ import annotations

import dataclasses
import json
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from astropy.table import Table

from .errors import SimlensError
from .recipe import Recipe

__all__ = ["RULE_SETS", "Forecast", "forecast", "estimated_source_view", "SourceView", "forecast_recipe",
           "write_forecast"]

RULE_SETS = ("collett2015", "collett2015_matched", "selection", "multiply_imaged", "om10_supernova", "om10_quasar")
SEPARATION_IN_FWHM = 2.0 / 3.0  # Oguri & Marshall 2010 (from memory)
RARE_SOURCE_DRAW_DENSITY = 10.0  # per arcmin^2: supernovae and quasars drawn boosted to this density
MIN_FLUX_RATIO = 0.1  # om10_quasar: a double's fainter image over its brighter (Oguri & Marshall 2010, from memory)
TEN_SIGMA = 2.5 * math.log10(2.0)  # a 10-sigma depth is this much brighter than the 5-sigma one
DETECTION_SNR = 20.0  # Collett 2015
MIN_MAGNIFICATION = 3.0  # Collett 2015
RING_COVERAGE = 0.75  # lensed light around this share of the azimuth is a ring (common practice)
RING_LEVEL = 0.05  # ... counting the pixels above this share of its brightest (the lensed image before the PSF)
AZIMUTH_BINS = 36
DEGREE2_PER_STERADIAN = (180.0 / math.pi) ** 2
BINS = {"einstein_radius": (0.0, 0.25, 0.5, 0.75, 1.0, 1.25, 1.5, 2.0, 2.5, 3.0, 4.0, 6.0),
        "z_lens": (0.0, 0.2, 0.4, 0.6, 0.8, 1.0, 1.5, 2.0, 3.0),
        "z_source": (0.0, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 4.0, 6.0),
        "source_magnitude": (18.0, 22.0, 23.0, 24.0, 25.0, 26.0, 27.0, 28.0, 30.0)}
MULTIPLICITIES = ("double", "quad", "ring")


def forecast_recipe(recipe: Recipe, rules: str) -> Recipe:
    """The recipe as a forecast draws it: sky mode, no negatives, neighbours or fields; under
    ``collett2015`` without the recipe's own cuts (the rule set is the selection)."""
    source = recipe.source
    rare = ("supernova" if source.supernova is not None and source.supernova.rate is not None else
            "quasar" if source.quasar is not None and source.quasar.luminosity_function is not None else None)
    if recipe.lens.population is None or (source.counts is None and source.position.density is None and rare is None):
        raise SimlensError(f"{recipe.origin}: a forecast needs populations with rates: a [lens.population] table "
                           "(the velocity dispersion function) and a [source.counts] table (number counts), "
                           "source.position.density, source.supernova.rate or source.quasar.luminosity_function")
    if rules not in RULE_SETS:
        raise SimlensError(f"unknown rule set {rules!r}; choose from {', '.join(RULE_SETS)}")
    if rules.startswith("om10_") or rare is not None:
        allowed = (f"om10_{rare}", "multiply_imaged") if rare else ()
        if rules not in allowed:
            raise SimlensError(f"{recipe.origin}: the rule sets om10_supernova and om10_quasar go with a supernova "
                               "rate (source.supernova.rate) or a quasar luminosity function; such a recipe takes "
                               "its own or multiply_imaged")
    from .recipe.schema import NegativeSettings, SelectionSettings

    source = dataclasses.replace(source, position=dataclasses.replace(source.position, mode="sky"))
    changes = dict(source=source, negatives=NegativeSettings(), neighbours=None, field=None)
    if rules != "selection":  # the rule set is the selection
        changes["selection"] = dataclasses.replace(SelectionSettings(), max_candidates=recipe.selection.max_candidates)
    return dataclasses.replace(recipe, **changes)


@dataclass(frozen=True)
class SourceView:
    """The fast noiseless view of a system's lensed source in one band."""

    band: str
    magnification: float  # lensed over unlensed flux of the extended source
    snr: float  # sum S / sqrt(sum var) over the pixels where S > sqrt(var) (Collett 2015's S/N)
    matched_snr: float  # sqrt(sum S^2 / var) over all pixels (simlens's arc_snr: the optimal filter)
    ring: bool  # the lensed image (before the PSF) surrounds the lens (RING_COVERAGE of the azimuth)


def estimated_source_view(system, survey, bands, scene=None) -> list[SourceView]:
    """Magnification and S/N of ``system``'s lensed source in ``bands`` without rendering the
    observation: the renderer's ray map and refined source samples
    (:class:`~simlens.imaging.rays.ComponentImages`) and its noiseless pixels
    (:func:`~simlens.imaging.observe.noiseless_pixels`: the band's PSF, pixel response), with the
    CCD equation's variance of sky, read noise and the lens light; no noise is drawn, no image of
    the source centre searched, nothing written."""
    from .imaging.observe import noiseless_pixels, unresampled_variance
    from .imaging.rays import ComponentImages
    from .imaging.render import observation_rays, pixel_grid_for
    from .imaging.scene import build_scene

    grid = pixel_grid_for(system, survey)
    scene = scene if scene is not None else build_scene(system)
    rays, sampling = observation_rays(scene.deflector, grid)
    components = ComponentImages(rays, sampling=sampling, adaptive=survey.adaptive_supersampling)
    components.prepare_lensed(scene.source_light[bands[0]])
    n, pad = grid.size, grid.padding
    centre = (np.arange(n) - 0.5 * (n - 1)) * grid.pixel_scale
    x, y = np.meshgrid(centre, centre)
    ox, oy = grid.lens_offset
    azimuth = np.arctan2(y - oy, x - ox)  # about the lens (the rays take x - offset, as PixelGrid)
    views = []
    for name in bands:
        band = system.band(name)
        light = scene.source_light[name]
        if light.flux <= 0:
            views.append(SourceView(name, math.nan, 0.0, 0.0, False))
            continue
        samples = components.render(light, lensed=True)
        pixels = np.clip(noiseless_pixels(samples, band, grid, sampling, compact=True), 0.0, None)
        lens = np.clip(noiseless_pixels(components.render(scene.lens_light[name], lensed=False), band, grid,
                                        sampling), 0.0, None)
        variance = unresampled_variance(band, lens + pixels)
        matched = float(np.sqrt(np.sum(pixels**2 / variance)))
        above = pixels > np.sqrt(variance)
        snr = float(pixels[above].sum() / math.sqrt(variance[above].sum())) if above.any() else 0.0
        m = samples.shape[0] // sampling
        intrinsic = samples.reshape(m, sampling, m, sampling).sum(axis=(1, 3))[pad:pad + n, pad:pad + n]
        bright = intrinsic > RING_LEVEL * intrinsic.max()
        coverage = np.unique(((azimuth[bright] + math.pi) / (2 * math.pi) * AZIMUTH_BINS).astype(int)).size
        views.append(SourceView(name, float(samples.sum()) / light.flux, snr, matched,
                                coverage >= RING_COVERAGE * AZIMUTH_BINS))
    return views


def _collett_detection(system, survey, band_names, matched: bool = False) -> dict | None:
    """The detection record of a system under ``collett2015`` (``matched``: its matched-filter
    variant), or None."""
    if not (system.lensing and system.multiply_imaged):
        return None
    r_s = system.source_half_light_radius
    resolved = [b for b in band_names if system.einstein_radius**2 > r_s**2 + (system.band(b).psf_fwhm / 2) ** 2]
    if not resolved:
        return None
    from .imaging.scene import build_scene

    scene = build_scene(system)
    views = estimated_source_view(system, survey, resolved, scene)
    snr = (lambda v: v.matched_snr) if matched else (lambda v: v.snr)
    passing = [v for v in views if v.magnification > MIN_MAGNIFICATION and snr(v) > DETECTION_SNR]
    if not passing:
        return None
    best = max(passing, key=snr)
    return dict(band=best.band, snr=best.snr, matched_snr=best.matched_snr, magnification=best.magnification,
                ring=best.ring, n_images=_image_count(system, survey, scene.deflector))


def _images(system, survey, deflector):
    """Images of the source centre, searched as the renderer searches them."""
    from .imaging.render import image_search_windows, pixel_grid_for
    from .lensing.lens_equation import find_images

    windows = image_search_windows(system.einstein_radius, system.mass_q, math.hypot(system.source_x, system.source_y),
                                   pixel_grid_for(system, survey), whole_cutout=bool(system.line_of_sight))
    return find_images(deflector, system.source_x, system.source_y, windows)


def _image_count(system, survey, deflector) -> int:
    return len(_images(system, survey, deflector))


def _separated_images(system, survey, band: str):
    """``(images, deflector)`` of a multiply imaged system whose images are at least
    SEPARATION_IN_FWHM of the band's FWHM apart, or None."""
    if not (system.lensing and system.multiply_imaged):
        return None
    from .imaging.scene import build_scene

    deflector = build_scene(system).deflector
    images = _images(system, survey, deflector)
    if len(images) < 2:
        return None
    x, y = np.asarray(images.x), np.asarray(images.y)
    separation = float(np.max(np.hypot(x[:, None] - x[None, :], y[:, None] - y[None, :])))
    if separation < SEPARATION_IN_FWHM * system.band(band).psf_fwhm:
        return None
    return images, deflector


def _quasar_detection(system, survey, band: str, limit: float) -> dict | None:
    """The detection record of a lensed quasar under ``om10_quasar``, or None: images apart by
    2/3 of the FWHM, a double's flux ratio at least MIN_FLUX_RATIO, and its fainter image (a
    quad's third brightest) brighter than ``limit``."""
    if system.quasar_magnitudes is None:
        return None
    found = _separated_images(system, survey, band)
    if found is None:
        return None
    images = found[0]
    n = len(images)
    flux = np.sort(np.abs(np.asarray(images.magnification)))[::-1]
    if n < 4 and flux[1] < MIN_FLUX_RATIO * flux[0]:
        return None
    counted = system.quasar_magnitudes[band] - 2.5 * math.log10(flux[2 if n >= 4 else 1])
    if not counted <= limit:
        return None
    return dict(band=band, snr=math.nan, matched_snr=math.nan, magnification=float(flux.sum()), ring=False,
                n_images=n)


def _supernova_detection(system, survey, band: str, visits: tuple) -> dict | None:
    """The detection record of a lensed supernova under ``om10_supernova``, or None; ``visits``:
    the times and 5-sigma depths of the band's visits."""
    if system.transient_kind != "sn_ia":
        return None
    found = _separated_images(system, survey, band)
    if found is None:
        return None
    images, deflector = found
    n = len(images)
    times, depths = visits
    counted = np.argsort(-np.abs(np.asarray(images.magnification)))[2 if n >= 4 else 1]  # 2nd brightest, 3rd of a quad
    from .lensing.lens_equation import time_delays

    delay = time_delays(deflector, images, system.source_x, system.source_y, system.days_per_arcsec2)[counted]
    unlensed = system.light_curve.magnitudes_at(times - delay)[band]
    if not np.any(unlensed - 2.5 * math.log10(abs(float(images.magnification[counted]))) <= depths):
        return None
    return dict(band=band, snr=math.nan, matched_snr=math.nan, magnification=float(np.abs(images.magnification).sum()),
                ring=False, n_images=n)


@dataclass
class Forecast:
    """The outcome of a forecast: detected systems and the rates they give."""

    recipe_name: str
    rules: str
    drawn: int  # deflector galaxies drawn (candidates, under ``selection``)
    galaxies_per_deg2: float  # of the deflector population
    area: float  # deg^2
    detections: Table  # one row per detectable system
    window_days: float | None = None  # transients: the window the drawn events' maxima fall in
    boost: float = 1.0  # the drawn source density over the population's (rare transients)

    @property
    def detected(self) -> int:
        return len(self.detections)

    @property
    def per_deg2(self) -> float:
        return self.galaxies_per_deg2 * self.detected / self.drawn / self.boost

    @property
    def sampling_error_per_deg2(self) -> float:
        """The rate's error from the finite draw (Poisson on the detected count)."""
        return self.galaxies_per_deg2 * math.sqrt(max(self.detected, 1)) / self.drawn / self.boost

    @property
    def in_area(self) -> float:
        return self.per_deg2 * self.area

    @property
    def poisson_error_in_area(self) -> float:
        """The scatter of the count a survey of ``area`` would find, given the rate."""
        return math.sqrt(self.in_area)

    def breakdown(self, column: str) -> Table:
        """Counts and rates per deg^2 in bins of ``column`` (or per multiplicity)."""
        per_system = self.galaxies_per_deg2 / self.drawn / self.boost
        if column == "multiplicity":
            values = list(self.detections["multiplicity"]) if self.detected else []
            counts = [values.count(kind) for kind in MULTIPLICITIES]
            return Table({"multiplicity": list(MULTIPLICITIES), "detected": counts,
                          "per_deg2": [c * per_system for c in counts]})
        edges = np.array(BINS[column])
        values = np.asarray(self.detections[column], float) if self.detected else np.empty(0)
        counts, _ = np.histogram(values, bins=edges)
        return Table({f"{column}_low": edges[:-1], f"{column}_high": edges[1:], "detected": counts,
                      "per_deg2": counts * per_system})

    @property
    def per_year(self) -> float:
        """Transients: the lenses found in ``area`` per year of observing (nan for static sources)."""
        return self.in_area * 365.25 / self.window_days if self.window_days else math.nan

    def summary(self) -> dict:
        out = {"recipe": self.recipe_name, "rules": self.rules, "drawn": self.drawn, "detected": self.detected,
               "deflectors_per_deg2": self.galaxies_per_deg2, "lenses_per_deg2": self.per_deg2,
               "sampling_error_per_deg2": self.sampling_error_per_deg2, "area_deg2": self.area,
               "lenses_in_area": self.in_area, "poisson_error_in_area": self.poisson_error_in_area}
        if self.window_days:
            out.update(window_days=self.window_days, density_boost=self.boost, lenses_in_area_per_year=self.per_year,
                       sampling_error_per_year=self.sampling_error_per_deg2 * self.area * 365.25 / self.window_days)
        return out


def forecast(recipe: Recipe, n: int, area: float, rules: str = "collett2015", progress=None) -> Forecast:
    """Draw ``n`` deflector galaxies of ``recipe`` in sky mode and count the detectable lenses."""
    from .imaging.scene import build_scene
    from .runs.rendering import rendered_systems
    from .truth.sampler import PopulationSampler

    if not n >= 1:
        raise SimlensError(f"--n must be at least 1, got {n}")
    if not area > 0:
        raise SimlensError(f"--area must be positive, got {area}")
    drawn_recipe = forecast_recipe(recipe, rules).with_overrides(count=n)
    sampler = PopulationSampler(drawn_recipe)
    boost = 1.0
    if sampler.supernova_redshifts is not None or sampler.quasar_population is not None:  # rare: drawn denser,
        # counted at the population's density
        density = sampler.source_density
        boost = max(1.0, RARE_SOURCE_DRAW_DENSITY / density)
        position = dataclasses.replace(drawn_recipe.source.position, density=density * boost)
        drawn_recipe = dataclasses.replace(drawn_recipe, source=dataclasses.replace(drawn_recipe.source, position=position))
        sampler = PopulationSampler(drawn_recipe)
    galaxies = sampler.deflectors.sky_density() / DEGREE2_PER_STERADIAN
    survey, rows, drawn = drawn_recipe.survey, [], 0
    band_names = survey.band_names
    counts = drawn_recipe.source.counts
    counts_band = (counts.band if counts is not None else None) or drawn_recipe.reference_band
    reference = drawn_recipe.reference_band
    from .transients.cadence import five_sigma_depth

    window = limit = None  # om10_quasar: each system's reference band gives its own limit
    if sampler.supernova_redshifts is not None:
        epochs = sampler.epochs
        window = epochs.span_days + 2.0 * drawn_recipe.source.supernova.peak_margin
        visits = np.array([b == reference for b in epochs.band])
        limit = (epochs.time[visits], np.array([five_sigma_depth(c) for c, v in zip(epochs.conditions, visits) if v]))
    chunk = 5000
    for start in range(0, n, chunk):
        ids = range(start, min(start + chunk, n))
        if rules == "selection":
            for r in rendered_systems(sampler, list(ids), {}):
                drawn += r.system.candidate + 1
                found = dict(band=reference, snr=math.nan, matched_snr=r.band(reference).arc_snr,
                             magnification=r.magnification, ring=False, n_images=len(r.images))
                rows.append(_row(r.system, found, counts_band))
        else:  # only multiply imaged systems can be detected: the others are left unfinished
            for system in sampler.draw_lensed(ids):
                drawn += 1
                if system is None:
                    continue
                if rules == "multiply_imaged":
                    found = (dict(band="", snr=math.nan, matched_snr=math.nan, magnification=math.nan, ring=False,
                                  n_images=_image_count(system, survey, build_scene(system).deflector))
                             if system.lensing and system.multiply_imaged else None)
                elif rules == "om10_supernova":
                    found = _supernova_detection(system, survey, reference, limit)
                elif rules == "om10_quasar":
                    found = _quasar_detection(system, survey, reference,
                                              five_sigma_depth(system.band(reference)) - TEN_SIGMA)
                else:
                    found = _collett_detection(system, survey, band_names, matched=rules == "collett2015_matched")
                if found is not None:
                    rows.append(_row(system, found, counts_band))
        if progress is not None:
            progress(min(start + chunk, n), n)
    names = ("system_id", "einstein_radius", "z_lens", "z_source", "source_magnitude", "band", "snr",
             "matched_snr", "magnification", "n_images", "multiplicity")
    table = Table(rows=rows, names=names) if rows else Table(names=names, dtype=[int, float, float, float, float, str,
                                                                                   float, float, float, int, str])
    return Forecast(recipe_name=recipe.name, rules=rules, drawn=drawn, galaxies_per_deg2=galaxies, area=area,
                    detections=table, window_days=window, boost=boost)


def _row(system, found: dict, magnitude_band: str) -> tuple:
    """A detection's row."""
    n_images = found["n_images"]
    multiplicity = "ring" if found["ring"] else "quad" if n_images >= 4 else "double"
    return (system.system_id, system.einstein_radius, system.z_lens, system.z_source,
            system.source_magnitude(magnitude_band), found["band"], found["snr"], found["matched_snr"],
            found["magnification"], n_images, multiplicity)


FORECAST_RECORD = "forecast.json"  # the files a forecast wrote: the only ones --overwrite removes
FORECAST_FORMAT = "simlens-forecast/1"
BREAKDOWNS = ("einstein_radius", "z_lens", "z_source", "source_magnitude", "multiplicity")


def write_forecast(result: Forecast, out: Path, overwrite: bool = False) -> list[str]:
    """``detections.ecsv`` (one row per detectable system), ``breakdown_<column>.ecsv``,
    ``summary.json`` and ``forecast.png`` in ``out`` (a new folder, or an earlier forecast's)."""
    from .output.atomic import atomic_path
    from .output.ownership import claim_folder, write_record

    claim_folder(out, overwrite, FORECAST_RECORD, FORECAST_FORMAT, "forecast")
    files = []
    tables = {"detections.ecsv": result.detections}
    tables.update({f"breakdown_{column}.ecsv": result.breakdown(column) for column in BREAKDOWNS})
    for name, table in tables.items():
        with atomic_path(out / name) as tmp:
            table.write(tmp, format="ascii.ecsv")
        files.append(name)
    with atomic_path(out / "summary.json") as tmp:
        tmp.write_text(json.dumps(result.summary(), indent=1) + "\n", encoding="utf-8")
    files.append("summary.json")
    with atomic_path(out / "forecast.png") as tmp:
        _plot(result, tmp)
    files.append("forecast.png")
    write_record(out, FORECAST_RECORD, FORECAST_FORMAT, files)
    return files


def _plot(result: Forecast, path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    labels = {"einstein_radius": "Einstein radius (arcsec)", "z_lens": "lens redshift", "z_source": "source redshift",
              "source_magnitude": "unlensed source magnitude", "multiplicity": "image configuration"}
    fig, axes = plt.subplots(1, len(BREAKDOWNS), figsize=(4.0 * len(BREAKDOWNS), 3.4))
    for ax, column in zip(axes, BREAKDOWNS):
        table = result.breakdown(column)
        if column == "multiplicity":
            ax.bar(list(table["multiplicity"]), table["per_deg2"], color="0.35")
        else:
            low, high = np.asarray(table[f"{column}_low"]), np.asarray(table[f"{column}_high"])
            ax.bar(low, table["per_deg2"], width=high - low, align="edge", color="0.35", edgecolor="white")
        ax.set_xlabel(labels[column])
        ax.set_ylabel("lenses per deg$^2$")
    fig.suptitle(f"{result.recipe_name}: {result.per_deg2:.2f} +- {result.sampling_error_per_deg2:.2f} detectable "
                 f"lenses per deg$^2$ ({result.rules}; {result.detected} of {result.drawn} deflectors drawn)")
    fig.tight_layout()
    fig.savefig(path, dpi=90, format="png")
    plt.close(fig)

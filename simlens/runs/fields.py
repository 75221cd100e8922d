"""Field images: whole survey images with lenses at known places among unlensed galaxies and stars.

A recipe with a ``[field]`` table makes fields instead of cutout shards, for finders that scan whole
images.  The run's ``count`` systems are spread ``field.lenses`` to a field, in id order (field k
holds systems ``k * lenses ...``); each field is one unit of work, resumed and verified like a shard.
For one field:

1. *Conditions.*  One set of seeing, sky and depth per field: the band conditions drawn for the
   field's first system, which every lens of the field then takes
   (``PopulationSampler(recipe, conditions=...)``); the field centre is that system's sky position.
2. *Lenses.*  The field is cut into cells of ``lens_stamp_size`` pixels; each lens gets its own
   cell (drawn without replacement) and a whole-pixel place inside it, so no two stamps overlap.
   Each system is selected and rendered as in a cutout run, on a stamp of ``lens_stamp_size``
   pixels, and its noiseless lens light and lensed source are added to the field; the lens
   galaxy's light beyond its stamp is added from its Sersic profile, drawn as the background is
   (:func:`lens_light_beyond_stamps`), so bright lenses end in no square edge.  The lens centre is
   the stamp centre: 0-based pixel
   ``(x0 + (s - 1) / 2, y0 + (s - 1) / 2)``.
3. *Background.*  Galaxies and stars from number counts (:mod:`simlens.populations.background`)
   at their sub-pixel positions, not lensed; galaxies are kept away from the lenses
   (``lens_clearance``).  The many faint ones are sampled together on one grid per band and
   convolved with the PSF once (:mod:`simlens.imaging.many_objects`); objects bright enough that
   the PSF wings beyond that kernel would show above the noise are drawn one by one by GalSim
   (profile convolved with the band's PSF and the pixel, stamps sized to the noise).
4. *Noise.*  ``galsim.CCDNoise`` over the whole field (sky, Poisson of all the light, read noise),
   sky-subtracted, as in the cutouts (or a coadd's correlated noise: ``imaging.observe.add_noise``).

Files, per field ``fields/field_<k>.fits``:

==================  ==============================================================================
HDU (EXTNAME)       content
==================  ==============================================================================
PRIMARY             no data; FIELDID, RUNNAME, centre RA/DEC, NLENSES, NGALAXY, NSTAR, BANDS
``B``               observed field in band B (ADU, sky-subtracted), celestial TAN WCS
``B_SOURCE``        the lensed sources alone, noiseless (what the lenses add beyond their galaxies)
``B_PSF``           the band's effective PSF (PSF convolved with the pixel), unit sum
TRUTH               one row per lens: the truth columns of a cutout run plus field_id, x_pixel,
                    y_pixel (0-based pixel of the lens centre) and ra, dec (its sky position)
OBJECTS             the background galaxies and stars (:class:`simlens.background.BackgroundObjects`)
IMAGE_TRUTH ...     images, subhalos and line-of-sight galaxies of the lenses, keyed by system_id
==================  ==============================================================================

and ``fields/field_<k>.reg``: the lenses as circles (radius max(2 theta_E, 2 arcsec), labelled with
the system id and theta_E) in sky coordinates, in the plain-text region format that common FITS
viewers overlay.  The run folder's ``truth`` and ``field_objects`` catalogues gather every field.
"""

from __future__ import annotations

import dataclasses
import time
from pathlib import Path

import galsim
import numpy as np
from astropy.io import fits

from ..errors import reported_as
from ..populations.background import BackgroundModel
from ..cosmology import DistanceTable
from ..imaging.scene import lens_galaxy_components
from ..imaging.many_objects import draw_alone, draw_beyond, draw_together, drawn_together, light_reach
from ..imaging.observe import add_noise, effective_psf_image
from ..output.atomic import atomic_path
from ..output.checksums import sha256_of
from ..output.cutout_fits import band_keywords, cutout_wcs
from ..output.columns import table_hdu
from ..output.truth import (image_rows, objects_table, image_table, line_of_sight_rows, line_of_sight_table, subhalo_rows,
                           subhalo_table, truth_row, truth_table)
from ..truth.sampler import PopulationSampler
from ..recipe import Recipe
from ..truth.streams import FIELD_STREAMS, field_streams
from ..truth.selection import merge_attrition
from .rendering import STAGES, rendered_systems
from .shards import ShardResult, ShardSpec, shard_path

__all__ = ["render_field", "place_lenses", "region_path", "region_text", "describe_fields",
           "expected_background", "FIELD_STREAMS"]

REGION_MIN_RADIUS = 2.0  # arcsec
def region_path(recipe: Recipe, index: int) -> str:
    return shard_path(recipe, index)[:-len(".fits")] + ".reg"


def place_lenses(size: int, stamp: int, n: int, rng) -> list[tuple[int, int]]:
    """Lower-left pixels ``(x0, y0)`` of ``n`` stamps of side ``stamp`` in a ``size`` field: distinct
    cells of a grid of ``size // stamp`` cells a side, a uniform whole-pixel place in each."""
    per_side = size // stamp
    cell = size // per_side
    chosen = rng.choice(per_side * per_side, size=n, replace=False)
    origins = []
    for index in chosen:
        cy, cx = divmod(int(index), per_side)
        origins.append((cx * cell + int(rng.integers(0, cell - stamp + 1)),
                        cy * cell + int(rng.integers(0, cell - stamp + 1))))
    return origins


def lens_light_beyond_stamps(galaxies: list, bands: tuple, size: int, stamp: int, scale: float) -> list[np.ndarray]:
    """The light of lens galaxies beyond their stamps (one ``size x size`` image per band, ADU).
    ``galaxies`` holds ``(x0, y0, shape, fluxes)``: a stamp's lower-left pixel, the galaxy at its
    centre (a :class:`~simlens.imaging.light.Sersic`) and its flux per band.  Each galaxy is drawn
    where it reaches past its stamp (:func:`~simlens.imaging.many_objects.draw_beyond`), its own
    stamp left empty (the stamp holds that light)."""
    images = [np.zeros((size, size)) for _ in bands]
    for x0, y0, shape, fluxes in galaxies:
        extra = int(np.ceil(light_reach(shape, bands, scale) - stamp / 2))
        if extra <= 0:
            continue
        side, ox, oy = stamp + 2 * extra, x0 - extra, y0 - extra
        c0, c1, r0, r1 = max(ox, 0), min(ox + side, size), max(oy, 0), min(oy + side, size)
        for image, local in zip(images, draw_beyond(shape, fluxes, bands, side, scale, half_width=stamp / 2)):
            image[r0:r1, c0:c1] += local[r0 - oy:r1 - oy, c0 - ox:c1 - ox]
    return images


def lens_galaxies(lenses: list, bands: tuple) -> list:
    """``(x0, y0, shape, fluxes)`` of each Sersic component of each lens's galaxy, for
    :func:`lens_light_beyond_stamps`."""
    out = []
    for x0, y0, rendered in lenses:
        by_band = [lens_galaxy_components(rendered.system, band.name) for band in bands]
        for part in zip(*by_band):
            fluxes = [profile.flux for profile in part]
            if max(fluxes) > 0:
                out.append((x0, y0, part[int(np.argmax(fluxes))], fluxes))
    return out


def region_text(rows: list[dict], title: str) -> str:
    """The lenses of one field as sky circles in the plain-text region format (fk5, degrees)."""
    lines = ["# Region file format: DS9 version 4.1", f"# {title}",
             "# circles: lens systems, radius max(2 theta_E, 2 arcsec); text: system id and theta_E",
             'global color=green width=2 font="helvetica 10 normal"', "fk5"]
    for row in rows:
        radius = max(2.0 * row["einstein_radius"], REGION_MIN_RADIUS)
        lines.append(f'circle({row["ra"]:.8f},{row["dec"]:+.8f},{radius:.2f}") '
                     f'# text={{{row["system_id"]} thetaE={row["einstein_radius"]:.2f}"}}')
    return "\n".join(lines) + "\n"


def render_field(recipe: Recipe, run_folder: str | Path, spec: ShardSpec) -> ShardResult:
    """Render field ``spec.index`` (systems ``spec.first_system ...``) and write its files."""
    with reported_as(f"field {spec.index} (systems {spec.first_system}-{spec.first_system + spec.n_systems - 1})"):
        return _render_field(recipe, Path(run_folder), spec)


def _render_field(recipe: Recipe, run_folder: Path, spec: ShardSpec) -> ShardResult:
    galsim.set_omp_threads(1)
    run_folder = Path(run_folder)
    settings, survey = recipe.field, recipe.survey
    size, stamp, scale = settings.size, settings.lens_stamp_size, survey.pixel_scale
    timings = dict.fromkeys(STAGES + ("background", "noise", "writing"), 0.0)
    t0 = time.perf_counter()
    # the stamp size changes no draw, so one sampler gives the field's conditions and then its lenses
    sampler = PopulationSampler(dataclasses.replace(recipe, survey=dataclasses.replace(survey, cutout_size=stamp)))
    first = sampler.draw(spec.first_system)
    conditions = first.bands
    sampler.conditions = conditions
    wcs = cutout_wcs(first.ra, first.dec, scale, size)
    streams = field_streams(recipe.seed, spec.index)
    origins = place_lenses(size, stamp, spec.n_systems, streams["layout"])
    timings["sampling"] += time.perf_counter() - t0

    file = shard_path(recipe, spec.index)
    lenses, rows, subhalos, images, los = [], [], [], [], []
    attrition: dict = {}
    ids = range(spec.first_system, spec.first_system + spec.n_systems)
    for k, ((x0, y0), rendered) in enumerate(zip(origins, rendered_systems(sampler, ids, timings))):
        merge_attrition(attrition, rendered.system.rejections)
        x, y = x0 + 0.5 * (stamp - 1), y0 + 0.5 * (stamp - 1)
        ra, dec = (float(v) for v in wcs.wcs_pix2world(x, y, 0))
        rendered = dataclasses.replace(rendered, system=dataclasses.replace(rendered.system, ra=ra, dec=dec))
        lenses.append((x0, y0, rendered))
        row = truth_row(rendered, file, shard=file, shard_index=k, flags=rendered.system.selection_flags,
                        cut_names=recipe.selection.cut_names)
        rows.append({"field_id": spec.index, "x_pixel": x, "y_pixel": y, **row})
        subhalos += subhalo_rows(rendered)
        images += image_rows(rendered)
        los += line_of_sight_rows(rendered)

    t2 = time.perf_counter()
    background = BackgroundModel(recipe, sampler.distances)
    objects = background.draw(streams["background"], [(r["x_pixel"], r["y_pixel"], r["einstein_radius"]) for r in rows])
    noise_seeds = streams["noise"].integers(1, 2**31 - 1, size=len(conditions))
    primary = fits.PrimaryHDU()
    h = primary.header
    h["FIELDID"] = (spec.index, "field index within the run")
    h["RUNNAME"] = (recipe.name[:68], "simlens run")
    h["RA"] = (first.ra, "[deg] field centre right ascension")
    h["DEC"] = (first.dec, "[deg] field centre declination")
    h["FIRSTID"] = (spec.first_system, "system id of the first lens")
    h["NLENSES"] = (spec.n_systems, "lens systems in this field (TRUTH rows)")
    h["NGALAXY"] = (int(np.count_nonzero(objects.kind == "galaxy")), "background galaxies (OBJECTS rows)")
    h["NSTAR"] = (int(np.count_nonzero(objects.kind == "star")), "stars (OBJECTS rows)")
    h["BANDS"] = (",".join(survey.band_names), "bands in HDU order")
    hdus = [primary]
    together = drawn_together(objects, conditions)
    alone = objects.subset(~together)
    drawn = draw_together(objects.subset(together), conditions, size, scale)
    beyond = lens_light_beyond_stamps(lens_galaxies(lenses, conditions), conditions, size, stamp, scale)
    timings["background"] += time.perf_counter() - t2
    for b, band in enumerate(conditions):
        t3 = time.perf_counter()
        scene = np.zeros((size, size))
        sources = np.zeros((size, size))
        for x0, y0, rendered in lenses:
            observed = rendered.bands[b]
            window = (slice(y0, y0 + stamp), slice(x0, x0 + stamp))
            scene[window] += observed.lens_light + observed.lensed_source
            sources[window] += observed.lensed_source
        scene += drawn[b] + beyond[b]
        image = galsim.Image(scene, scale=scale)
        draw_alone(image, alone, band)
        timings["background"] += time.perf_counter() - t3
        t4 = time.perf_counter()
        np.clip(image.array, 0.0, None, out=image.array)  # FFT ringing of order 1e-16 of a peak
        observed, factor = add_noise(image.array, band, noise_seeds[b])
        timings["noise"] += time.perf_counter() - t4
        header = wcs.to_header()
        for data, name, content in ((observed, band.name, "observed field"),
                                    (sources, f"{band.name}_SOURCE", "noiseless lensed sources")):
            hdu = fits.ImageHDU(data=data.astype(np.float32), header=header.copy(), name=name)
            band_keywords(hdu.header, band, content, noise_variance_factor=factor)
            hdus.append(hdu)
        psf = fits.ImageHDU(data=effective_psf_image(band).astype(np.float32), name=f"{band.name}_PSF")
        band_keywords(psf.header, band, "psf", noise_variance_factor=factor)
        hdus.append(psf)

    t5 = time.perf_counter()
    truth = truth_table(rows)
    hdus += [table_hdu(truth, "TRUTH"),
             table_hdu(objects_table(objects.rows(spec.index, wcs), survey.band_names), "OBJECTS"),
             table_hdu(image_table(images), "IMAGE_TRUTH"),
             table_hdu(subhalo_table(subhalos, survey.band_names), "SUBHALOS"),
             table_hdu(line_of_sight_table(los, survey.band_names), "LINE_OF_SIGHT")]
    with atomic_path(run_folder / file) as tmp:
        fits.HDUList(hdus).writeto(tmp)
    region = region_path(recipe, spec.index)
    with atomic_path(run_folder / region) as tmp:
        tmp.write_text(region_text(rows, f"simlens run {recipe.name}, field {spec.index}: {len(rows)} lenses"),
                       encoding="utf-8")
    checksums = {file: sha256_of(run_folder / file), region: sha256_of(run_folder / region)}
    timings["writing"] += time.perf_counter() - t5
    return ShardResult(spec=spec, files=checksums, timings=timings, selection=attrition)


def expected_background(recipe: Recipe) -> tuple[float, float]:
    """Mean numbers of background galaxies and stars per field (for ``simlens check``)."""
    model = BackgroundModel(recipe, DistanceTable(recipe.cosmology.build()))
    return model.expected_galaxies(), model.expected_stars()


def describe_fields(recipe: Recipe) -> str:
    f = recipe.field
    n_fields = -(-recipe.count // f.lenses)
    galaxies, stars = expected_background(recipe)
    side = f.size * recipe.survey.pixel_scale / 60.0
    return (f"{n_fields} field(s) of {f.size}x{f.size} pixels ({side:.1f}' a side), {f.lenses} lenses each on "
            f"{f.lens_stamp_size}-pixel stamps; per field about {galaxies:.0f} background galaxies and {stars:.0f} stars")


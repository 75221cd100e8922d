"""The truth catalogue of a run: one row per system, as FITS table and ECSV with units.

Every column is declared once, in :data:`TRUTH_COLUMNS` (name, unit, description, value); the rows,
the units, the descriptions written into the files and the column reference of the docs
(``docs/truth_columns.md``, written by ``python -m simlens.output.column_docs``) all come from it.  The
per-image, subhalo and line-of-sight tables have their own lists below.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np
from astropy.table import Table

from ..imaging.render import RenderedSystem
from .columns import ColumnSpec, ColumnSpec as C, described_table, reference_table, rows_from
from .cutout_fits import cutout_wcs

__all__ = ["truth_row", "truth_table", "subhalo_rows", "subhalo_table", "image_rows", "image_table",
           "line_of_sight_rows", "line_of_sight_table", "EPOCH_COLUMNS", "epoch_table", "LIGHT_CURVE_COLUMNS",
           "light_curve_table", "TRUTH_COLUMNS", "FIELD_COLUMNS", "OBJECT_COLUMNS", "NEIGHBOUR_COLUMNS", "objects_table", "neighbour_rows",
           "column_reference"]

NAN = math.nan


@dataclass(frozen=True)
class _Entry:
    """What one truth row describes: the rendered system, where its images are, its cut results."""

    rendered: RenderedSystem
    file: str
    shard: str
    shard_index: int
    flags: dict
    cut_names: tuple

    @property
    def system(self):
        return self.rendered.system

    @property
    def selected(self) -> bool:
        return all(bool(self.flags.get(name, True)) for name in self.cut_names)


def _multipole(order: int, part: int):
    return lambda e: next((m[part] for m in e.system.multipoles if m[0] == order), 0.0)


def _second(name: str, default=NAN):
    return lambda e: getattr(e.system.second_source, name) if e.system.second_source else default


def _envelope(entry, field: str, band: str | None = None) -> float:
    """A field of the system's two-component lens light (per band where ``band``), nan without one."""
    envelope = entry.system.lens_envelope
    if envelope is None:
        return NAN
    value = getattr(envelope, field)
    return value[band] if band is not None else value


def _band(b, name):  # the BandConditions of band b
    return next(c for c in b.system.bands if c.name == name)


TRUTH_COLUMNS = (
    C("system_id", "", "id within the run (its random streams derive from it)", lambda e: e.system.system_id),
    C("file", "", "file with the system's images, relative to the run folder (its cutout, or its shard)",
      lambda e: e.file),
    C("shard", "", "shard file holding the system (relative path)", lambda e: e.shard),
    C("shard_index", "", "the system's row in its shard", lambda e: e.shard_index),
    C("ra", "deg", "lens centre right ascension (cutout centre, CRVAL of the WCS)", lambda e: e.system.ra),
    C("dec", "deg", "lens centre declination", lambda e: e.system.dec),
    C("z_lens", "", "lens redshift", lambda e: e.system.z_lens),
    C("z_source", "", "source redshift", lambda e: e.system.z_source),
    C("velocity_dispersion", "km / s", "lens stellar velocity dispersion", lambda e: e.system.velocity_dispersion),
    C("einstein_radius", "arcsec", "Einstein radius: of the SIS with this sigma and these distances "
      "(stars_and_halo: solved, mean convergence 1 within it)", lambda e: e.system.einstein_radius),
    C("mass_model", "", "mass model of the recipe (sie, power_law, cored_isothermal, stars_and_halo)",
      lambda e: e.system.mass_model_name),
    C("mass_q", "", "mass axis ratio (minor / major)", lambda e: e.system.mass_q),
    C("mass_angle", "deg", "mass major-axis angle, CCW from +x", lambda e: e.system.mass_angle),
    C("mass_slope", "", "3D density slope (2 unless power_law)", lambda e: e.system.mass_slope),
    C("mass_core_radius", "arcsec", "core radius (0 unless cored_isothermal)", lambda e: e.system.mass_core_radius),
    C("multipole_m3_strength", "", "m = 3 multipole amplitude a_3 (0: none)", _multipole(3, 1)),
    C("multipole_m3_angle", "deg", "m = 3 multipole angle relative to the mass major axis", _multipole(3, 2)),
    C("multipole_m4_strength", "", "m = 4 multipole amplitude a_4 (0: none)", _multipole(4, 1)),
    C("multipole_m4_angle", "deg", "m = 4 multipole angle relative to the mass major axis", _multipole(4, 2)),
    C("n_subhalos", "", "subhalos of this lens (rows of the subhalo table)", lambda e: len(e.system.subhalos)),
    C("subhalo_mass_total", "M_sun", "total mass of those subhalos",
      lambda e: float(sum(h.mass for h in e.system.subhalos))),
    C("n_line_of_sight", "", "SIS galaxies in other lens planes (rows of the line-of-sight table); with "
      "any, max_time_delay is nan", lambda e: len(e.system.line_of_sight)),
    C("shear_gamma", "", "external shear strength", lambda e: e.system.shear_gamma),
    C("shear_angle", "deg", "external shear angle, CCW from +x", lambda e: e.system.shear_angle),
    C("lens_mag_{band}", "mag", "lens light in {band}, AB", lambda e, b: e.system.lens_magnitudes[b]),
    C("lens_half_light_radius", "arcsec", "circularised half-light radius of the lens light (core and envelope together)",
      lambda e: e.system.lens_half_light_radius),
    C("lens_sersic_index", "", "Sersic index of the lens light", lambda e: e.system.lens_sersic_index),
    C("lens_q", "", "lens-light axis ratio", lambda e: e.system.lens_q),
    C("lens_angle", "deg", "lens-light major-axis angle, CCW from +x", lambda e: e.system.lens_angle),
    C("source_mag_{band}", "mag", "unlensed source galaxy (disk, bulge and clumps) in {band}, AB (nan: no source)",
      lambda e, b: e.system.source_magnitude(b)),
    C("source_half_light_radius", "arcsec", "circularised half-light radius of the source disk",
      lambda e: e.system.source_half_light_radius),
    C("source_sersic_index", "", "Sersic index of the source disk", lambda e: e.system.source_sersic_index),
    C("source_q", "", "source-disk axis ratio", lambda e: e.system.source_q),
    C("source_angle", "deg", "source-disk major-axis angle, CCW from +x", lambda e: e.system.source_angle),
    C("source_x", "arcsec", "source centre in the source plane, x, from the lens centre", lambda e: e.system.source_x),
    C("source_y", "arcsec", "source centre in the source plane, y, from the lens centre", lambda e: e.system.source_y),
    C("source_n_clumps", "", "star-forming clumps of the source", lambda e: len(e.system.clumps)),
    C("magnification", "", "extended-source magnification in the reference band: lensed flux of the source "
      "galaxy in the rendered field over its unlensed flux (point-source images not included)",
      lambda e: e.rendered.magnification),
    C("n_images", "", "images of the source centre in the rendered field (rows of the image table)",
      lambda e: len(e.rendered.images)),
    C("point_magnification", "", "sum of |magnification| of those images (a point source's total)",
      lambda e: float(np.abs(e.rendered.images.magnification).sum())),
    C("max_time_delay", "day", "delay between the first and the last of those images",
      lambda e: float(e.rendered.time_delays.max()) if len(e.rendered.images) else 0.0),
    C("lens_absolute_magnitude", "mag", "rest-frame AB magnitude of the lens light in the scaling relations' "
      "rest filter (nan unless lens.light.scaling)", lambda e: e.system.lens_absolute_magnitude),
    C("lens_luminosity", "L_sun", "lens luminosity in that filter", lambda e: e.system.lens_luminosity),
    C("lens_stellar_mass", "M_sun", "luminosity times mass_to_light (nan unless given)",
      lambda e: e.system.lens_stellar_mass),
    C("source_absolute_magnitude", "mag", "rest-frame AB magnitude of the source (source.counts only)",
      lambda e: e.system.source_absolute_magnitude),
    C("quasar_mag_{band}", "mag", "unlensed point source at the source centre in {band}, AB (nan: none)",
      lambda e, b: e.system.quasar_magnitudes[b] if e.system.quasar_magnitudes is not None else NAN),
    C("transient", "", "the point source that varies in time: sn_ia, quasar, or empty (none)",
      lambda e: e.system.transient_kind),
    C("transient_peak_mjd", "d", "supernova: observer-frame MJD of its rest-frame B maximum (nan: none)",
      lambda e: e.system.transient_peak_mjd),
    C("transient_stretch", "", "supernova: stretch of its time axis", lambda e: e.system.transient_stretch),
    C("transient_peak_absolute_magnitude", "mag", "supernova: rest-frame B (AB) at maximum, stretch term included",
      lambda e: e.system.transient_peak_absolute_magnitude),
    C("black_hole_mass", "", "quasar: log10 of its black-hole mass in M_sun (its variability's)",
      lambda e: e.system.black_hole_mass),
    C("variability_tau", "d", "quasar: rest-frame damping time of its random walk (observed: (1 + z_source) times)",
      lambda e: e.system.variability_tau),
    C("variability_sf_inf_{band}", "mag", "quasar: asymptotic structure function in {band} (nan: not varying)",
      lambda e, b: dict(e.system.light_curve.sf_inf)[b] if e.system.transient_kind == "quasar" else NAN),
    C("quasar_absolute_magnitude_i", "mag", "quasar: M_i (AB, rest 750 nm) of its power-law continuum",
      lambda e: e.system.quasar_absolute_magnitude_i),
    C("placement", "", "placement mode: fixed, lens or sky (source.position.mode)", lambda e: e.system.placement),
    C("region_radius", "arcsec", "radius of the disc in which source centres fall uniformly",
      lambda e: e.system.region_radius),
    C("region_area", "arcsec2", "area of that disc", lambda e: e.system.region_area),
    C("region_widened", "", "the caustics reached beyond the nominal disc, which was widened to hold them",
      lambda e: e.system.region_widened),
    C("multiply_imaged", "", "the source centre lies inside a caustic or the cut", lambda e: e.system.multiply_imaged),
    C("tangential_caustic_area", "arcsec2", "area inside the tangential caustic",
      lambda e: e.system.tangential_caustic_area),
    C("inner_caustic_area", "arcsec2", "area inside the radial caustic or the cut", lambda e: e.system.inner_caustic_area),
    C("candidate", "", "which candidate of this system passed the selection (0: the first)",
      lambda e: e.system.candidate),
    C("passes_{cut}", "", "the system passes the {cut} cut of [selection]",
      lambda e, cut: bool(e.flags.get(cut, True))),
    C("selected", "", "the system passes every [selection] cut", lambda e: e.selected),
    C("stellar_kappa_e", "", "stars_and_halo: the stars' convergence at R_e (0: other models)",
      lambda e: e.system.stellar_kappa_e),
    C("halo_mass", "M_sun", "stars_and_halo: NFW M200 (nan: other models)", lambda e: e.system.halo_mass),
    C("halo_concentration", "", "stars_and_halo: NFW c200 (nan: other models)", lambda e: e.system.halo_concentration),
    C("halo_kappa_s", "", "stars_and_halo: NFW kappa_s (0: other models)", lambda e: e.system.halo_kappa_s),
    C("halo_scale_radius", "arcsec", "stars_and_halo: NFW scale radius r_s", lambda e: e.system.halo_scale_radius),
    C("halo_ellipticity", "", "stars_and_halo: ellipticity of the halo's potential", lambda e: e.system.halo_ellipticity),
    C("second_source_z", "", "second source plane (source.second): redshift (nan: none)", _second("z")),
    C("second_source_x", "arcsec", "second source centre in its plane, x", _second("x")),
    C("second_source_y", "arcsec", "second source centre in its plane, y", _second("y")),
    C("second_source_magnification", "", "second source: lensed flux in the rendered field over the unlensed flux",
      lambda e: e.rendered.second_magnification),
    C("second_source_deflector_einstein_radius", "arcsec", "the first source as an SIS deflector of the second",
      _second("deflector_einstein_radius", 0.0)),
    C("second_source_mag_{band}", "mag", "second source, unlensed, in {band}, AB (nan: none)",
      lambda e, b: e.system.second_source.magnitudes[b] if e.system.second_source else NAN),
    C("system_class", "", "lens (source centre multiply imaged), missed_caustics, source_in_front, or a "
      "negative class", lambda e: e.system.system_class),
    C("is_lens", "", "the label: system_class is lens and the system is selected",
      lambda e: e.system.system_class == "lens" and e.selected),
    C("n_lookalike_features", "", "look-alike light components added (negatives)", lambda e: len(e.system.extra_light)),
    C("arc_snr_{band}", "", "matched-filter S/N of the noiseless lensed source in {band}: sqrt(sum S_i^2 / var_i) "
      "over the cutout, var_i the expected pixel variance", lambda e, b: e.rendered.band(b).arc_snr),
    C("psf_fwhm_{band}", "arcsec", "PSF FWHM in {band} (of the round profile, before its shear)",
      lambda e, b: _band(e, b).psf_fwhm),
    C("psf_g1_{band}", "", "reduced shear of the {band} PSF along +x (0: round)", lambda e, b: _band(e, b).psf_g1),
    C("psf_g2_{band}", "", "reduced shear of the {band} PSF along the diagonal", lambda e, b: _band(e, b).psf_g2),
    C("magzero_{band}", "mag", "AB zero point of the {band} images: m = magzero - 2.5 log10(ADU)",
      lambda e, b: _band(e, b).magzero),
    C("sky_level_{band}", "", "sky level subtracted from the {band} images (ADU per pixel)",
      lambda e, b: _band(e, b).sky_level),
    C("sky_variance_{band}", "", "expected noise variance of an empty {band} pixel (ADU^2; below the CCD "
      "equation's where resampled exposures correlate the noise)", lambda e, b: e.rendered.band(b).sky_variance),
    C("lens_core_mag_{band}", "mag", "the lens light's core in {band}, AB (nan: no [lens.light.envelope])",
      lambda e, b: _envelope(e, "core_magnitudes", b)),
    C("lens_core_half_light_radius", "arcsec", "the lens core's circularised R_e (nan: one Sersic)",
      lambda e: _envelope(e, "core_half_light_radius")),
    C("lens_envelope_mag_{band}", "mag", "the lens light's envelope in {band}, AB (nan: one Sersic)",
      lambda e, b: _envelope(e, "magnitudes", b)),
    C("lens_envelope_half_light_radius", "arcsec", "the lens envelope's circularised R_e (nan: one Sersic)",
      lambda e: _envelope(e, "half_light_radius")),
    C("lens_envelope_sersic_index", "", "the lens envelope's Sersic n (nan: one Sersic)",
      lambda e: _envelope(e, "sersic_index")),
    C("lens_envelope_q", "", "the lens envelope's axis ratio (nan: one Sersic)", lambda e: _envelope(e, "q")),
    C("source_bulge_mag_{band}", "mag", "the source's bulge in {band}, AB (nan: no [source.bulge])",
      lambda e, b: e.system.source_bulge_magnitudes[b] if e.system.source_bulge_magnitudes else math.nan),
    C("source_bulge_half_light_radius", "arcsec", "the source bulge's circularised R_e (nan: none)",
      lambda e: e.system.source_bulge_half_light_radius),
    C("source_bulge_sersic_index", "", "the source bulge's Sersic n (nan: none)",
      lambda e: e.system.source_bulge_sersic_index),
    C("source_stamp", "", "row of the source's image stamp in [source.stamps] catalogue (-1: a Sersic source)",
      lambda e: e.system.source_stamp_index),
    C("source_stamp_magnitude", "mag", "the catalogue's magnitude of that stamp (in its own band)",
      lambda e: e.system.source_stamp_magnitude),
    C("source_stamp_redshift", "", "the catalogue's redshift of that stamp (nan: unknown or none)",
      lambda e: e.system.source_stamp_redshift),
    C("source_stamp_psf_fwhm", "arcsec", "the stamp's own PSF FWHM, a resolution limit kept in the source",
      lambda e: e.system.source_stamp_psf_fwhm),
    C("n_neighbours", "", "unlensed galaxies and stars drawn in the cutout and its margin ([neighbours]; "
      "the neighbours table)", lambda e: len(e.system.neighbours) if e.system.neighbours is not None else 0),
)

# Field runs add where each lens sits in its field (simlens.runs.fields).
FIELD_COLUMNS = (
    C("field_id", "", "field image holding the lens", lambda e: e["field_id"]),
    C("x_pixel", "pix", "lens centre, column in the field image (0-based)", lambda e: e["x_pixel"]),
    C("y_pixel", "pix", "lens centre, row in the field image (0-based)", lambda e: e["y_pixel"]),
)


def truth_row(rendered: RenderedSystem, file: str, shard: str = "", shard_index: int = -1,
              flags: dict | None = None, cut_names: tuple = ()) -> dict:
    """The truth row of one rendered system (:data:`TRUTH_COLUMNS`): ``file`` holds its images,
    ``shard`` and ``shard_index`` where it sits, ``flags`` the pass/fail of each cut in ``cut_names``."""
    entry = _Entry(rendered, file, shard, shard_index, dict(flags or {}), tuple(cut_names))
    return rows_from(TRUTH_COLUMNS, entry, bands=[b.name for b in rendered.system.bands], cuts=entry.cut_names)


def truth_table(rows: Sequence[dict]) -> Table:
    """The truth rows as a table with the unit and description of every column."""
    names = list(rows[0])
    bands = [n[len("lens_mag_"):] for n in names if n.startswith("lens_mag_")]
    cuts = [n[len("passes_"):] for n in names if n.startswith("passes_")]
    return described_table(rows, FIELD_COLUMNS + TRUTH_COLUMNS, bands=bands, cuts=cuts)


SUBHALO_COLUMNS = (
    C("system_id", "", "the system the subhalo belongs to", lambda h: h[0]),
    C("x", "arcsec", "position in the image plane, x, from the lens centre", lambda h: h[1].x),
    C("y", "arcsec", "position in the image plane, y, from the lens centre", lambda h: h[1].y),
    C("mass", "M_sun", "total mass of the truncated SIS", lambda h: h[1].mass),
    C("einstein_radius", "arcsec", "its Einstein radius b", lambda h: h[1].einstein_radius),
    C("truncation_radius", "arcsec", "its truncation radius a = sqrt(b theta_E)", lambda h: h[1].truncation_radius),
    C("stellar_mass", "M_sun", "its satellite galaxy's stellar mass (nan: no light drawn)", lambda h: h[1].stellar_mass),
    C("half_light_radius", "arcsec", "the satellite's half-light radius (nan: none)", lambda h: h[1].half_light_radius),
    C("mag_{band}", "mag", "the satellite in {band}, AB (nan: none)",
      lambda h, b: h[1].magnitudes[b] if h[1].magnitudes is not None else math.nan),
)


def subhalo_rows(rendered: RenderedSystem) -> list[dict]:
    bands = [b.name for b in rendered.system.bands]
    return [rows_from(SUBHALO_COLUMNS, (rendered.system.system_id, h), bands=bands) for h in rendered.system.subhalos]


def subhalo_table(rows: Sequence[dict], bands: Sequence[str]) -> Table:
    """Subhalos keyed by system_id (positions in the image plane, arcsec from the lens centre),
    with their satellites' light."""
    return described_table(rows, SUBHALO_COLUMNS, bands=bands,
                           dtype=[np.int64] + [float] * (len(SUBHALO_COLUMNS) - 2 + len(bands)))


IMAGE_COLUMNS = (
    C("system_id", "", "the system of the image", lambda i: i["system_id"]),
    C("image", "", "index of the image within its system", lambda i: i["image"]),
    C("x", "arcsec", "image position, x, from the lens centre", lambda i: i["x"]),
    C("y", "arcsec", "image position, y, from the lens centre", lambda i: i["y"]),
    C("magnification", "", "signed point magnification 1 / det A", lambda i: i["magnification"]),
    C("parity", "", "+1 a minimum or maximum, -1 a saddle", lambda i: i["parity"]),
    C("arrival", "", "arrival order (0 first; -1 where delays are not computed)", lambda i: i["arrival"]),
    C("time_delay", "day", "delay after the first image: (1+z_l)/c D_l D_s/D_ls times the Fermat-potential "
      "difference (nan with line-of-sight planes)", lambda i: i["time_delay"]),
)


def image_rows(rendered: RenderedSystem) -> list[dict]:
    """One row per image of the source centre (:data:`IMAGE_COLUMNS`); with line-of-sight planes the
    delays are not computed (nan, arrival -1)."""
    im, delays = rendered.images, rendered.time_delays
    order = np.argsort(np.argsort(delays, kind="stable"), kind="stable") if len(im) else np.empty(0, int)
    if len(im) and not np.all(np.isfinite(delays)):  # multi-plane systems: delays not computed
        order = np.full(len(im), -1)
    return [rows_from(IMAGE_COLUMNS, {"system_id": rendered.system.system_id, "image": k, "x": float(im.x[k]),
                                      "y": float(im.y[k]), "magnification": float(im.magnification[k]),
                                      "parity": int(np.sign(im.magnification[k])), "arrival": int(order[k]),
                                      "time_delay": float(delays[k])})
            for k in range(len(im))]


def image_table(rows: Sequence[dict]) -> Table:
    """Images keyed by system_id (see :func:`image_rows`)."""
    return described_table(rows, IMAGE_COLUMNS, dtype=[np.int64, np.int64, float, float, float, np.int64,
                                                       np.int64, float])


EPOCH_COLUMNS = (
    C("epoch", "", "index along the epoch axis of EPOCH_IMAGES", lambda r: r["epoch"]),
    C("mjd", "d", "time of the visit (MJD)", lambda r: r["mjd"]),
    C("band", "", "band of the visit", lambda r: r["band"]),
    C("psf_fwhm", "arcsec", "PSF FWHM of the visit", lambda r: r["conditions"].psf_fwhm),
    C("sky_brightness", "mag / arcsec2", "sky surface brightness (AB)", lambda r: r["conditions"].sky_brightness),
    C("magzero", "mag", "AB magnitude of one ADU in the visit", lambda r: r["conditions"].magzero),
    C("sky_sigma", "adu", "noise of an empty pixel", lambda r: r["conditions"].background_sigma),
    C("depth", "mag", "5-sigma point-source depth (AB) over the PSF's noise-equivalent area", lambda r: r["depth"]),
)


def epoch_table(epochs) -> Table:
    """The run's epochs (:class:`~simlens.transients.cadence.Epochs`), one row each (:data:`EPOCH_COLUMNS`)."""
    from ..transients.cadence import five_sigma_depth

    rows = [rows_from(EPOCH_COLUMNS, dict(r, depth=five_sigma_depth(r["conditions"]))) for r in epochs.rows()]
    return described_table(rows, EPOCH_COLUMNS, dtype=[np.int64, float, "U16"] + [float] * 5)


LIGHT_CURVE_COLUMNS = (
    C("system_id", "", "the system", lambda r: r["system_id"]),
    C("image", "", "the image (a row of the image table of the same system)", lambda r: r["image"]),
    C("epoch", "", "the epoch (a row of the EPOCHS table)", lambda r: r["epoch"]),
    C("mjd", "d", "time of the visit", lambda r: r["mjd"]),
    C("band", "", "band of the visit", lambda r: r["band"]),
    C("source_time", "d", "the source's time this image shows: mjd minus the image's delay", lambda r: r["source_time"]),
    C("magnification", "", "the image's signed magnification", lambda r: r["magnification"]),
    C("unlensed_magnitude", "mag", "the source at source_time, AB, unlensed (inf: no light)",
      lambda r: r["unlensed_magnitude"]),
    C("flux", "adu", "the image's noiseless flux in the visit (magnified)", lambda r: r["flux"]),
    C("magnitude", "mag", "the image at that visit, AB, magnified (inf: no light)", lambda r: r["magnitude"]),
)


def light_curve_table(rows: Sequence[dict]) -> Table:
    """The light-curve truth: one row per system, image and epoch (:data:`LIGHT_CURVE_COLUMNS`)."""
    return described_table([rows_from(LIGHT_CURVE_COLUMNS, r) for r in rows], LIGHT_CURVE_COLUMNS,
                           dtype=[np.int64, np.int64, np.int64, float, "U16"] + [float] * 5)


LINE_OF_SIGHT_COLUMNS = (
    C("system_id", "", "the system whose line of sight holds the galaxy", lambda g: g[0]),
    C("z", "", "redshift of the galaxy's plane", lambda g: g[1].z),
    C("velocity_dispersion", "km / s", "SIS velocity dispersion", lambda g: g[1].velocity_dispersion),
    C("x", "arcsec", "position in its own plane, x, from the line of sight to the lens", lambda g: g[1].x),
    C("y", "arcsec", "position in its own plane, y", lambda g: g[1].y),
    C("einstein_radius", "arcsec", "its Einstein radius for the system's source", lambda g: g[1].einstein_radius),
    C("half_light_radius", "arcsec", "its light's circularised R_e, unlensed (nan: no light drawn)",
      lambda g: g[1].half_light_radius),
    C("q", "", "its light's axis ratio, unlensed", lambda g: g[1].q),
    C("angle", "deg", "its light's major-axis angle, CCW from +x, unlensed", lambda g: g[1].angle),
    C("mag_{band}", "mag", "the galaxy in {band}, AB, unlensed (nan: no light drawn)",
      lambda g, b: g[1].magnitudes[b] if g[1].magnitudes is not None else math.nan),
)


def line_of_sight_rows(rendered: RenderedSystem) -> list[dict]:
    bands = [b.name for b in rendered.system.bands]
    return [rows_from(LINE_OF_SIGHT_COLUMNS, (rendered.system.system_id, g), bands=bands)
            for g in rendered.system.line_of_sight]


def line_of_sight_table(rows: Sequence[dict], bands: Sequence[str]) -> Table:
    """Line-of-sight SIS galaxies keyed by system_id, with their light."""
    return described_table(rows, LINE_OF_SIGHT_COLUMNS, bands=bands,
                           dtype=[np.int64] + [float] * (len(LINE_OF_SIGHT_COLUMNS) - 2 + len(bands)))


def _key(name: str):
    return lambda row, band=None: row[name.format(band=band)]


def _object_columns(owner: str, owner_description: str, within: str, image: str) -> tuple:
    return tuple(C(name, unit, description, _key(name)) for name, unit, description in (
        (owner, "", owner_description),
        ("object_id", "", f"index of the object within its {within}"),
        ("kind", "", "galaxy or star"),
        ("x_pixel", "pix", f"centre, column in the {image} (0-based)"),
        ("y_pixel", "pix", f"centre, row in the {image} (0-based)"),
        ("ra", "deg", "centre right ascension"),
        ("dec", "deg", "centre declination"),
        ("mag_{band}", "mag", "magnitude in {band}, AB"),
        ("redshift", "", "galaxy redshift (nan for stars)"),
        ("half_light_radius", "arcsec", "galaxy half-light radius, circularised (nan for stars)"),
        ("sersic_index", "", "galaxy Sersic index (nan for stars)"),
        ("q", "", "galaxy axis ratio (nan for stars)"),
        ("angle", "deg", "galaxy major-axis angle, CCW from +x (nan for stars)"),
        ("temperature", "K", "star's effective temperature (nan for galaxies)"),
    ))


OBJECT_COLUMNS = _object_columns("field_id", "field image holding the object", "field", "field image")
NEIGHBOUR_COLUMNS = _object_columns("system_id", "the system whose cutout holds the object", "cutout",
                                    "cutout; outside 0 .. size - 1: in the margin whose light the PSF spreads in")


def objects_table(rows: list[dict], bands: Sequence[str], specs: Sequence[ColumnSpec] = OBJECT_COLUMNS) -> Table:
    """The unlensed galaxies and stars of fields (:data:`OBJECT_COLUMNS`) or of cutouts
    (:data:`NEIGHBOUR_COLUMNS`), from :meth:`BackgroundObjects.rows`."""
    names = ([specs[0].name, "object_id", "kind", "x_pixel", "y_pixel", "ra", "dec"] + [f"mag_{b}" for b in bands]
             + ["redshift", "half_light_radius", "sersic_index", "q", "angle", "temperature"])
    return described_table(rows, specs, bands=bands, names=names,
                           dtype=[np.int64, np.int64, "U6"] + [float] * (len(names) - 3))


def neighbour_rows(rendered: RenderedSystem) -> list[dict]:
    """The neighbours of a crowded cutout, one row each (:data:`NEIGHBOUR_COLUMNS`)."""
    system = rendered.system
    if system.neighbours is None:
        return []
    wcs = cutout_wcs(system.ra, system.dec, rendered.grid.pixel_scale, rendered.grid.size)
    return system.neighbours.rows(system.system_id, wcs, owner="system_id")


def column_reference() -> str:
    """The column reference of the docs (docs/truth_columns.md)."""
    parts = ["# Truth columns\n",
             "Written by `python -m simlens.output.column_docs` from `simlens/output/truth.py`; the same "
             "descriptions are in the files (ECSV headers, FITS `TCOMMn` cards). `{band}` stands for "
             "each band of the survey, `{cut}` for each `[selection]` cut.\n"]
    for title, specs in (("One row per system (`truth.fits`, `truth.ecsv`, shard `TRUTH`)", TRUTH_COLUMNS),
                         ("Field runs add", FIELD_COLUMNS),
                         ("Images of the source centre (`images.*`, `IMAGE_TRUTH`)", IMAGE_COLUMNS),
                         ("Subhalos (`subhalos.*`, `SUBHALOS`)", SUBHALO_COLUMNS),
                         ("Epochs of a run with `[survey.cadence]` (shard `EPOCHS`, `epochs.ecsv`)", EPOCH_COLUMNS),
                         ("Light curves: one row per system, image and epoch (`light_curves.*`, `LIGHT_CURVES`)",
                          LIGHT_CURVE_COLUMNS),
                         ("Line-of-sight galaxies (`line_of_sight.*`, `LINE_OF_SIGHT`)", LINE_OF_SIGHT_COLUMNS),
                         ("Field objects: unlensed galaxies and stars (`field_objects.*`, `OBJECTS`)",
                          OBJECT_COLUMNS),
                         ("Neighbours in crowded cutouts (`neighbours.*`, shard `NEIGHBOUR_TRUTH`)", NEIGHBOUR_COLUMNS)):
        parts.append(f"## {title}\n\n" + reference_table(specs))
    return "\n".join(parts)


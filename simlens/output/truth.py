"""The truth catalogue of a run: one row per system, as FITS table and ECSV with units.

Columns (``<band>`` for every band of the survey):

=========================  ========  ==========================================================
column                     unit      meaning
=========================  ========  ==========================================================
system_id                            id within the run (random streams derive from it)
file                                 file with the system's images, relative to the run folder: its
                                     own cutout if per-system files are written, else its shard
shard, shard_index                   shard file (relative path) and the system's row in it
ra, dec                    deg       lens centre (= cutout centre, CRVAL of the WCS)
z_lens, z_source                     redshifts
velocity_dispersion        km / s    lens stellar velocity dispersion
einstein_radius            arcsec    SIS/SIE Einstein radius from sigma and the distances;
                                     stars_and_halo: solved (mean convergence 1 within it)
mass_model                           sie, power_law or cored_isothermal
mass_q, mass_angle         -, deg    mass axis ratio and major-axis angle (CCW from +x)
mass_slope                           3D density slope (2 unless power_law)
mass_core_radius           arcsec    core radius (0 unless cored_isothermal)
multipole_m{3,4}_strength            multipole amplitudes a_3, a_4 (0: none)
multipole_m{3,4}_angle     deg       multipole angles relative to the mass major axis
n_subhalos                           subhalos of this lens (each a row of subhalos.ecsv)
subhalo_mass_total         M_sun     their total mass
n_line_of_sight                      SIS galaxies in other lens planes (rows of line_of_sight.ecsv);
                                     with any, max_time_delay is nan (multi-plane)
shear_gamma, shear_angle   -, deg    external shear
lens_mag_<band>            mag       lens light, AB
lens_half_light_radius     arcsec    circularised R_e of the lens light
lens_sersic_index                    Sersic n of the lens light
lens_q, lens_angle         -, deg    lens-light shape
source_mag_<band>          mag       unlensed source (disk + clumps), AB
source_half_light_radius   arcsec    circularised R_e of the source disk
source_sersic_index                  Sersic n of the source disk
source_q, source_angle     -, deg    source-disk shape
source_x, source_y         arcsec    source centre, source plane, relative to the lens centre
source_n_clumps                      number of star-forming clumps
magnification                        extended-source magnification (reference band): lensed
                                     flux of the source galaxy in the rendered field over its
                                     unlensed flux (point-source images not included)
n_images                             images of the source centre in the rendered field (each a
                                     row of images.ecsv, with magnification and time delay)
point_magnification                  sum of |magnification| of those images (point source)
max_time_delay             day       delay between the first and the last of those images
lens_absolute_magnitude    mag       rest-frame AB magnitude of the lens light in the scaling
                                     relations' rest filter (nan unless lens.light.scaling)
lens_luminosity            L_sun     its luminosity in that filter
lens_stellar_mass          M_sun     luminosity x mass_to_light (nan unless given)
source_absolute_magnitude  mag       rest-frame AB magnitude of the source (source.counts only)
quasar_mag_<band>          mag       unlensed point source at the source centre (nan: none)
placement                            fixed, lens or sky (source.position.mode)
region_radius, region_area arcsec    the disc in which source centres fall uniformly; its area
                           arcsec2
region_widened                       the caustics reached beyond the nominal disc, which was
                                     widened to hold them
multiply_imaged                      the source centre lies inside a caustic or the cut
tangential_caustic_area    arcsec2   area inside the tangential caustic
inner_caustic_area         arcsec2   area inside the radial caustic or the cut
candidate                            which draw of this system passed the selection (0: first)
passes_<cut>                         the system passes that [selection] cut
selected                             it passes all of them
stellar_kappa_e                      stars_and_halo: the stars' convergence at R_e (0: other models)
halo_mass, halo_concentration        stars_and_halo: NFW M200 (M_sun) and c200 (nan: other models)
halo_kappa_s, halo_scale_radius      stars_and_halo: NFW kappa_s and r_s (arcsec)
halo_ellipticity                     stars_and_halo: ellipticity of the halo's potential
second_source_z, _x, _y    -, arcsec second source plane (source.second): redshift, centre in its plane
second_source_mag_<band>   mag       its unlensed magnitude
second_source_magnification          its lensed flux in the rendered field over the unlensed flux
second_source_deflector_einstein_radius  arcsec  the first source as an SIS deflector of it
system_class                         lens (source centre multiply imaged), missed_caustics,
                                     source_in_front, or a negative class (simlens.negatives)
is_lens                              system_class is lens and the system is selected: the label
n_lookalike_features                 look-alike light components added (negatives)
arc_snr_<band>                       matched-filter S/N of the noiseless lensed source:
                                     sqrt(sum_i S_i^2 / var_i), var_i = expected per-pixel variance
                                     (sky + lens + source Poisson and read noise), over the cutout
psf_fwhm_<band>            arcsec    PSF FWHM
magzero_<band>             mag       AB zero point of the images: m = magzero - 2.5 log10(ADU)
sky_level_<band>                     sky level subtracted from the images (ADU per pixel)
=========================  ========  ==========================================================
"""

from __future__ import annotations

from typing import Sequence

import astropy.units as u
import numpy as np
from astropy.table import Table

from ..imaging.render import RenderedSystem

__all__ = ["truth_row", "truth_table", "subhalo_rows", "subhalo_table", "image_rows", "image_table",
           "line_of_sight_rows", "line_of_sight_table", "TRUTH_UNITS"]

TRUTH_UNITS = {
    "ra": u.deg, "dec": u.deg, "velocity_dispersion": u.km / u.s, "einstein_radius": u.arcsec,
    "mass_angle": u.deg, "shear_angle": u.deg, "mass_core_radius": u.arcsec,
    "multipole_m3_angle": u.deg, "multipole_m4_angle": u.deg, "subhalo_mass_total": u.M_sun, "lens_half_light_radius": u.arcsec, "lens_angle": u.deg,
    "source_half_light_radius": u.arcsec, "source_angle": u.deg, "source_x": u.arcsec, "source_y": u.arcsec,
    "max_time_delay": u.day, "lens_absolute_magnitude": u.mag, "lens_luminosity": u.L_sun,
    "lens_stellar_mass": u.M_sun, "source_absolute_magnitude": u.mag, "region_radius": u.arcsec,
    "region_area": u.arcsec**2, "second_source_x": u.arcsec, "second_source_y": u.arcsec,
    "second_source_deflector_einstein_radius": u.arcsec, "halo_mass": u.M_sun, "halo_scale_radius": u.arcsec, "tangential_caustic_area": u.arcsec**2, "inner_caustic_area": u.arcsec**2,
}


def truth_row(rendered: RenderedSystem, file: str, shard: str = "", shard_index: int = -1,
              flags: dict | None = None, cut_names: tuple = ()) -> dict:
    s = rendered.system
    row = {
        "system_id": s.system_id, "file": file, "shard": shard, "shard_index": shard_index,
        "ra": s.ra, "dec": s.dec,
        "z_lens": s.z_lens, "z_source": s.z_source, "velocity_dispersion": s.velocity_dispersion,
        "einstein_radius": s.einstein_radius, "mass_model": s.mass_model_name,
        "mass_q": s.mass_q, "mass_angle": s.mass_angle, "mass_slope": s.mass_slope,
        "mass_core_radius": s.mass_core_radius,
        "multipole_m3_strength": next((a for m, a, _ in s.multipoles if m == 3), 0.0),
        "multipole_m3_angle": next((t for m, _, t in s.multipoles if m == 3), 0.0),
        "multipole_m4_strength": next((a for m, a, _ in s.multipoles if m == 4), 0.0),
        "multipole_m4_angle": next((t for m, _, t in s.multipoles if m == 4), 0.0),
        "n_subhalos": len(s.subhalos), "subhalo_mass_total": float(sum(h.mass for h in s.subhalos)),
        "n_line_of_sight": len(s.line_of_sight),
        "shear_gamma": s.shear_gamma, "shear_angle": s.shear_angle,
    }
    names = [b.name for b in s.bands]
    row.update({f"lens_mag_{b}": s.lens_magnitudes[b] for b in names})
    row.update({"lens_half_light_radius": s.lens_half_light_radius, "lens_sersic_index": s.lens_sersic_index,
                "lens_q": s.lens_q, "lens_angle": s.lens_angle})
    row.update({f"source_mag_{b}": s.source_magnitude(b) for b in names})
    row.update({"source_half_light_radius": s.source_half_light_radius,
                "source_sersic_index": s.source_sersic_index, "source_q": s.source_q,
                "source_angle": s.source_angle, "source_x": s.source_x, "source_y": s.source_y,
                "source_n_clumps": len(s.clumps),
                "magnification": rendered.magnification, "n_images": len(rendered.images),
                "point_magnification": float(np.abs(rendered.images.magnification).sum()),
                "max_time_delay": float(rendered.time_delays.max()) if len(rendered.images) else 0.0,
                "lens_absolute_magnitude": s.lens_absolute_magnitude, "lens_luminosity": s.lens_luminosity,
                "lens_stellar_mass": s.lens_stellar_mass,
                "source_absolute_magnitude": s.source_absolute_magnitude})
    row.update({f"quasar_mag_{b}": (s.quasar_magnitudes[b] if s.quasar_magnitudes is not None else float("nan"))
                for b in names})
    row.update({"placement": s.placement, "region_radius": s.region_radius, "region_area": s.region_area,
                "region_widened": s.region_widened, "multiply_imaged": s.multiply_imaged,
                "tangential_caustic_area": s.tangential_caustic_area, "inner_caustic_area": s.inner_caustic_area,
                "candidate": s.candidate})
    flags = flags or {}
    row.update({f"passes_{name}": bool(flags.get(name, True)) for name in cut_names})
    row["selected"] = all(bool(flags.get(name, True)) for name in cut_names)
    row.update({"stellar_kappa_e": s.stellar_kappa_e, "halo_mass": s.halo_mass,
                "halo_concentration": s.halo_concentration, "halo_kappa_s": s.halo_kappa_s,
                "halo_scale_radius": s.halo_scale_radius, "halo_ellipticity": s.halo_ellipticity})
    second = s.second_source
    row.update({"second_source_z": second.z if second else float("nan"),
                "second_source_x": second.x if second else float("nan"),
                "second_source_y": second.y if second else float("nan"),
                "second_source_magnification": rendered.second_magnification,
                "second_source_deflector_einstein_radius": second.deflector_einstein_radius if second else 0.0})
    row.update({f"second_source_mag_{b}": (second.magnitudes[b] if second else float("nan")) for b in names})
    row["system_class"] = s.system_class
    row["is_lens"] = s.system_class == "lens" and row["selected"]
    row["n_lookalike_features"] = len(s.extra_light)
    row.update({f"arc_snr_{b.band.name}": b.arc_snr for b in rendered.bands})
    row.update({f"psf_fwhm_{b.name}": b.psf_fwhm for b in s.bands})
    row.update({f"magzero_{b.name}": b.magzero for b in s.bands})
    row.update({f"sky_level_{b.name}": b.sky_level for b in s.bands})
    return row


SUBHALO_COLUMNS = ("system_id", "x", "y", "mass", "einstein_radius", "truncation_radius")
SUBHALO_UNITS = {"x": u.arcsec, "y": u.arcsec, "mass": u.M_sun, "einstein_radius": u.arcsec,
                 "truncation_radius": u.arcsec}


def subhalo_rows(rendered: RenderedSystem) -> list[dict]:
    return [{"system_id": rendered.system.system_id, "x": h.x, "y": h.y, "mass": h.mass,
             "einstein_radius": h.einstein_radius, "truncation_radius": h.truncation_radius}
            for h in rendered.system.subhalos]


def _keyed_table(rows: Sequence[dict], names: tuple, units: dict, dtype: tuple) -> Table:
    """A table of per-system rows (keyed by system_id), with its columns even when empty."""
    table = Table(rows=list(rows), names=names) if rows else Table(names=names, dtype=dtype)
    for name, unit in units.items():
        table[name].unit = unit
    return table


def subhalo_table(rows: Sequence[dict]) -> Table:
    """Subhalos keyed by system_id (positions in the image plane, arcsec from the lens centre)."""
    return _keyed_table(rows, SUBHALO_COLUMNS, SUBHALO_UNITS, (np.int64,) + (float,) * 5)


def truth_table(rows: Sequence[dict]) -> Table:
    table = Table(rows=list(rows), names=list(rows[0]))
    for name, column in table.columns.items():
        if name in TRUTH_UNITS:
            column.unit = TRUTH_UNITS[name]
        elif name.startswith(("lens_mag_", "source_mag_", "quasar_mag_", "second_source_mag_")):
            column.unit = u.mag
        elif name.startswith("psf_fwhm_"):
            column.unit = u.arcsec
        elif name.startswith("magzero_"):
            column.unit = u.mag
    return table


IMAGE_COLUMNS = ("system_id", "image", "x", "y", "magnification", "parity", "arrival", "time_delay")
IMAGE_UNITS = {"x": u.arcsec, "y": u.arcsec, "time_delay": u.day}


def image_rows(rendered: RenderedSystem) -> list[dict]:
    """One row per image of the source centre: position (arcsec from the lens centre, image plane),
    signed magnification, parity (+1 minimum or maximum, -1 saddle), arrival order (0 first) and
    time delay after the first image (days); with line-of-sight planes the delays are not computed
    (NaN, arrival -1)."""
    im, delays = rendered.images, rendered.time_delays
    order = np.argsort(np.argsort(delays, kind="stable"), kind="stable") if len(im) else np.empty(0, int)
    if len(im) and not np.all(np.isfinite(delays)):  # multi-plane systems: delays not computed
        order = np.full(len(im), -1)
    return [{"system_id": rendered.system.system_id, "image": k, "x": float(im.x[k]), "y": float(im.y[k]),
             "magnification": float(im.magnification[k]), "parity": int(np.sign(im.magnification[k])),
             "arrival": int(order[k]), "time_delay": float(delays[k])} for k in range(len(im))]


def image_table(rows: Sequence[dict]) -> Table:
    """Images keyed by system_id (see :func:`image_rows`)."""
    return _keyed_table(rows, IMAGE_COLUMNS, IMAGE_UNITS,
                        (np.int64, np.int64, float, float, float, np.int64, np.int64, float))


LOS_COLUMNS = ("system_id", "z", "velocity_dispersion", "x", "y", "einstein_radius")
LOS_UNITS = {"velocity_dispersion": u.km / u.s, "x": u.arcsec, "y": u.arcsec, "einstein_radius": u.arcsec}


def line_of_sight_rows(rendered: RenderedSystem) -> list[dict]:
    return [{"system_id": rendered.system.system_id, "z": g.z, "velocity_dispersion": g.velocity_dispersion,
             "x": g.x, "y": g.y, "einstein_radius": g.einstein_radius} for g in rendered.system.line_of_sight]


def line_of_sight_table(rows: Sequence[dict]) -> Table:
    """Line-of-sight SIS galaxies keyed by system_id (position in their own plane, arcsec; Einstein
    radius for the system's source)."""
    return _keyed_table(rows, LOS_COLUMNS, LOS_UNITS, (np.int64,) + (float,) * 5)

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
einstein_radius            arcsec    SIS/SIE Einstein radius from sigma and the distances
mass_model                           sie, power_law or cored_isothermal
mass_q, mass_angle         -, deg    mass axis ratio and major-axis angle (CCW from +x)
mass_slope                           3D density slope (2 unless power_law)
mass_core_radius           arcsec    core radius (0 unless cored_isothermal)
multipole_m{3,4}_strength            multipole amplitudes a_3, a_4 (0: none)
multipole_m{3,4}_angle     deg       multipole angles relative to the mass major axis
n_subhalos                           subhalos of this lens (each a row of subhalos.ecsv)
subhalo_mass_total         M_sun     their total mass
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
                                     flux in the rendered field over unlensed flux
n_images                             images of the source centre in the rendered field
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

from ..render import RenderedSystem

__all__ = ["truth_row", "truth_table", "subhalo_rows", "subhalo_table", "TRUTH_UNITS"]

TRUTH_UNITS = {
    "ra": u.deg, "dec": u.deg, "velocity_dispersion": u.km / u.s, "einstein_radius": u.arcsec,
    "mass_angle": u.deg, "shear_angle": u.deg, "mass_core_radius": u.arcsec,
    "multipole_m3_angle": u.deg, "multipole_m4_angle": u.deg, "subhalo_mass_total": u.M_sun, "lens_half_light_radius": u.arcsec, "lens_angle": u.deg,
    "source_half_light_radius": u.arcsec, "source_angle": u.deg, "source_x": u.arcsec, "source_y": u.arcsec,
}


def truth_row(rendered: RenderedSystem, file: str, shard: str = "", shard_index: int = -1) -> dict:
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
                "magnification": rendered.magnification, "n_images": len(rendered.images)})
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


def subhalo_table(rows: Sequence[dict]) -> Table:
    """Subhalos keyed by system_id (positions in the image plane, arcsec from the lens centre)."""
    if rows:
        table = Table(rows=list(rows), names=SUBHALO_COLUMNS)
    else:
        table = Table(names=SUBHALO_COLUMNS, dtype=(np.int64,) + (float,) * 5)
    for name, unit in SUBHALO_UNITS.items():
        table[name].unit = unit
    return table


def truth_table(rows: Sequence[dict]) -> Table:
    table = Table(rows=list(rows), names=list(rows[0]))
    for name, column in table.columns.items():
        if name in TRUTH_UNITS:
            column.unit = TRUTH_UNITS[name]
        elif name.startswith(("lens_mag_", "source_mag_")):
            column.unit = u.mag
        elif name.startswith("psf_fwhm_"):
            column.unit = u.arcsec
        elif name.startswith("magzero_"):
            column.unit = u.mag
    return table

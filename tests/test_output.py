"""Files of a run: WCS, pixel convention, headers, truth catalogue, manifest."""

from __future__ import annotations

import json

import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import SkyCoord
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS
from astropy.wcs.utils import proj_plane_pixel_scales

import simlens
from simlens.output import cutout_wcs
from simlens.truth.sampler import offset_on_sky
from simlens.imaging.rays import PixelGrid


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory):
    from tests.conftest import SMALL_RECIPE

    recipe = simlens.parse_recipe(SMALL_RECIPE, origin="small.toml", default_name="small")
    out = tmp_path_factory.mktemp("runs") / "small"
    simlens.run(recipe, out)
    return out, recipe


def test_wcs_pixel_scale_equals_the_recipe(run_folder):
    # astropy.wcs.utils.proj_plane_pixel_scales is the reference for the pixel scale of a WCS.
    out, recipe = run_folder
    with fits.open(out / "cutouts" / "system_000000.fits") as hdul:
        for hdu in hdul[1:]:
            scales = proj_plane_pixel_scales(WCS(hdu.header)) * 3600.0
            np.testing.assert_allclose(scales, recipe.survey.pixel_scale, rtol=1e-12)


def test_reference_pixel_is_the_cutout_centre_and_points_to_the_lens(run_folder):
    out, _ = run_folder
    truth = Table.read(out / "truth.ecsv")
    with fits.open(out / truth["file"][0]) as hdul:
        header = hdul["r"].header
        wcs = WCS(header)
        n = header["NAXIS1"]
        # 0-based centre (N - 1) / 2 maps to the system's RA/Dec (astropy pixel_to_world, 0-based).
        sky = wcs.pixel_to_world((n - 1) / 2, (n - 1) / 2)
        assert sky.ra.deg == pytest.approx(truth["ra"][0], abs=1e-10)
        assert sky.dec.deg == pytest.approx(truth["dec"][0], abs=1e-10)
        # +x (increasing column) points west: RA decreases (north up, east left; FITS convention).
        east = wcs.pixel_to_world((n - 1) / 2 - 1, (n - 1) / 2)
        assert east.ra.deg > sky.ra.deg
        # The lens light peaks at the centre.
        lens = hdul["r_LENS"].data
        cy, cx = np.unravel_index(np.argmax(lens), lens.shape)
        assert abs(cx - (n - 1) / 2) <= 0.5 and abs(cy - (n - 1) / 2) <= 0.5


def test_pixel_axis_convention():
    grid = PixelGrid(size=4, pixel_scale=0.5, supersampling=2, padding=1)
    np.testing.assert_allclose(grid.pixel_axis(), [-0.75, -0.25, 0.25, 0.75])
    # Fine pixel centres average to the coarse pixel centres of the padded grid.
    fine = grid.fine_axis().reshape(-1, 2).mean(axis=1)
    np.testing.assert_allclose(fine, np.arange(-1.25, 1.3, 0.5))


def test_headers_carry_photometry_and_psf(run_folder):
    out, recipe = run_folder
    with fits.open(out / "cutouts" / "system_000001.fits") as hdul:
        names = [h.name for h in hdul]
        assert names == ["PRIMARY", "G", "G_SOURCE", "G_LENS", "G_VAR", "G_PSF", "R", "R_SOURCE", "R_LENS", "R_VAR", "R_PSF"]
        h = hdul["g"].header
        band = recipe.survey.band("g")
        assert h["BUNIT"] == "adu" and h["BAND"] == "g"
        assert h["EXPTIME"] == band.exposure_time.value and h["GAIN"] == band.gain.value
        assert h["MAGZERO"] == pytest.approx(26.6 + 2.5 * np.log10(900.0 / 4.0))
        assert h["PSFFWHM"] == pytest.approx(0.9)
        assert hdul["r"].header["PSFTYPE"] == "kolmogorov"
        assert hdul["g_PSF"].data.sum() == pytest.approx(1.0, rel=1e-5)
        assert hdul[0].header["SYSID"] == 1


def test_magzero_recovers_lens_magnitude(run_folder):
    # m = MAGZERO - 2.5 log10(counts): the noiseless lens-light image of a cutout much larger than the
    # galaxy would give the lens magnitude; a 32-pixel cutout holds most of a R_e <= 1.2" galaxy, so the
    # aperture magnitude is fainter by less than 0.35 mag and never brighter.
    out, _ = run_folder
    truth = Table.read(out / "truth.ecsv")
    for row in truth:
        with fits.open(out / row["file"]) as hdul:
            counts = hdul["r_LENS"].data.sum()
            m = hdul["r_LENS"].header["MAGZERO"] - 2.5 * np.log10(counts)
        assert 0 <= m - row["lens_mag_r"] < 0.35


def test_truth_catalogue_columns_and_units(run_folder):
    out, _ = run_folder
    ecsv = Table.read(out / "truth.ecsv")
    fits_table = Table.read(out / "truth.fits")
    assert len(ecsv) == len(fits_table) == 6
    for name in ["system_id", "file", "ra", "dec", "z_lens", "z_source", "velocity_dispersion", "einstein_radius",
                 "mass_q", "mass_angle", "shear_gamma", "shear_angle", "lens_mag_g", "lens_mag_r",
                 "lens_half_light_radius", "lens_sersic_index", "source_mag_g", "source_mag_r",
                 "source_half_light_radius", "source_x", "source_y", "magnification", "n_images",
                 "arc_snr_g", "arc_snr_r", "psf_fwhm_g", "psf_fwhm_r"]:
        assert name in ecsv.colnames, name
    assert ecsv["ra"].unit == u.deg and ecsv["einstein_radius"].unit == u.arcsec
    assert ecsv["velocity_dispersion"].unit == u.km / u.s and ecsv["lens_mag_r"].unit == u.mag
    assert fits_table["einstein_radius"].unit == u.arcsec
    assert np.all(np.isfinite(ecsv["magnification"])) and np.all(ecsv["magnification"] > 0)
    assert np.all(ecsv["z_source"] > ecsv["z_lens"])
    for row in ecsv:
        assert (out / row["file"]).is_file()


def test_every_catalogue_column_is_described_in_both_formats(run_folder):
    # ECSV keeps astropy's column descriptions; FITS has them as TCOMMn cards (the HEASARC
    # column-comment convention, from memory), read back by astropy's own FITS reader here
    out, _ = run_folder
    for stem in ("truth", "images", "subhalos", "line_of_sight"):
        ecsv = Table.read(out / f"{stem}.ecsv")
        assert all(ecsv[name].description for name in ecsv.colnames), stem
        header = fits.getheader(out / f"{stem}.fits", 1)
        comments = {header[f"TTYPE{i}"]: header.get(f"TCOMM{i}") for i in range(1, header["TFIELDS"] + 1)}
        assert comments == {name: ecsv[name].description for name in ecsv.colnames}, stem
    truth = Table.read(out / "truth.ecsv")
    assert truth["lens_mag_g"].description == "lens light in g, AB"
    assert truth["region_area"].unit == u.arcsec**2 and truth["max_time_delay"].unit == u.day


def test_the_column_reference_of_the_docs_is_up_to_date():
    # docs/truth_columns.md is generated from the same declarations the files are written from
    from pathlib import Path

    from simlens.output.truth import column_reference

    docs = Path(__file__).parents[1] / "docs" / "truth_columns.md"
    assert docs.read_text(encoding="utf-8") == column_reference(), "run: python -m simlens.output.column_docs"


def test_manifest_records_the_run(run_folder):
    out, recipe = run_folder
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["recipe_text"] == recipe.source_text
    assert manifest["seed"] == 42 and manifest["count"] == 6
    assert manifest["versions"]["galsim"] and manifest["versions"]["numpy"]
    assert set(manifest["seconds_by_stage"]) >= {"ray_tracing", "galsim_stage", "writing"}
    assert "Planck18" in manifest["cosmology"]


def test_sky_offsets_match_astropy():
    # astropy's SkyCoord.directional_offset_by is the reference for offsets on the sphere.
    for ra0, dec0, pa, sep in [(10.0, 20.0, 30.0, 0.5), (182.5, -21.0, 250.0, 1.0), (359.9, 80.0, 90.0, 3.0)]:
        ours = offset_on_sky(ra0, dec0, pa, sep)
        ref = SkyCoord(ra0 * u.deg, dec0 * u.deg).directional_offset_by(pa * u.deg, sep * u.deg)
        assert SkyCoord(ours[0] * u.deg, ours[1] * u.deg).separation(ref).arcsec < 1e-6


def test_cutout_wcs_standalone():
    wcs = cutout_wcs(150.0, 2.0, 0.25, 33)
    assert tuple(wcs.wcs.crpix) == (17.0, 17.0)


def test_streamed_catalogue_equals_the_stacked_table(tmp_path):
    # The streaming writer must give what astropy writes for the whole table (FITS and ECSV read back
    # by astropy's Table.read, the reference), with string columns of different widths across parts.
    from astropy.table import vstack

    from simlens.output.catalogue import write_catalogue

    parts = [Table({"system_id": [0, 1], "name": ["a", "bb"], "x": [0.5, 1.5] * u.arcsec, "ok": [True, False]}),
             Table({"system_id": [2], "name": ["cccccc"], "x": [2.5] * u.arcsec, "ok": [True]}),
             Table({"system_id": [3, 4, 5], "name": ["d", "e", "f"], "x": [3.5, 4.5, 5.5] * u.arcsec, "ok": [False] * 3})]
    from simlens.output.columns import table_hdu

    sources = []
    for i, part in enumerate(parts):  # as shards hold them: one binary table each
        fits.HDUList([fits.PrimaryHDU(), table_hdu(part, "TRUTH")]).writeto(tmp_path / f"p{i}.fits")
        sources.append(tmp_path / f"p{i}.fits")
    kept = write_catalogue(sources, "TRUTH", tmp_path, "cat", keep=("x",))
    whole = vstack(parts)
    for name in ("cat.fits", "cat.ecsv"):
        back = Table.read(tmp_path / name)
        assert back.colnames == whole.colnames and len(back) == 6
        for col in whole.colnames:
            assert list(back[col]) == list(whole[col]), (name, col)
        assert back["x"].unit == u.arcsec
    np.testing.assert_array_equal(kept["x"], whole["x"].value)
    with fits.open(tmp_path / "cat.fits") as hdul:
        hdul.verify("exception")


def test_catalogue_text_columns_of_different_widths_per_shard(tmp_path):
    # Shards whose text columns differ in width (read back from FITS as bytes) stream into one
    # catalogue without corrupting rows; astropy reads both files back.
    from astropy.table import Table

    from simlens.output.catalogue import write_catalogue

    parts = [Table({"system_id": [0, 1], "label": ["lens", "ring_galaxy"], "x": [1.0, 2.0]}),
             Table({"system_id": [2], "label": ["tidal_features"], "x": [3.0]})]
    for i, part in enumerate(parts):
        fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU(part, name="TRUTH")]).writeto(tmp_path / f"p{i}.fits")
    write_catalogue([tmp_path / "p0.fits", tmp_path / "p1.fits"], "TRUTH", tmp_path, "cat")
    for name in ("cat.fits", "cat.ecsv"):
        table = Table.read(tmp_path / name)
        assert [str(v) for v in table["label"]] == ["lens", "ring_galaxy", "tidal_features"]
        assert list(table["x"]) == [1.0, 2.0, 3.0]


def test_catalogue_reads_raw_records_as_astropy_reads_them(tmp_path):
    # The catalogue reads the shards' raw FITS records; astropy's own reader (Table.read) is the
    # reference for logicals, blank-padded text, NaNs and empty strings (masked), big-endian numbers.
    from astropy.table import vstack

    from simlens.output.catalogue import write_catalogue
    from simlens.output.columns import table_hdu

    parts = [Table({"system_id": [0, 1], "name": ["a", ""], "x": [np.nan, 1.5], "n": [3, 4], "ok": [True, False]}),
             Table({"system_id": [2], "name": ["cccccc "], "x": [2.5], "n": [5], "ok": [True]})]
    sources = []
    for i, part in enumerate(parts):
        fits.HDUList([fits.PrimaryHDU(), table_hdu(part, "SUBHALOS")]).writeto(tmp_path / f"p{i}.fits")
        sources.append(tmp_path / f"p{i}.fits")
    write_catalogue(sources, "SUBHALOS", tmp_path, "cat")
    reference = vstack([Table.read(path, hdu="SUBHALOS") for path in sources])
    for name in ("cat.fits", "cat.ecsv"):
        back = Table.read(tmp_path / name)
        for col in reference.colnames:
            fill = np.nan if reference[col].dtype.kind == "f" else ("" if reference[col].dtype.kind in "US" else 0)
            expected = np.ma.filled(reference[col], fill)
            np.testing.assert_array_equal(np.ma.filled(back[col], fill), expected, err_msg=f"{name} {col}")

"""Injection of lensed sources into a survey image (a synthetic one with a known WCS, gain, zero
point and GalSim PSF)."""

from __future__ import annotations

import hashlib

import galsim
import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS
from photutils.aperture import CircularAperture, aperture_photometry

from simlens.cli import main
from simlens.errors import SimlensError
from simlens.injection import inject
from simlens.recipe import parse_recipe

from .conftest import SMALL_RECIPE

SCALE = 0.2  # arcsec per pixel


def synthetic_image(tmp_path, with_gain=True):
    rng = np.random.default_rng(3)
    data = rng.normal(0.0, 2.0, (200, 220))
    header = WCS(naxis=2)
    header.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    header.wcs.crval = [150.0, 2.0]
    header.wcs.crpix = [110.5, 100.5]
    header.wcs.cdelt = [-SCALE / 3600.0, SCALE / 3600.0]
    hdr = header.to_header()
    if with_gain:
        hdr["GAIN"] = 4.0
    hdr["MAGZERO"] = 30.0
    path = tmp_path / "field.fits"
    fits.PrimaryHDU(data=data.astype(np.float32), header=hdr).writeto(path)
    psf = galsim.Moffat(beta=3.0, fwhm=0.8).drawImage(nx=25, ny=25, scale=SCALE).array
    fits.PrimaryHDU(data=psf).writeto(tmp_path / "psf.fits")
    wcs = WCS(hdr)
    ra, dec = wcs.pixel_to_world_values([50.3, 150.7, 120.0], [60.6, 140.2, 30.5])
    Table({"ra": ra, "dec": dec, "z_lens": [0.4, 0.5, 0.45], "velocity_dispersion": [260.0, 300.0, 240.0]}).write(
        tmp_path / "lenses.csv", format="ascii.csv")
    return path


def test_injected_flux_matches_the_truth_and_the_input_is_untouched(tmp_path):
    image = synthetic_image(tmp_path)
    before = hashlib.sha256(image.read_bytes()).hexdigest()
    recipe = parse_recipe(SMALL_RECIPE.replace("cutout_size = 32", "cutout_size = 41"))
    inject(image, recipe, tmp_path / "lenses.csv", out=tmp_path / "out", psf_path=tmp_path / "psf.fits",
           full_image=True)
    assert hashlib.sha256(image.read_bytes()).hexdigest() == before  # the input file is never modified
    original = fits.getdata(image).astype(float)
    injected = fits.getdata(tmp_path / "out" / "injected.fits").astype(float)
    added = fits.getdata(tmp_path / "out" / "added.fits").astype(float)
    truth = Table.read(tmp_path / "out" / "truth.ecsv")
    assert len(truth) == 3
    # Reference: photutils aperture photometry of (injected - input) against the noiseless added
    # flux in the same aperture; the difference is the added electrons' Poisson noise.
    for row in truth:
        aperture = CircularAperture((row["x_pixel"], row["y_pixel"]), r=18.0)
        measured = aperture_photometry(injected - original, aperture)["aperture_sum"][0]
        expected = aperture_photometry(added, aperture)["aperture_sum"][0]
        sigma = np.sqrt(expected / 4.0)  # sqrt(N electrons) / gain
        assert measured == pytest.approx(expected, abs=4 * sigma + 0.05)
        assert expected == pytest.approx(row["added_flux"], rel=0.05)  # most of the light within 18 px
        assert row["added_flux"] > 0
    # sky positions round-trip through the image's WCS (astropy.wcs) to better than 0.05 pixel
    x, y = WCS(fits.getheader(image)).world_to_pixel_values(truth["ra"], truth["dec"])
    assert np.max(np.hypot(x - truth["x_pixel"], y - truth["y_pixel"])) < 0.05
    assert np.allclose(truth["x_pixel"], [50.3, 150.7, 120.0], atol=1e-6)


def test_the_added_light_is_centred_on_the_lens(tmp_path):
    # A lensed source at the centre of an SIS is an Einstein ring around the lens: its light-weighted
    # centre falls on the lens position to a small fraction of a pixel.
    image = synthetic_image(tmp_path)
    text = SMALL_RECIPE.replace("cutout_size = 32", "cutout_size = 41").replace(
        "q = { uniform = [0.6, 1.0] }", "q = 1.0").replace("gamma = { uniform = [0.0, 0.05] }", "gamma = 0.0")
    text = text.replace("[source.clumps]", "[source.position]\nx = 0.0\ny = 0.0\n\n[source.clumps]")
    text = text.replace("count = { choice = [0, 2] }", "count = 0")
    inject(image, parse_recipe(text), tmp_path / "lenses.csv", out=tmp_path / "out", psf_path=tmp_path / "psf.fits",
           full_image=True)
    added = fits.getdata(tmp_path / "out" / "added.fits").astype(float)
    truth = Table.read(tmp_path / "out" / "truth.ecsv")
    yy, xx = np.mgrid[:added.shape[0], :added.shape[1]]
    for row in truth:
        near = np.hypot(xx - row["x_pixel"], yy - row["y_pixel"]) < 18
        w = added * near
        cx, cy = (w * xx).sum() / w.sum(), (w * yy).sum() / w.sum()
        assert np.hypot(cx - row["x_pixel"], cy - row["y_pixel"]) < 0.05


def test_missing_photometry_is_a_clear_error_or_given_explicitly(tmp_path, capsys):
    image = synthetic_image(tmp_path, with_gain=False)
    recipe_path = tmp_path / "r.toml"
    recipe_path.write_text(SMALL_RECIPE)
    args = ["inject", str(image), "--recipe", str(recipe_path), "--lenses", str(tmp_path / "lenses.csv"),
            "--out", str(tmp_path / "out")]
    assert main(args) == 2
    assert "header has no GAIN; give it with --gain" in capsys.readouterr().err
    assert main(args + ["--gain", "4.0"]) == 0  # the recipe band's PSF when no --psf is given
    assert (tmp_path / "out" / "truth.fits").is_file()
    assert len(list((tmp_path / "out" / "cutouts").glob("lens_*.fits"))) == 3
    with pytest.raises(SimlensError, match="no celestial WCS"):
        fits.PrimaryHDU(data=np.zeros((10, 10))).writeto(tmp_path / "plain.fits")
        inject(tmp_path / "plain.fits", parse_recipe(SMALL_RECIPE), tmp_path / "lenses.csv", out=tmp_path / "o2")

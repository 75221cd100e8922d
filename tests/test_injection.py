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


def tan_header(crpix) -> fits.Header:
    """A TAN WCS of SCALE-arcsec pixels, north up and east left."""
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    wcs.wcs.crval = [150.0, 2.0]
    wcs.wcs.crpix = list(crpix)
    wcs.wcs.cdelt = [-SCALE / 3600.0, SCALE / 3600.0]
    return wcs.to_header()


def synthetic_image(tmp_path, with_gain=True):
    rng = np.random.default_rng(3)
    data = rng.normal(0.0, 2.0, (200, 220))
    hdr = tan_header((110.5, 100.5))
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
    inject(image, recipe, tmp_path / "lenses.csv", out=tmp_path / "out", psf=tmp_path / "psf.fits",
           full_image=True)
    assert hashlib.sha256(image.read_bytes()).hexdigest() == before  # the input file is never modified
    original = fits.getdata(image).astype(float)
    injected = fits.getdata(tmp_path / "out" / "injected_r.fits").astype(float)
    added = fits.getdata(tmp_path / "out" / "added_r.fits").astype(float)
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
        assert expected == pytest.approx(row["added_flux_r"], rel=0.05)  # most of the light within 18 px
        assert row["added_flux_r"] > 0
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
    inject(image, parse_recipe(text), tmp_path / "lenses.csv", out=tmp_path / "out", psf=tmp_path / "psf.fits",
           full_image=True)
    added = fits.getdata(tmp_path / "out" / "added_r.fits").astype(float)
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


def test_every_lens_takes_its_catalogue_values_from_one_sampler(tmp_path):
    # theta_E = 4 pi (sigma / c)^2 D_ls / D_s (SEF 1992, eq. 8.36) with astropy's distances for
    # the catalogue's sigma and z_lens; the source redshift is the recipe's
    import astropy.constants as const

    image = synthetic_image(tmp_path)
    recipe = parse_recipe(SMALL_RECIPE)
    result = inject(image, recipe, tmp_path / "lenses.csv", out=tmp_path / "out", psf=tmp_path / "psf.fits")
    cosmo = recipe.cosmology.build()
    for row in result.truth:
        ratio = (cosmo.angular_diameter_distance(row["z_lens"], row["z_source"])
                 / cosmo.angular_diameter_distance(row["z_source"])).value
        sigma = row["velocity_dispersion"] / const.c.to("km/s").value
        assert row["einstein_radius"] == pytest.approx(4 * np.pi * sigma**2 * ratio * 206264.806, rel=1e-4)
    assert list(result.truth["z_lens"]) == [0.4, 0.5, 0.45]
    assert list(result.truth["velocity_dispersion"]) == [260.0, 300.0, 240.0]


def test_an_unlensed_source_adds_its_catalogue_flux(tmp_path):
    # Absolute photometry: with (almost) no deflection the added counts equal 10^(-0.4 (m - MAGZERO))
    # of the source (AB definition of the zero point), less the PSF's wings beyond the stamp (< 1 %).
    image = synthetic_image(tmp_path)
    Table({"ra": [150.0], "dec": [2.0], "z_lens": [0.4], "velocity_dispersion": [1.0]}).write(
        tmp_path / "one.csv", format="ascii.csv")
    text = SMALL_RECIPE.replace("cutout_size = 32", "cutout_size = 41").replace(
        "[source.clumps]", "[source.position]\nx = 0.0\ny = 0.0\n\n[source.clumps]").replace(
        "count = { choice = [0, 2] }", "count = 0")
    result = inject(image, parse_recipe(text), tmp_path / "one.csv", out=tmp_path / "out", psf=tmp_path / "psf.fits")
    row = result.truth[0]
    expected = 10 ** (-0.4 * (row["source_mag_r"] - 30.0))
    assert row["added_flux_unclipped_r"] == pytest.approx(expected, rel=0.01)


def test_empirical_psf_from_the_image_stars_recovers_the_fwhm(tmp_path):
    # photutils EPSFBuilder on stars drawn with a GalSim Moffat (FWHM 0.8") among galaxies: the FWHM
    # of the empirical PSF (photutils RadialProfile Moffat fit) is within 5 % of the true PSF's
    # pixel-convolved FWHM (GalSim, same sampling).
    from photutils.profiles import RadialProfile

    from simlens.injection import empirical_psf

    rng = np.random.default_rng(5)
    data = rng.normal(0.0, 2.0, (400, 400))
    psf = galsim.Moffat(beta=3.0, fwhm=0.8)
    for x, y in rng.uniform(20, 380, (50, 2)):
        ix, iy = int(round(x)), int(round(y))
        stamp = psf.withFlux(rng.uniform(3e3, 2e4)).drawImage(nx=31, ny=31, scale=SCALE, offset=(x - ix, y - iy)).array
        data[iy - 15:iy + 16, ix - 15:ix + 16] += stamp
    for x, y in rng.uniform(40, 360, (8, 2)):  # extended galaxies the selection should mostly reject
        ix, iy = int(round(x)), int(round(y))
        gal = galsim.Convolve(galsim.Sersic(n=1.0, half_light_radius=1.0, flux=2e4), psf)
        data[iy - 30:iy + 31, ix - 30:ix + 31] += gal.drawImage(nx=61, ny=61, scale=SCALE).array
    kernel, n_stars = empirical_psf(data, 0.8 / SCALE)
    assert n_stars >= 10 and kernel.sum() == pytest.approx(1.0)
    radii = np.arange(0, 12, 0.5)
    measured = RadialProfile(kernel, (12.0, 12.0), radii).moffat_fwhm
    reference = psf.drawImage(nx=25, ny=25, scale=SCALE).array
    expected = RadialProfile(reference, (12.0, 12.0), radii).moffat_fwhm
    assert measured == pytest.approx(expected, rel=0.05)


def test_inject_with_an_empirical_psf_records_it(tmp_path):
    image = synthetic_image(tmp_path)
    data = fits.getdata(image).astype(float)
    header = fits.getheader(image)
    rng = np.random.default_rng(8)
    psf = galsim.Moffat(beta=3.0, fwhm=0.8)
    for x, y in rng.uniform(20, 180, (30, 2)):
        ix, iy = int(round(x)), int(round(y))
        data[iy - 15:iy + 16, ix - 15:ix + 16] += psf.withFlux(1e4).drawImage(
            nx=31, ny=31, scale=SCALE, offset=(x - ix, y - iy)).array
    starry = tmp_path / "starry.fits"
    fits.PrimaryHDU(data=data.astype(np.float32), header=header).writeto(starry)
    recipe = parse_recipe(SMALL_RECIPE.replace("cutout_size = 32", "cutout_size = 41"))
    result = inject(starry, recipe, tmp_path / "lenses.csv", out=tmp_path / "out", psf="stars")
    assert "psf_r.fits" in result.files and "empirical" in result.truth.meta["psf_r"]
    assert fits.getdata(tmp_path / "out" / "psf_r.fits").sum() == pytest.approx(1.0, rel=1e-5)


def test_automatic_selection_finds_the_early_type_galaxies(tmp_path):
    # de Vaucouleurs (n = 4) galaxies are selected, exponential disks and stars are not (Gini and
    # size rule of simlens.injection.select_lens_galaxies); the mass follows the light's moments
    # (photutils SourceCatalog orientation and elongation) within 0.1 in q and 10 degrees.
    rng = np.random.default_rng(2)
    data = rng.normal(0.0, 2.0, (300, 300))
    psf = galsim.Moffat(beta=3.0, fwhm=0.8)
    early = [((80, 80), 0.7, 30.0), ((200, 100), 0.6, -40.0), ((150, 220), 0.85, 10.0)]
    disks = [((60, 220), 0.5, 60.0), ((240, 240), 0.4, 0.0)]
    for (x, y), q, angle in [(p, q, a) for p, q, a in early] + disks:
        n = 4.0 if ((x, y), q, angle) in early else 1.0
        g = galsim.Sersic(n=n, half_light_radius=1.2, flux=4e4).shear(q=q, beta=angle * galsim.degrees)
        data[y - 40:y + 41, x - 40:x + 41] += galsim.Convolve(g, psf).drawImage(nx=81, ny=81, scale=SCALE).array
    for x, y in rng.uniform(20, 280, (6, 2)):
        ix, iy = int(x), int(y)
        data[iy - 15:iy + 16, ix - 15:ix + 16] += psf.withFlux(1e4).drawImage(nx=31, ny=31, scale=SCALE).array
    hdr = tan_header((150.5, 150.5))
    hdr["GAIN"], hdr["MAGZERO"] = 4.0, 30.0
    path = tmp_path / "galaxies.fits"
    fits.PrimaryHDU(data=data.astype(np.float32), header=hdr).writeto(path)
    recipe = parse_recipe(SMALL_RECIPE.replace("cutout_size = 32", "cutout_size = 41"))
    result = inject(path, recipe, "auto", out=tmp_path / "out")
    selected = Table.read(tmp_path / "out" / "lenses_selected.ecsv")
    assert len(selected) == 3 and len(result.truth) == 3
    for (x, y), q, angle in early:
        match = selected[np.hypot(selected["x_pixel"] - x, selected["y_pixel"] - y) < 1.0]
        assert len(match) == 1
        assert match["mass_q"][0] == pytest.approx(q, abs=0.1)
        assert abs(((match["mass_angle"][0] - angle) + 90) % 180 - 90) < 10
        assert 50 <= match["velocity_dispersion"][0] <= 500


def test_an_image_that_is_not_fits_is_one_clear_error(tmp_path, capsys):
    # common practice: a user error is one line and exit status 2, never a traceback
    synthetic_image(tmp_path)
    (tmp_path / "notes.fits").write_text("these are not FITS bytes\n" * 40)
    recipe_path = tmp_path / "r.toml"
    recipe_path.write_text(SMALL_RECIPE)
    assert main(["inject", str(tmp_path / "notes.fits"), "--recipe", str(recipe_path), "--lenses",
                 str(tmp_path / "lenses.csv"), "--out", str(tmp_path / "out"), "--gain", "4"]) == 2
    err = capsys.readouterr().err
    assert "not a readable FITS image" in err and "Traceback" not in err and "these are not" not in err


def test_blank_pixels_under_a_lens_are_reported_per_lens(tmp_path, capsys):
    # Survey images mark missing data as NaN (common practice): the lens over the hole is named,
    # its blank pixels counted in the truth, the other lenses are untouched by the warning.
    image = synthetic_image(tmp_path)
    with fits.open(image) as hdul:
        data, header = hdul[0].data.copy(), hdul[0].header
    data[55:65, 45:55] = np.nan  # 100 pixels around the first lens (x 50.3, y 60.6)
    holed = tmp_path / "holed.fits"
    fits.PrimaryHDU(data=data, header=header).writeto(holed)
    recipe_path = tmp_path / "r.toml"
    recipe_path.write_text(SMALL_RECIPE)
    assert main(["inject", str(holed), "--recipe", str(recipe_path), "--lenses", str(tmp_path / "lenses.csv"),
                 "--out", str(tmp_path / "out"), "--psf", str(tmp_path / "psf.fits")]) == 0
    err = capsys.readouterr().err
    assert "simlens: warning:" in err and "lens 0 in r (100 pixels)" in err and "lens 1" not in err
    truth = Table.read(tmp_path / "out" / "truth.ecsv")
    assert list(truth["blank_pixels_r"]) == [100, 0, 0]

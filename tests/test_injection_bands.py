"""Injection into several bands of the same field at once, with variance, weight and mask planes
(synthetic survey products with a known WCS, gain, zero point and GalSim PSFs)."""

from __future__ import annotations

import galsim
import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS
from photutils.aperture import RectangularAperture, aperture_photometry

from simlens.cli import main
from simlens.errors import SimlensError
from simlens.injection import inject
from simlens.recipe import parse_recipe

from .conftest import PHYSICAL_RECIPE
from .test_injection import SCALE, tan_header

BANDS = ("g", "r", "i")
GAIN = {"g": 3.0, "r": 4.0, "i": 5.0}
MAGZERO = {"g": 30.0, "r": 30.2, "i": 29.9}
SKY_SIGMA = {"g": 1.5, "r": 2.0, "i": 2.5}  # image units
SIZE = 61  # cutout pixels: the arcs and the PSF's wings well inside


def recipe_text() -> str:
    """PHYSICAL_RECIPE with an i band, no clumps (one template: the disk's), 61-pixel cutouts."""
    text = PHYSICAL_RECIPE.replace("cutout_size = 32", f"cutout_size = {SIZE}").replace(
        "count = { choice = [0, 2] }", "count = 0")
    return text.replace("[cosmology]", """[survey.bands.i]
filter = "LSST_i"
zero_point = 26.5
sky_brightness = 20.5
exposure_time = 900.0
gain = 4.0
read_noise = 7.0
psf = { profile = "moffat", beta = 3.0, fwhm = 0.7 }

[cosmology]""")


def survey_products(tmp_path, layout: str):
    """Three bands of one 200 x 220 field: ``files`` (a file per band with VARIANCE and MASK) or
    ``mef`` (one file, HDUs g, WEIGHT_g, MASK_g, ...).  Returns (images argument, inputs by band)."""
    rng = np.random.default_rng(11)
    header = tan_header((110.5, 100.5))
    inputs = {}
    for b in BANDS:
        data = rng.normal(0.0, SKY_SIGMA[b], (200, 220))
        variance = np.full(data.shape, SKY_SIGMA[b] ** 2) * rng.uniform(0.9, 1.1, data.shape)
        mask = np.zeros(data.shape, np.int32)
        mask[43:49, 30:50] = 4  # a bad block across the first lens (x 40.3, y 45.6)
        inputs[b] = (data.astype(np.float32), variance.astype(np.float32), mask)
    psf_files = {}
    for b, fwhm in zip(BANDS, (0.9, 0.8, 0.7)):
        psf_files[b] = tmp_path / f"psf_{b}.fits"
        fits.PrimaryHDU(galsim.Moffat(beta=3.0, fwhm=fwhm).drawImage(nx=31, ny=31, scale=SCALE).array).writeto(
            psf_files[b])
    if layout == "files":
        images = []
        for b in BANDS:
            data, variance, mask = inputs[b]
            science = fits.ImageHDU(data, header=header, name="SCI")
            science.header["GAIN"], science.header["MAGZERO"] = GAIN[b], MAGZERO[b]
            path = tmp_path / f"field_{b}.fits"
            fits.HDUList([fits.PrimaryHDU(), science, fits.ImageHDU(variance, name="VARIANCE"),
                          fits.ImageHDU(mask, name="MASK")]).writeto(path)
            images.append(path)
    else:
        hdus = [fits.PrimaryHDU()]
        for b in BANDS:
            data, variance, mask = inputs[b]
            science = fits.ImageHDU(data, header=header, name=b)
            science.header["GAIN"], science.header["MAGZERO"] = GAIN[b], MAGZERO[b]
            hdus += [science, fits.ImageHDU((1.0 / variance).astype(np.float32), name=f"WEIGHT_{b}"),
                     fits.ImageHDU(mask, name=f"MASK_{b}")]
        images = tmp_path / "field.fits"
        fits.HDUList(hdus).writeto(images)
    ra, dec = WCS(header).pixel_to_world_values([40.3, 170.7, 105.0], [45.6, 50.2, 150.5])  # cutouts apart
    Table({"ra": ra, "dec": dec, "z_lens": [0.4, 0.5, 0.45], "velocity_dispersion": [260.0, 300.0, 280.0]}).write(
        tmp_path / "lenses.csv", format="ascii.csv")
    return images, inputs, psf_files


def template_colour(z: float, first: str, second: str) -> float:
    # Reference library: galsim.SED.calculateMagnitude (AB) of GalSim's CWW Sbc template (the
    # recipe's disk template, "spiral") redshifted to z, through GalSim's LSST filters.
    share = galsim.meta_data.share_dir
    sed = galsim.SED(f"{share}/SEDs/CWW_Sbc_ext.sed", wave_type="Ang", flux_type="flambda").atRedshift(z)
    filters = {b: galsim.Bandpass(f"LSST_{b}.dat", wave_type="nm").withZeropoint("AB") for b in (first, second)}
    return sed.calculateMagnitude(filters[first]) - sed.calculateMagnitude(filters[second])


@pytest.mark.parametrize("layout", ["files", "mef"])
def test_one_call_injects_consistent_arcs_into_every_band(tmp_path, layout):
    images, inputs, psf_files = survey_products(tmp_path, layout)
    recipe = parse_recipe(recipe_text())
    result = inject(images, recipe, tmp_path / "lenses.csv", out=tmp_path / "out", bands=list(BANDS),
                    psf={b: psf_files[b] for b in BANDS}, full_image=True)
    truth = Table.read(tmp_path / "out" / "truth.ecsv")
    assert len(truth) == 3 and truth.meta["bands"] == "g,r,i"
    for row in truth:
        with fits.open(tmp_path / "out" / row["file"]) as hdul:
            planes = {h.name: (np.asarray(h.data, float) if h.data is not None else None, h.header) for h in hdul}
        for b in BANDS:
            injected, header = planes[f"{b.upper()}_INJECTED"]
            added = planes[f"{b.upper()}_ADDED"][0]
            wcs = WCS(header)
            x0, y0 = (int(round(v)) for v in wcs.wcs.crpix - np.array([110.5, 100.5]))
            region = (slice(-y0, -y0 + SIZE), slice(-x0, -x0 + SIZE))
            data, variance, mask = (plane[region] for plane in inputs[b])
            masked = mask != 0
            # (1) Added flux against the truth's magnitude of what was added: photutils aperture
            # photometry of injected - input over the whole cutout, within 4 sigma of the added
            # electrons' Poisson noise (sqrt(N) / gain, image units).
            aperture = RectangularAperture(((SIZE - 1) / 2, (SIZE - 1) / 2), SIZE, SIZE)
            measured = aperture_photometry(injected - data, aperture)["aperture_sum"][0]
            expected = 10 ** (-0.4 * (row[f"added_mag_{b}"] - MAGZERO[b]))
            assert expected == pytest.approx(row[f"added_flux_{b}"], rel=1e-6)
            assert measured == pytest.approx(expected, abs=4 * np.sqrt(expected / GAIN[b]))
            # (2) Masked pixels: nothing added, kept masked, counted.
            assert np.array_equal(injected[masked], data[masked]) and not added[masked].any()
            assert row[f"masked_pixels_{b}"] == masked.sum()
            assert np.array_equal(planes[f"{b.upper()}_MASK"][0], mask)
            # (3) The noise plane: the input's variance plus the added counts over the gain
            # (Poisson variance of added / gain electrons, in image units squared; common practice).
            if layout == "files":
                assert np.allclose(planes[f"{b.upper()}_VARIANCE"][0], variance + added / GAIN[b], rtol=1e-6)
            else:
                weight = planes[f"{b.upper()}_WEIGHT"][0]
                assert np.allclose(1.0 / weight, variance + added / GAIN[b], rtol=1e-5)
        # (4) Colours of the added arcs (noiseless ADDED planes, whole cutout) against the template's.
        counts = {b: planes[f"{b.upper()}_ADDED"][0].sum() + row[f"added_flux_masked_{b}"] for b in BANDS}
        for first, second in (("g", "r"), ("r", "i")):
            colour = (-2.5 * np.log10(counts[first] / counts[second]) + MAGZERO[first] - MAGZERO[second])
            assert colour == pytest.approx(template_colour(row["z_source"], first, second), abs=0.02)
    # the first lens sits on the masked block: part of its arc fell there, and the truth says how much
    assert truth["masked_pixels_r"][0] == 120 and truth["added_flux_masked_r"][0] > 0
    assert truth["masked_pixels_r"][2] == 0 and truth["added_flux_masked_r"][2] == 0
    # the whole images: planes beside the injected one, updated the same way
    with fits.open(tmp_path / "out" / "injected_r.fits") as hdul:
        names = [h.name for h in hdul]
        assert names[1:] == (["VARIANCE", "MASK"] if layout == "files" else ["WEIGHT", "MASK"])
    assert set(result.files) >= {f"injected_{b}.fits" for b in BANDS} | {f"added_{b}.fits" for b in BANDS}


def test_the_cli_takes_a_file_per_band_and_per_band_options(tmp_path, capsys):
    images, _, psf_files = survey_products(tmp_path, "files")
    recipe_path = tmp_path / "r.toml"
    recipe_path.write_text(recipe_text())
    args = ["inject", *map(str, images), "--recipe", str(recipe_path), "--lenses", str(tmp_path / "lenses.csv"),
            "--bands", "g,r,i", "--psf", ",".join(f"{b}={psf_files[b]}" for b in BANDS),
            "--gain", "g=3,r=4,i=5", "--out", str(tmp_path / "out")]
    assert main(args) == 0
    assert "band(s) g, r, i;" in capsys.readouterr().out
    truth = Table.read(tmp_path / "out" / "truth.fits")
    assert {f"added_mag_{b}" for b in BANDS} <= set(truth.colnames)
    assert main(args[:-2] + ["--bands", "g,r", "--out", str(tmp_path / "o2")]) == 2
    assert "3 images given for 2 bands" in capsys.readouterr().err


def test_bands_turned_against_each_other_are_refused(tmp_path):
    images, _, psf_files = survey_products(tmp_path, "files")
    with fits.open(images[2], mode="update") as hdul:  # the i band's pixel axes flipped in x
        hdul["SCI"].header["CDELT1"] = -hdul["SCI"].header["CDELT1"]
    with pytest.raises(SimlensError, match="turned or flipped"):
        inject(images, parse_recipe(recipe_text()), tmp_path / "lenses.csv", out=tmp_path / "out", bands=list(BANDS))
    assert not (tmp_path / "out").exists()

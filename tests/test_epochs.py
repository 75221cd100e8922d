"""Multi-epoch cutouts: each image of a lensed transient shows the source's light curve at its own
delay and magnification; the static scene, the noise, the files and their determinism."""

from __future__ import annotations

import hashlib
import math
import textwrap

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from photutils.aperture import CircularAperture, aperture_photometry

import simlens
from simlens.imaging.observe import unresampled_variance
from simlens.recipe import parse_recipe
from simlens.runs.loader import iter_batches, run_epochs
from simlens.runs.run_folder import verify_run

SIZE, SCALE = 64, 0.2

EPOCH_RECIPE = textwrap.dedent(f"""
    name = "epochs"
    count = 4
    seed = 11

    [survey]
    pixel_scale = {SCALE}
    cutout_size = {SIZE}
    supersampling = 4
    reference_band = "r"

    [survey.cadence]
    start = 61000.0
    length = 400.0
    [survey.bands.r]
    filter = "LSST_r"
    zero_point = 28.4
    sky_brightness = 21.2
    exposure_time = 30.0
    gain = 1.0
    read_noise = 5.0
    psf = {{ profile = "moffat", beta = 3.0, fwhm = 0.7 }}
    revisit = 1.0

    [cosmology]
    name = "Planck18"

    [lens]
    redshift = 0.35
    velocity_dispersion = 300.0

    [lens.mass]
    q = 0.8
    angle = 30.0

    [lens.light]
    magnitude = 19.5
    half_light_radius = 1.0

    [source]
    redshift = 0.7
    magnitude = 23.5
    half_light_radius = 0.2

    [source.position]
    x = {{ uniform = [0.25, 0.45] }}
    y = {{ uniform = [-0.1, 0.1] }}

    [source.supernova]
    peak_absolute_magnitude = -19.4
    peak_margin = 0.0
    host = false

    [output]
    shard_size = 2
    per_system_files = false
""")


@pytest.fixture(scope="module")
def epoch_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("epochs") / "run"
    simlens.run(parse_recipe(EPOCH_RECIPE), folder)
    return folder


def test_image_peaks_are_separated_by_the_delays_and_fluxes_follow_the_magnifications(epoch_run):
    # The lens equation's truth (images, magnifications, delays: tests/test_lensing.py) against
    # photutils aperture photometry of the noiseless point-source planes, epoch by epoch.
    images = Table.read(epoch_run / "images.ecsv")
    epochs = run_epochs(epoch_run)
    checked = 0
    for planes, truth in iter_batches(epoch_run, batch_size=1, plane="EPOCH_POINTS"):
        system_id = int(truth["system_id"][0])
        mine = images[images["system_id"] == system_id]
        peak = float(truth["transient_peak_mjd"][0])
        inside = [(peak + d > epochs["mjd"][0] + 20) and (peak + d < epochs["mjd"][-1] - 20) for d in mine["time_delay"]]
        if len(mine) < 2 or not all(inside):
            continue
        centre = (SIZE - 1) / 2.0
        positions = [(centre + x / SCALE, centre + y / SCALE) for x, y in zip(mine["x"], mine["y"])]
        separation = min(math.dist(a, b) for i, a in enumerate(positions) for b in positions[i + 1:])
        if separation < 10:  # apertures would share light
            continue
        aperture = CircularAperture(positions, r=4.0)
        flux = np.array([aperture_photometry(plane, aperture)["aperture_sum"].data for plane in planes[0]])
        t = np.asarray(epochs["mjd"])
        peaks = []
        for k in range(len(mine)):
            j = int(np.argmax(flux[:, k]))
            a, b, c = np.polyfit(t[j - 3:j + 4] - t[j], flux[j - 3:j + 4, k], 2)  # the maximum between epochs
            peaks.append(t[j] - b / (2 * a))
        first = int(np.argmin(mine["time_delay"]))
        for k in range(len(mine)):
            # delays to a tenth of the one-day epoch spacing
            assert peaks[k] - peaks[first] == pytest.approx(mine["time_delay"][k] - mine["time_delay"][first], abs=0.1)
            # fluxes at a common source time (each image's maximum): ratios of |magnification|;
            # the 4-pixel aperture holds the same share of every image's PSF
            ratio = flux[:, k].max() / flux[:, first].max()
            assert ratio == pytest.approx(abs(mine["magnification"][k] / mine["magnification"][first]), rel=0.01)
        checked += 1
    assert checked >= 1


def test_light_curve_truth_matches_the_noiseless_planes(epoch_run):
    curves = Table.read(epoch_run / "light_curves.ecsv")
    with fits.open(next((epoch_run / "shards").glob("*.fits"))) as hdul:
        points = hdul["EPOCH_POINTS"].data
        first = hdul[0].header["FIRSTID"]
    for k in range(points.shape[0]):
        mine = curves[curves["system_id"] == first + k]
        per_epoch = np.bincount(mine["epoch"], weights=mine["flux"], minlength=points.shape[1])
        bright = per_epoch > 100
        # flux lands on the cutout but for the PSF wings beyond it (Moffat beta = 3: < 0.5 %)
        assert np.allclose(points[k].sum(axis=(1, 2))[bright], per_epoch[bright], rtol=0.005)
        assert np.allclose(mine["magnitude"][mine["flux"] > 0],
                           mine["unlensed_magnitude"][mine["flux"] > 0] - 2.5 * np.log10(np.abs(mine["magnification"][mine["flux"] > 0])))


def test_static_scene_and_noise_at_every_epoch(epoch_run):
    # With the epochs' conditions equal to the band's, image - points - reference is noise with the
    # CCD equation's variance (Howell 2006); here the sky and seeing are fixed.
    recipe = parse_recipe(EPOCH_RECIPE)
    band = simlens.PopulationSampler(recipe).draw(0).band("r")
    with fits.open(next((epoch_run / "shards").glob("*.fits"))) as hdul:
        images, points, reference = (hdul[n].data.astype(float) for n in ("EPOCH_IMAGES", "EPOCH_POINTS", "REFERENCE"))
    residual = images[0] - points[0] - reference[0, 0][None]
    sigma = np.sqrt(unresampled_variance(band, reference[0, 0][None] + points[0]))
    pulls = residual / sigma
    assert abs(pulls.mean()) < 0.01 and pulls.std() == pytest.approx(1.0, abs=0.01)
    assert not np.array_equal(images[0, 0], images[0, 1])  # each epoch its own noise


def test_epoch_runs_are_byte_identical_across_workers_and_resume(epoch_run, tmp_path):
    recipe = parse_recipe(EPOCH_RECIPE)
    simlens.run(recipe, tmp_path / "two", workers=2)

    def digests(folder):
        return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted((folder / "shards").glob("*.fits"))}

    assert digests(tmp_path / "two") == digests(epoch_run)
    assert verify_run(tmp_path / "two").ok
    victim = sorted((tmp_path / "two" / "shards").glob("*.fits"))[1]
    victim.write_bytes(victim.read_bytes()[:1000])  # a shard cut short in a run that stopped:
    manifest = tmp_path / "two" / "manifest.json"  # resuming renders it again
    manifest.write_text(manifest.read_text().replace('"complete"', '"running"'))
    assert not verify_run(tmp_path / "two").ok
    simlens.run(recipe, tmp_path / "two")
    assert digests(tmp_path / "two") == digests(epoch_run)
    for name in ("light_curves.fits", "epochs.fits"):
        assert (tmp_path / "two" / name).read_bytes() == (epoch_run / name).read_bytes()


def test_loader_yields_time_series_batches(epoch_run):
    epochs = run_epochs(epoch_run)
    batches = list(iter_batches(epoch_run, batch_size=3, plane="EPOCH_IMAGES"))
    assert [b[0].shape for b in batches] == [(3, len(epochs), SIZE, SIZE), (1, len(epochs), SIZE, SIZE)]
    assert len(epochs) == 401 and set(epochs["band"]) == {"r"}


def test_transients_need_epochs_and_filters():
    from simlens.errors import RecipeError

    no_cadence = EPOCH_RECIPE.replace("[survey.cadence]\nstart = 61000.0\nlength = 400.0\n", "")
    with pytest.raises(RecipeError, match="source.supernova: needs the survey's epochs"):
        parse_recipe(no_cadence)
    with pytest.raises(RecipeError, match="filter: is missing"):
        parse_recipe(EPOCH_RECIPE.replace('filter = "LSST_r"\n', ""))
    with pytest.raises(RecipeError, match="gives 4001 visits"):
        parse_recipe(EPOCH_RECIPE.replace("length = 400.0", "length = 2000.0").replace("revisit = 1.0", "revisit = 0.5"))


def test_epoch_gallery_draws_the_lit_epochs(epoch_run):
    from simlens.epoch_gallery import epoch_strips, strip_epochs

    assert strip_epochs(np.array([0, 0, 1, 5, 10, 5, 1, 0.0]), 3).tolist() == [2, 4, 6]
    assert strip_epochs(np.zeros(5), 8).tolist() == [0, 1, 2, 3, 4]  # no point source: all epochs
    files = epoch_strips(epoch_run, Table.read(epoch_run / "truth.ecsv")[:2], name="strip")
    assert [f.rsplit("/", 1)[-1] for f in files] == ["strip_epochs_001.png"]
    from matplotlib.image import imread

    assert imread(files[0]).shape[0] > 500


def test_per_system_files_hold_every_epoch(tmp_path):
    text = (EPOCH_RECIPE.replace("count = 4", "count = 1").replace("length = 400.0", "length = 6.0")
            .replace("per_system_files = false", "per_system_files = true"))
    simlens.run(parse_recipe(text), tmp_path / "run")
    with fits.open(tmp_path / "run" / "cutouts" / "system_000000.fits") as hdul:
        names = [h.name for h in hdul]
        assert "R_REF" in names and [n for n in names if n.startswith("EPOCH_")] == [f"EPOCH_{k:04d}" for k in range(7)]
        assert [hdul[f"EPOCH_{k:04d}"].header["MJD-OBS"] for k in range(7)] == [61000.0 + k for k in range(7)]
        with fits.open(tmp_path / "run" / "shards" / "shard_00000.fits") as shard:
            np.testing.assert_array_equal(hdul["EPOCH_0003"].data, shard["EPOCH_IMAGES"].data[0, 3])

"""Field images: lenses at known places among background galaxies and stars (simlens.runs.fields).

Each check names its reference: astropy's WCS for the pixel <-> sky positions, photutils for
centroids and aperture photometry, GalSim for the black-body colours, the number-count relation
itself (LSST Science Book 2009, eq. 3.7) for the counts, the CCD equation for the noise and Moffat
(1969) for the encircled energy of the stars.
"""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
from astropy.io import fits
from astropy.stats import sigma_clipped_stats
from astropy.table import Table
from astropy.wcs import WCS
from scipy import stats

from simlens.populations.background import BackgroundModel
from simlens.cosmology import DistanceTable
from simlens.errors import RecipeError, SimlensError
from simlens.runs.pipeline import run
from simlens.recipe import parse_recipe
from simlens.runs.run_folder import verify_run

from .conftest import PHYSICAL_RECIPE


def field_recipe(field: str = "", count: int = 4, **replace) -> str:
    text = PHYSICAL_RECIPE.replace("count = 6", f"count = {count}")
    for old, new in replace.items():
        text = text.replace(old, new)
    return text + "\n[field]\nsize = 256\nlenses = 2\nlens_stamp_size = 64\n" + field


NO_BACKGROUND = "[field.galaxies]\ndensity = 0.0\n[field.stars]\ndensity = 0.0\n"


@pytest.fixture(scope="module")
def plain_field_run(tmp_path_factory):
    """Two 256x256 fields of two lenses each, nothing else in them (positions, noise, resume)."""
    out = tmp_path_factory.mktemp("fields") / "run"
    recipe = parse_recipe(field_recipe(NO_BACKGROUND), origin="field.toml")
    run(recipe, out)
    return recipe, out


def test_lens_positions_round_trip_through_the_wcs_and_centre_the_lens_light(plain_field_run):
    from photutils.centroids import centroid_2dg

    recipe, out = plain_field_run
    truth = Table.read(out / "truth.ecsv")
    assert len(truth) == 4 and set(truth["field_id"]) == {0, 1}
    for row in truth:
        with fits.open(out / row["file"]) as hdul:
            wcs = WCS(hdul["R"].header)
            image = hdul["R"].data - hdul["R_SOURCE"].data  # the lens galaxy (and noise)
        # astropy WCS: the truth sky position maps back to the truth pixel (0-based) within 0.05 pixel
        x, y = wcs.world_to_pixel_values(row["ra"], row["dec"])
        assert abs(x - row["x_pixel"]) < 0.05 and abs(y - row["y_pixel"]) < 0.05
        # photutils: the lens galaxy's light is centred on the truth position
        if row["lens_mag_r"] < 21.5:
            xi, yi = int(round(row["x_pixel"])), int(round(row["y_pixel"]))
            box = image[yi - 7:yi + 8, xi - 7:xi + 8]
            cx, cy = centroid_2dg(box)
            assert abs(xi - 7 + cx - row["x_pixel"]) < 0.25 and abs(yi - 7 + cy - row["y_pixel"]) < 0.25


def test_the_region_files_list_every_lens_at_its_sky_position(plain_field_run):
    recipe, out = plain_field_run
    truth = Table.read(out / "truth.ecsv")
    circle = re.compile(r'circle\(([-\d.]+),([-+\d.]+),([\d.]+)"\) # text=\{(\d+) ')
    seen = {}
    for k in (0, 1):
        text = (out / f"fields/field_{k:05d}.reg").read_text()
        assert text.splitlines()[0].startswith("# Region file format") and "\nfk5\n" in text
        for ra, dec, radius, system_id in circle.findall(text):
            seen[int(system_id)] = (float(ra), float(dec), float(radius))
    assert sorted(seen) == sorted(truth["system_id"])
    for row in truth:
        ra, dec, radius = seen[int(row["system_id"])]
        assert abs(ra - row["ra"]) < 1e-7 and abs(dec - row["dec"]) < 1e-7
        assert radius == pytest.approx(max(2 * row["einstein_radius"], 2.0), abs=0.006)


def test_one_set_of_conditions_per_field_and_the_ccd_noise(plain_field_run):
    recipe, out = plain_field_run
    truth = Table.read(out / "truth.ecsv")
    for k in (0, 1):
        rows = truth[truth["field_id"] == k]
        assert len(set(rows["psf_fwhm_r"])) == 1 and len(set(rows["sky_level_g"])) == 1
        with fits.open(out / rows["file"][0]) as hdul:
            header, image = hdul["G"].header, hdul["G"].data
            assert header["PSFFWHM"] == rows["psf_fwhm_g"][0]
        # the CCD equation (common practice): sigma = sqrt(sky * gain + read_noise^2) / gain in ADU
        expected = math.sqrt(header["SKYLEVEL"] * header["GAIN"] + header["RDNOISE"] ** 2) / header["GAIN"]
        away = np.ones(image.shape, dtype=bool)  # pixels outside the lens stamps: sky and noise only
        for row in rows:
            x0, y0 = int(row["x_pixel"] - 31.5), int(row["y_pixel"] - 31.5)
            away[y0:y0 + 64, x0:x0 + 64] = False
        _, median, std = sigma_clipped_stats(image[away], sigma=3.0)
        assert abs(median) < 0.02 * expected
        assert std == pytest.approx(expected, rel=0.02)


def test_the_source_planes_hold_each_lens_arcs_at_its_place(plain_field_run):
    from photutils.aperture import CircularAperture, aperture_photometry

    recipe, out = plain_field_run
    truth = Table.read(out / "truth.ecsv")
    for row in truth:
        with fits.open(out / row["file"]) as hdul:
            source = hdul["R_SOURCE"].data.astype(float)
        # photutils aperture at the truth position: magnification x unlensed flux (MAGZERO)
        aperture = CircularAperture((row["x_pixel"], row["y_pixel"]), r=31.0)
        measured = float(aperture_photometry(source, aperture)["aperture_sum"][0])
        unlensed = 10 ** (-0.4 * (row["source_mag_r"] - row["magzero_r"]))
        assert measured == pytest.approx(row["magnification"] * unlensed, rel=0.02)


def test_field_runs_verify_resume_and_repeat_byte_for_byte(plain_field_run, tmp_path):
    recipe, out = plain_field_run
    report = verify_run(out)
    assert report.ok and report.planned == 2
    again = tmp_path / "again"
    run(recipe, again)
    for name in ("fields/field_00000.fits", "fields/field_00001.reg", "truth.ecsv"):
        assert (again / name).read_bytes() == (out / name).read_bytes()
    (again / "fields/field_00001.fits").write_bytes(b"damaged")
    (again / "manifest.json").write_text((again / "manifest.json").read_text().replace('"complete"', '"running"'))
    run(recipe, again)  # re-renders the damaged field only
    assert (again / "fields/field_00001.fits").read_bytes() == (out / "fields/field_00001.fits").read_bytes()
    from simlens.runs.loader import shard_files

    with pytest.raises(SimlensError, match="field run"):
        shard_files(out)


def test_background_counts_follow_the_number_count_relation():
    recipe = parse_recipe(field_recipe("[field.galaxies]\nlens_clearance = 0.0\n"), origin="field.toml")
    model = BackgroundModel(recipe, DistanceTable(recipe.cosmology.build()))
    rng = np.random.default_rng(3)
    draws = [model.draw(rng) for _ in range(40)]
    galaxies = np.array([np.count_nonzero(d.kind == "galaxy") for d in draws])
    stars = np.array([np.count_nonzero(d.kind == "star") for d in draws])
    # N(<m) = 46 arcmin^-2 10^(0.31 (m - 25)) (LSST Science Book 2009, eq. 3.7) over the field's area
    area = (256 * 0.2 / 60.0) ** 2
    expected = 46.0 * (10 ** (0.31 * (25.5 - 25.0)) - 10 ** (0.31 * (18.0 - 25.0))) * area
    assert model.expected_galaxies() == pytest.approx(expected, rel=1e-12)
    # Poisson: the mean of 40 fields within 4 sigma
    assert abs(galaxies.mean() - expected) < 4 * math.sqrt(expected / 40)
    expected_stars = 0.4 * (10 ** (0.12 * (25.5 - 21.0)) - 10 ** (0.12 * (16.0 - 21.0))) * area
    assert abs(stars.mean() - expected_stars) < 4 * math.sqrt(expected_stars / 40)
    # magnitudes: Kolmogorov-Smirnov against the CDF of dN/dm ~ 10^(0.31 m) on [18, 25.5] (scipy)
    m = np.concatenate([d.magnitudes[model.counts_band][d.kind == "galaxy"] for d in draws])
    lo, hi = 10 ** (0.31 * 18.0), 10 ** (0.31 * 25.5)
    assert stats.kstest(m, lambda x: (10 ** (0.31 * np.asarray(x)) - lo) / (hi - lo)).pvalue > 1e-3
    # every object lies in the field
    x = np.concatenate([d.x for d in draws])
    assert x.min() >= -0.5 and x.max() <= 255.5


def test_no_background_galaxy_lies_on_a_lens():
    recipe = parse_recipe(field_recipe(), origin="field.toml")
    model = BackgroundModel(recipe, DistanceTable(recipe.cosmology.build()))
    lenses = [(60.0, 80.0, 2.0), (200.0, 150.0, 1.0)]
    objects = model.draw(np.random.default_rng(0), lenses)
    galaxy = objects.kind == "galaxy"
    for x, y, theta_e in lenses:
        d = np.hypot(objects.x[galaxy] - x, objects.y[galaxy] - y) * 0.2
        assert d.min() >= 2.5 * theta_e


def test_star_colours_are_black_bodies_through_the_filters():
    import galsim

    from simlens.populations.photometry import Template, ab_magnitude_offset, load_filter

    for temperature in (3500.0, 5800.0, 9000.0):
        ours = (ab_magnitude_offset(Template.black_body(temperature), load_filter("LSST_g"))
                - ab_magnitude_offset(Template.black_body(temperature), load_filter("LSST_r")))
        # GalSim's SED.calculateMagnitude of Planck's law (the reference)
        sed = galsim.SED(lambda w, t=temperature: w**-5 / np.expm1(1.438776877e7 / (w * t)), "nm", "flambda")
        g, r = (galsim.Bandpass(f"LSST_{b}.dat", "nm").withZeropoint("AB") for b in "gr")
        assert ours == pytest.approx(sed.calculateMagnitude(g) - sed.calculateMagnitude(r), abs=2e-3)


def test_isolated_stars_have_their_catalogue_fluxes(tmp_path):
    from photutils.aperture import CircularAperture, aperture_photometry

    stars = "[field.galaxies]\ndensity = 0.0\n[field.stars]\ndensity = 10.0\nmagnitude_range = [16.0, 21.0]\n"
    recipe = parse_recipe(field_recipe(stars, count=2).replace("size = 256", "size = 512"), origin="field.toml")
    run(recipe, tmp_path / "run")
    objects = Table.read(tmp_path / "run" / "field_objects.ecsv")
    truth = Table.read(tmp_path / "run" / "truth.ecsv")
    with fits.open(tmp_path / "run" / "fields/field_00000.fits") as hdul:
        image, header = hdul["G"].data.astype(float), hdul["G"].header
    fwhm, beta = header["PSFFWHM"] / header["PIXSCALE"], header["PSFBETA"]
    radius = 5.0 * fwhm
    # Moffat (1969): encircled energy 1 - (1 + (r/alpha)^2)^(1 - beta), FWHM = 2 alpha sqrt(2^(1/beta) - 1)
    alpha = fwhm / (2.0 * math.sqrt(2 ** (1 / beta) - 1))
    enclosed = 1.0 - (1.0 + (radius / alpha) ** 2) ** (1.0 - beta)
    xy = np.array([objects["x_pixel"], objects["y_pixel"]]).T
    lens_xy = np.array([truth["x_pixel"], truth["y_pixel"]]).T
    pulls = []
    for k, row in enumerate(objects):
        others = np.hypot(*(xy - xy[k]).T)
        inside = radius < row["x_pixel"] < 511 - radius and radius < row["y_pixel"] < 511 - radius
        if np.sort(others)[1] < 2.5 * radius or np.hypot(*(lens_xy - xy[k]).T).min() < 40 or not inside:
            continue
        measured = float(aperture_photometry(image, CircularAperture(xy[k], r=radius))["aperture_sum"][0])
        flux = 10 ** (-0.4 * (row["mag_g"] - header["MAGZERO"]))
        noise = math.sqrt(math.pi * radius**2 * (header["SKYLEVEL"] / header["GAIN"]
                                                 + (header["RDNOISE"] / header["GAIN"]) ** 2) + flux / header["GAIN"])
        pulls.append((measured - enclosed * flux) / noise)
    assert len(pulls) >= 5
    assert np.all(np.abs(pulls) < 5) and abs(np.mean(pulls)) < 4 / math.sqrt(len(pulls))


def test_impossible_field_layouts_are_clear_errors():
    with pytest.raises(RecipeError, match="field.lenses"):
        parse_recipe(field_recipe().replace("lenses = 2", "lenses = 17"))
    with pytest.raises(RecipeError, match="field.lens_stamp_size"):
        parse_recipe(field_recipe().replace("lens_stamp_size = 64", "lens_stamp_size = 16"))
    from .conftest import SMALL_RECIPE

    no_filters = SMALL_RECIPE + "\n[field]\nsize = 256\nlenses = 2\nlens_stamp_size = 64\n"
    with pytest.raises(RecipeError, match="background galaxies"):
        parse_recipe(no_filters)
    parse_recipe(no_filters + NO_BACKGROUND)  # without a background no filter curve is needed


def _detections(truth, offsets_arcsec, scores, extra=()):
    """Detections offset along +x from the given truth rows, plus extra (field, x, y, score) ones."""
    rows = [(int(truth["field_id"][k]), truth["x_pixel"][k] + dx / 0.2, truth["y_pixel"][k], s)
            for k, dx, s in zip(range(len(truth)), offsets_arcsec, scores) if dx is not None]
    rows += list(extra)
    return Table(rows=rows, names=("field_id", "x_pixel", "y_pixel", "score"))


def test_field_detections_are_scored_by_position(plain_field_run, tmp_path):
    from simlens.scoring.fields import score_fields

    recipe, out = plain_field_run
    truth = Table.read(out / "truth.fits")
    assert truth["is_lens"].all()
    # Worked example by hand: lens 0 found at 1" (and again, weaker), lens 1 missed, lens 2 found at
    # 2.5", lens 3's detection 4" away (beyond the 3" radius: a false positive), one stray detection.
    a, b, c, d = truth[0], truth[1], truth[2], truth[3]
    assert (a["field_id"], b["field_id"], c["field_id"], d["field_id"]) == (0, 0, 1, 1)
    detections = _detections(truth, [1.0, None, 2.5, 4.0], [0.9, None, 0.7, 0.95],
                             extra=[(0, a["x_pixel"], a["y_pixel"] + 3.0, 0.5), (1, 10.0, 10.0, 0.3)])
    detections.write(tmp_path / "found.csv", format="ascii.csv")
    area = 2 * (256 * 0.2 / 3600.0) ** 2
    report = score_fields(out, tmp_path / "found.csv", threshold=0.6, columns=["einstein_radius"], n_bins=2,
                          plots=False)
    assert report.completeness == 0.5 and report.false_positives == 1
    assert report.purity == pytest.approx(2 / 3) and report.area_deg2 == pytest.approx(area)
    assert report.false_positives_per_deg2 == pytest.approx(1 / area)
    # the loosest threshold with at most 1.5 false positives per field area: 0.5 (a duplicate of lens 0
    # is no false positive; the stray one at 0.3 would be the second)
    report = score_fields(out, tmp_path / "found.csv", false_positives_per_deg2=1.5 / area, plots=False, name="fp")
    assert report.threshold == 0.5 and report.false_positives == 1 and report.completeness == 0.5
    curve = Table.read(out / "scores/fp/completeness_vs_false_positives.ecsv")
    assert list(curve["false_positives"]) == [1, 1, 1, 1, 2] and list(curve["n_found"]) == [0, 1, 2, 2, 2]
    # the same detections in sky coordinates (through each field's WCS, astropy) match the same way
    sky = []
    for row in detections:
        with fits.open(out / f"fields/field_{row['field_id']:05d}.fits") as hdul:
            ra, dec = WCS(hdul["R"].header).pixel_to_world_values(row["x_pixel"], row["y_pixel"])
        sky.append((row["field_id"], float(ra), float(dec), row["score"]))
    Table(rows=sky, names=("field_id", "ra", "dec", "score")).write(tmp_path / "sky.ecsv")
    again = score_fields(out, tmp_path / "sky.ecsv", threshold=0.6, plots=False, name="sky")
    assert (again.completeness, again.false_positives) == (0.5, 1)


def test_score_cli_on_a_field_run(plain_field_run, tmp_path, capsys):
    from simlens.cli import main

    recipe, out = plain_field_run
    truth = Table.read(out / "truth.fits")
    _detections(truth, [0.0] * len(truth), [1.0] * len(truth)).write(tmp_path / "all.csv", format="ascii.csv")
    assert main(["score", str(out), str(tmp_path / "all.csv"), "--threshold", "0.5", "--name", "cli"]) == 0
    printed = capsys.readouterr().out
    assert "completeness 1.000" in printed and "0 false positives" in printed
    assert (out / "scores/cli/completeness_vs_false_positives.png").is_file()
    assert main(["score", str(out), str(tmp_path / "all.csv"), "--fpr", "0.1"]) == 2
    assert "field run" in capsys.readouterr().err


def _objects(rows):
    from simlens.populations.background import BackgroundObjects

    kind, x, y, mag, r_e, n, q, angle = (np.array(c) for c in zip(*rows))
    nan = np.full(len(rows), np.nan)
    return BackgroundObjects(kind=kind, x=x.astype(float), y=y.astype(float), magnitudes={"r": mag.astype(float)},
                             redshift=nan, half_light_radius=r_e.astype(float), sersic_index=n.astype(float),
                             q=q.astype(float), angle=angle.astype(float), temperature=nan)


@pytest.mark.parametrize("row", [("galaxy", 60.3, 67.8, 22.0, 0.3, 1.0, 0.6, 30.0),
                                 ("galaxy", 64.6, 61.1, 22.0, 0.6, 4.0, 0.8, -70.0),
                                 ("galaxy", 63.5, 63.5, 23.0, 0.15, 0.5, 0.3, 10.0),
                                 ("galaxy", 62.1, 65.9, 23.0, 1.2, 2.5, 0.5, 100.0),
                                 ("galaxy", 60.6, 64.1, 21.0, 2.0, 4.0, 0.7, 20.0),  # sampled per pixel
                                 ("galaxy", 66.2, 62.4, 21.0, 1.5, 1.0, 0.5, -20.0),  # beyond its core
                                 ("star", 65.25, 62.6, 22.0, np.nan, np.nan, np.nan, np.nan)])
def test_objects_drawn_together_equal_galsim_drawing_each_alone(row):
    import galsim

    from simlens.imaging.many_objects import draw_together
    from .test_observe import band

    conditions = band()  # Moffat beta = 3, FWHM 0.8", 0.2"/px
    ours = draw_together(_objects([row]), (conditions,), 128, 0.2)[0]
    # GalSim alone (the reference): the profile, sheared to q at its angle (area-preserving, so R_e is
    # circularised), convolved with the Moffat PSF and drawn with the pixel at the object's place
    flux = conditions.counts_from_magnitude(row[3])
    tight = galsim.GSParams(folding_threshold=1e-4, maximum_fft_size=16384)
    psf = galsim.Moffat(beta=3.0, fwhm=0.8, gsparams=tight)
    if row[0] == "star":
        profile = psf.withFlux(flux)
    else:
        galaxy = galsim.Sersic(n=row[5], half_light_radius=row[4], flux=flux, gsparams=tight)
        profile = galsim.Convolve(galaxy.shear(q=row[6], beta=row[7] * galsim.degrees), psf, gsparams=tight)
    reference = galsim.Image(128, 128, scale=0.2)
    profile.drawImage(reference, center=galsim.PositionD(row[1] + 1.0, row[2] + 1.0), add_to_image=True)
    expected = reference.array
    # issue 17's goal: each object's flux within 0.5 % of the per-object route; the shape within 1 %
    assert ours.sum() == pytest.approx(expected.sum(), rel=5e-3)
    assert np.abs(ours - expected).max() < 0.01 * expected.max()


def test_only_objects_whose_psf_wings_stay_below_the_noise_are_drawn_together():
    import galsim

    from simlens.imaging.many_objects import EDGE_NOISE_FRACTION, drawn_together
    from .test_observe import band

    conditions = band()  # Moffat beta = 3, FWHM 0.8": the kernel ends at 4"
    objects = _objects([("galaxy", 10.0, 10.0, 21.0, 0.3, 1.0, 0.6, 0.0),
                        ("star", 20.0, 20.0, 17.0, np.nan, np.nan, np.nan, np.nan)])
    # the Moffat profile (GalSim) at 4" per pixel, times each flux, against the noise sigma
    edge = galsim.Moffat(beta=3.0, fwhm=0.8).xValue(4.0, 0.0) * 0.2**2
    fluxes = [conditions.counts_from_magnitude(m) for m in (21.0, 17.0)]
    assert edge * fluxes[0] < EDGE_NOISE_FRACTION * conditions.background_sigma < edge * fluxes[1]
    assert list(drawn_together(objects, (conditions,))) == [True, False]


@pytest.mark.parametrize("n, r_e, q, stamp", [(4.0, 1.5, 0.7, 32), (4.0, 1.0, 0.8, 64), (1.0, 2.0, 0.5, 32)])
def test_a_bright_lens_galaxy_continues_beyond_its_stamp(n, r_e, q, stamp):
    import galsim

    from simlens.imaging.light import Sersic
    from simlens.runs.fields import lens_light_beyond_stamps
    from .test_observe import EMPTY, band, observe_profile

    conditions = band()
    flux = conditions.counts_from_magnitude(16.0)
    shape = Sersic(flux=flux, half_light_radius=r_e, sersic_index=n, q=q, angle=30.0)
    size, x0, y0 = 256, 100, 100
    field = lens_light_beyond_stamps([(x0, y0, shape, [flux])], (conditions,), size, stamp, 0.2)[0]
    inside = np.zeros((size, size), bool)
    inside[y0:y0 + stamp, x0:x0 + stamp] = True
    assert not field[inside].any()
    field[inside] += observe_profile(conditions, shape, EMPTY, size=stamp).lens_light.ravel()  # the stamp, as rendered
    # GalSim (the reference): the whole galaxy convolved with the Moffat PSF, centred on the stamp centre
    tight = galsim.GSParams(folding_threshold=1e-5, maximum_fft_size=32768)
    galaxy = galsim.Sersic(n=n, half_light_radius=r_e, flux=flux, gsparams=tight).shear(q=q, beta=30 * galsim.degrees)
    reference = galsim.Image(size, size, scale=0.2)
    centre = x0 + 0.5 * (stamp - 1) + 1.0  # GalSim pixels are 1-based
    galsim.Convolve(galaxy, galsim.Moffat(beta=3.0, fwhm=0.8, gsparams=tight), gsparams=tight).drawImage(
        reference, center=galsim.PositionD(centre, centre), add_to_image=True)
    sigma = conditions.background_sigma
    outside = np.abs(field - reference.array)[~inside]
    assert outside.max() < 0.2 * sigma  # no edge at the stamp's border, the outskirts right
    assert reference.array[~inside].max() > 5 * sigma  # (without them the border would be a step of this)

"""Whole runs with physical populations: lens and sky modes, selection cuts and their attrition,
point sources (lensed quasars) and the per-image truth."""

from __future__ import annotations

import json
import math

import galsim
import numpy as np
import pytest
from astropy.table import Table

import simlens
from simlens.imaging.scene import build_scene
from simlens.cli import main
from simlens.errors import SimlensError
from simlens.populations.photometry import ab_magnitude_offset, Template, load_filter
from simlens.truth.sampler import PopulationSampler
from simlens.recipe import parse_recipe
from simlens.imaging.render import render_system

from .conftest import PHYSICAL_RECIPE


def with_selection(text: str) -> str:
    return PHYSICAL_RECIPE.replace("[output]", text.strip() + "\n\n[output]", 1)


@pytest.fixture(scope="module")
def lens_mode_run(tmp_path_factory):
    recipe = parse_recipe(with_selection("""
        [selection]
        einstein_radius = [0.6, 2.5]
        min_arc_snr = 8.0
        """), origin="physical.toml")
    out = tmp_path_factory.mktemp("physical") / "run"
    summary = simlens.run(recipe, out)
    return recipe, out, summary


def test_lens_mode_run_is_multiply_imaged_and_passes_every_cut(lens_mode_run):
    recipe, out, summary = lens_mode_run
    truth = Table.read(out / "truth.fits")
    assert len(truth) == recipe.count
    assert truth["multiply_imaged"].all() and (truth["placement"] == "lens").all()
    assert ((truth["einstein_radius"] >= 0.6) & (truth["einstein_radius"] <= 2.5)).all()
    assert (truth["arc_snr_r"] >= 8.0).all()
    assert truth["passes_einstein_radius"].all() and truth["passes_arc_snr"].all() and truth["selected"].all()
    assert np.all(np.hypot(truth["source_x"], truth["source_y"]) <= truth["region_radius"])
    np.testing.assert_allclose(truth["region_area"], np.pi * np.asarray(truth["region_radius"]) ** 2)
    # the images of the source centre: a second catalogue keyed by system_id
    images = Table.read(out / "images.ecsv")
    counts = {i: int((images["system_id"] == i).sum()) for i in truth["system_id"]}
    assert [counts[i] for i in truth["system_id"]] == list(truth["n_images"])
    for i in truth["system_id"]:
        mine = images[images["system_id"] == i]
        assert sorted(mine["arrival"]) == list(range(len(mine)))
        assert mine["time_delay"][mine["arrival"] == 0][0] == 0.0 and (mine["time_delay"] >= 0).all()
        assert set(np.sign(mine["magnification"])) <= {-1.0, 1.0}
        assert list(mine["parity"]) == list(np.sign(mine["magnification"]).astype(int))


def test_attrition_is_reported_in_the_manifest_and_summary(lens_mode_run):
    recipe, out, summary = lens_mode_run
    manifest = json.loads((out / "manifest.json").read_text())
    selection = manifest["selection"]
    assert selection["accepted"] == recipe.count
    assert selection["candidates"] == recipe.count + sum(selection["rejected_by"].values())
    # in lens mode with a physical population some candidates fail the cross-section weighting
    assert selection["rejected_by"].get("cross_section", 0) > 0
    assert "accepted of" in summary.describe() and "acceptance" in summary.describe()


def test_impossible_cut_gives_a_clear_error(tmp_path):
    recipe = parse_recipe(with_selection("""
        [selection]
        einstein_radius = [40.0, 50.0]
        max_candidates = 50
        """), origin="impossible.toml")
    with pytest.raises(SimlensError) as info:
        simlens.run(recipe, tmp_path / "run")
    message = str(info.value)
    assert "none of 50 candidates for system 0" in message and "einstein_radius" in message
    assert "loosen the [selection] cuts" in message


def test_impossible_cut_through_the_cli(tmp_path, capsys):
    path = tmp_path / "impossible.toml"
    path.write_text(with_selection("[selection]\neinstein_radius = [40.0, 50.0]\nmax_candidates = 30\n"))
    assert main(["make", str(path), "--out", str(tmp_path / "run"), "--quiet"]) == 1  # a run that started and failed
    err = capsys.readouterr().err
    assert "none of 30 candidates" in err and "Traceback" not in err


def test_flag_mode_keeps_every_candidate_and_flags_the_cuts(tmp_path):
    recipe = parse_recipe(with_selection("""
        [selection]
        min_arc_snr = 60.0
        enforce = false
        """).replace('mode = "lens"', 'mode = "sky"'), origin="flags.toml")
    summary = simlens.run(recipe, tmp_path / "run")
    truth = Table.read(tmp_path / "run" / "truth.fits")
    assert (truth["candidate"] == 0).all()
    np.testing.assert_array_equal(truth["passes_arc_snr"], truth["arc_snr_r"] >= 60.0)
    np.testing.assert_array_equal(truth["selected"], truth["passes_arc_snr"])
    assert summary.selection["candidates"] == recipe.count


def test_sky_mode_places_sources_at_their_density():
    # One source per 1/n of source-plane area (n from the counts: LSST Science Book, from memory):
    # the region radius is 1 / sqrt(pi n).
    recipe = parse_recipe(PHYSICAL_RECIPE.replace('mode = "lens"', 'mode = "sky"'))
    sampler = PopulationSampler(recipe)
    n = sampler.source_model.sky_density / 3600.0  # per arcsec^2
    systems = [sampler.draw(i) for i in range(600)]
    radius = 1.0 / math.sqrt(math.pi * n)
    assert all(s.region_radius == pytest.approx(radius) or s.region_widened for s in systems)
    # Strong lenses at their real rate: a source is multiply imaged with probability (area inside
    # the cut or caustic) / (region area); the count is Poisson about the sum of those.
    expected = sum(max(s.inner_caustic_area, s.tangential_caustic_area) / s.region_area for s in systems)
    observed = sum(s.multiply_imaged for s in systems)
    assert abs(observed - expected) < 4 * math.sqrt(expected) + 1
    # some sources lie in front of their lens
    front = [s for s in systems if s.z_source <= s.z_lens]
    assert front and all(s.einstein_radius == 0.0 and not s.multiply_imaged for s in front)
    for s in front[:3]:
        rendered = render_system(s, recipe.survey, recipe.reference_band)
        inside = max(abs(s.source_x), abs(s.source_y)) < 0.5 * 32 * 0.2
        assert len(rendered.images) == int(inside) and np.isfinite(rendered.bands[0].image).all()


QUASAR = PHYSICAL_RECIPE.replace("[source.position]", """[source.quasar]
magnitude = 20.5
host = false

[source.position]""")


def test_lensed_quasar_images_carry_the_magnified_point_flux():
    # A point source's images are deposited with flux |mu_i| F (SEF eq. 5.23: point-source
    # magnification); the PSF spreads them, so the noiseless source plane holds sum |mu_i| F minus
    # what the PSF carries outside the cutout.
    recipe = parse_recipe(QUASAR)
    system = PopulationSampler(recipe).draw(2)
    rendered = render_system(system, recipe.survey, recipe.reference_band)
    assert len(rendered.images) >= 2
    expected = build_scene(system).point_flux["r"] * np.abs(rendered.images.magnification).sum()
    observed = rendered.band("r").lensed_source.sum()
    assert observed == pytest.approx(expected, rel=0.03)
    assert observed <= expected * 1.001
    assert math.isnan(rendered.magnification)  # no host galaxy: no extended-source magnification


def test_quasar_colours_follow_the_power_law():
    # Reference library: galsim.SED of f_nu ~ nu^-0.44 (Vanden Berk et al. 2001 slope, from memory)
    # redshifted and integrated through the same filters with AB zero points.
    recipe = parse_recipe(QUASAR)
    system = PopulationSampler(recipe).draw(0)
    sed = galsim.SED(lambda w: w ** (0.44 - 2.0), wave_type="nm", flux_type="flambda").atRedshift(system.z_source)
    g, r = (galsim.Bandpass(f"LSST_{b}.dat", wave_type="nm").withZeropoint("AB") for b in "gr")
    reference = sed.calculateMagnitude(g) - sed.calculateMagnitude(r)
    assert system.quasar_magnitudes["g"] - system.quasar_magnitudes["r"] == pytest.approx(reference, abs=0.005)


def test_source_colours_come_from_the_template_at_the_source_redshift():
    # The source disk's g - r equals the template's colour at its redshift (GalSim check of the
    # photometry itself is in test_populations.py).
    recipe = parse_recipe(PHYSICAL_RECIPE)
    system = PopulationSampler(recipe).draw(1)
    t = Template.named("spiral")
    colour = ab_magnitude_offset(t, load_filter("LSST_g"), system.z_source) - \
        ab_magnitude_offset(t, load_filter("LSST_r"), system.z_source)
    disk = system.source_disk_magnitudes
    assert disk["g"] - disk["r"] == pytest.approx(colour, abs=1e-3)


def test_resolvable_cut_counts_its_rejections():
    # theta_E^2 > r_source^2 + (FWHM/2)^2 (common practice of survey forecasts, from memory)
    recipe = parse_recipe(with_selection("[selection]\nresolvable = true\n"))
    sampler = PopulationSampler(recipe)
    for i in range(20):
        s = sampler.draw(i)
        fwhm = s.band("r").psf_fwhm
        assert s.einstein_radius**2 > s.source_half_light_radius**2 + (0.5 * fwhm) ** 2
        assert s.selection_flags["resolvable"]
    rejected = sum(sampler.draw(i).rejections.get("resolvable", 0) for i in range(20))
    assert rejected > 0

"""Labelled non-lenses: classes, proportions, labels, and the look-alike light profiles."""

from __future__ import annotations

import math

import numpy as np
import pytest
from astropy.table import Table
from scipy import integrate, stats

import simlens
from simlens.imaging.light import GaussianRing, SpiralArms
from simlens.populations.negatives import NEGATIVE_CLASSES
from simlens.truth.sampler import PopulationSampler
from simlens.recipe import parse_recipe
from simlens.scoring.cutouts import score_run

from .conftest import PHYSICAL_RECIPE


def with_negatives(text: str, count: int) -> str:
    return PHYSICAL_RECIPE.replace("count = 6", f"count = {count}").replace("[output]", text.strip() + "\n\n[output]")


def test_every_negative_class_is_labelled_and_singly_imaged(tmp_path):
    # The label's definition (simlens.scoring.cutouts.lens_labels): multiple imaging plus the cuts; for a
    # negative nothing is deflected, so the image finder (triangle mapping, SEF sect. 11.2) sees at
    # most one image of the source centre.
    recipe = parse_recipe(with_negatives("[negatives]\nfraction = 1.0\n", 24).replace("shard_size = 3", "shard_size = 8"))
    simlens.run(recipe, tmp_path / "run")
    truth = Table.read(tmp_path / "run" / "truth.fits")
    assert set(truth["system_class"]) == set(NEGATIVE_CLASSES)
    assert not truth["is_lens"].any() and not truth["multiply_imaged"].any()
    assert (truth["n_images"] <= 1).all()
    source_mag = np.ma.filled(truth["source_mag_r"], np.nan)  # FITS reads NaN back as masked
    for row, mag in zip(truth, source_mag):
        if row["system_class"] == "unlensed_source":
            assert np.isfinite(mag) and row["n_lookalike_features"] == 0
        else:
            assert np.isnan(mag) and row["n_lookalike_features"] >= 1
    images = Table.read(tmp_path / "run" / "images.ecsv")
    assert len(images) == int(truth["n_images"].sum())


def test_class_proportions_follow_the_recipe_weights():
    # chi-square test (scipy.stats.chisquare) of the drawn classes against the weights, and the
    # negative fraction within its binomial error.
    recipe = parse_recipe(with_negatives("""
        [negatives]
        fraction = 0.4
        unlensed_source = 1.0
        ring_galaxy = 2.0
        spiral_arms = 0.0
        """, 10))
    sampler = PopulationSampler(recipe)
    classes = [sampler.draw(i).system_class for i in range(1500)]
    negatives = [c for c in classes if c in NEGATIVE_CLASSES]
    assert abs(len(negatives) / len(classes) - 0.4) < 4 * math.sqrt(0.24 / len(classes))
    assert "spiral_arms" not in negatives
    names = ["unlensed_source", "ring_galaxy", "tidal_features", "edge_on_disk", "blue_companions"]
    weights = np.array([1.0, 2.0, 1.0, 1.0, 1.0])
    observed = np.array([negatives.count(n) for n in names])
    assert stats.chisquare(observed, weights / weights.sum() * observed.sum()).pvalue > 0.001
    assert all(c == "lens" for c in classes if c not in NEGATIVE_CLASSES)  # lens mode: the rest are lenses


def test_scoring_reports_false_positives_by_class(tmp_path):
    recipe = parse_recipe(with_negatives("[negatives]\nfraction = 0.5\n", 16).replace("shard_size = 3", "shard_size = 8"))
    simlens.run(recipe, tmp_path / "run")
    truth = Table.read(tmp_path / "run" / "truth.fits")
    Table({"system_id": truth["system_id"], "score": truth["arc_snr_r"]}).write(tmp_path / "s.csv", format="ascii.csv")
    report = score_run(tmp_path / "run", tmp_path / "s.csv", threshold=10.0, plots=False)
    assert set(report.by_class["negative_class"]) == set(truth["system_class"][~truth["is_lens"]])
    assert report.n_lenses == int(truth["is_lens"].sum())


def test_ring_normalisation_against_quadrature():
    # scipy.integrate.quad of 2 pi r I(r) for a circular ring, and a pixel sum for an elliptical arc
    ring = GaussianRing(flux=2.5, radius=0.8, width=0.3)
    total = integrate.quad(lambda r: 2 * math.pi * r * float(ring.surface_brightness(r, 0.0)), 0, 10)[0]
    assert total == pytest.approx(2.5, rel=1e-9)
    x = np.linspace(-8, 8, 1601)
    gx, gy = np.meshgrid(x, x)
    for profile in (GaussianRing(flux=1.0, radius=2.0, width=0.2, q=0.6, angle=25, arc_angle=80, arc_width=35),
                    SpiralArms(flux=1.0, scale_radius=0.8, pitch=18, arms=3, q=0.75, angle=40)):
        assert (profile.surface_brightness(gx, gy) * (x[1] - x[0]) ** 2).sum() == pytest.approx(1.0, rel=1e-3)

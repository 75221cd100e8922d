"""Deflector light like real early types: two Sersic components with a colour gradient, the
light's shape offset from the mass, checked against GalSim and the relations' definitions."""

from __future__ import annotations

import math

import galsim
import numpy as np
import pytest

from simlens.imaging.scene import build_scene, lens_galaxy_components
from simlens.recipe import parse_recipe
from simlens.truth.sampler import PopulationSampler

from .conftest import PHYSICAL_RECIPE

ENVELOPE = """
[lens.light.envelope]
fraction = { uniform = [0.3, 0.7] }
half_light_radius_ratio = { uniform = [2.0, 6.0] }
sersic_index = 1.0
color_offsets = { g = -0.2 }
"""


def envelope_recipe(extra: str = ""):
    text = PHYSICAL_RECIPE.replace("[lens.light.scaling]", "[lens.light]\nsersic_index = 4.0\n\n[lens.light.scaling]")
    return parse_recipe(text + ENVELOPE + extra)


def test_core_and_envelope_keep_the_galaxys_half_light_radius():
    # Reference library: galsim.Image.calculateHLR of the sum of the two GalSim Sersics (drawn
    # round, pixels of R_e / 70, so the pixel's own width moves it by < 0.1 %) equals the drawn
    # R_e of the galaxy, within 0.5 %.
    sampler = PopulationSampler(envelope_recipe().with_overrides(count=8))
    for system in sampler.draw_many(range(4)):
        envelope = system.lens_envelope
        flux = {part: 10 ** (-0.4 * mags["r"]) for part, mags in (("core", envelope.core_magnitudes),
                                                                  ("envelope", envelope.magnitudes))}
        total = flux["core"] + flux["envelope"]
        galaxy = (galsim.Sersic(n=system.lens_sersic_index, half_light_radius=envelope.core_half_light_radius,
                                flux=flux["core"] / total)
                  + galsim.Sersic(n=envelope.sersic_index, half_light_radius=envelope.half_light_radius,
                                  flux=flux["envelope"] / total))
        image = galaxy.drawImage(nx=2001, ny=2001, scale=system.lens_half_light_radius / 70)
        measured = image.calculateHLR(center=image.true_center, flux=1.0)
        assert measured == pytest.approx(system.lens_half_light_radius, rel=5e-3)
        assert envelope.half_light_radius > system.lens_half_light_radius > envelope.core_half_light_radius


def test_the_envelope_is_bluer_and_the_totals_are_the_template_colours():
    # The split keeps the galaxy's total magnitudes (the early-type template's colours through the
    # LSST filters, from the same sampler without an envelope) and gives the envelope a g - r bluer
    # by the recipe's 0.2 mag: a colour gradient, redder at the centre (common practice for
    # early types: they are redder inside, e.g. Tortora et al. 2010, from memory).
    recipe = envelope_recipe().with_overrides(count=8)
    plain = PopulationSampler(parse_recipe(PHYSICAL_RECIPE.replace(
        "[lens.light.scaling]", "[lens.light]\nsersic_index = 4.0\n\n[lens.light.scaling]")).with_overrides(count=8))
    for system, reference in zip(PopulationSampler(recipe).draw_many(range(6)), plain.draw_many(range(6))):
        envelope = system.lens_envelope
        assert system.lens_magnitudes == reference.lens_magnitudes  # the envelope adds no draws before it
        for band in "gr":
            total = 10 ** (-0.4 * envelope.core_magnitudes[band]) + 10 ** (-0.4 * envelope.magnitudes[band])
            assert -2.5 * math.log10(total) == pytest.approx(system.lens_magnitudes[band], abs=1e-9)
        core_colour = envelope.core_magnitudes["g"] - envelope.core_magnitudes["r"]
        envelope_colour = envelope.magnitudes["g"] - envelope.magnitudes["r"]
        assert envelope_colour - core_colour == pytest.approx(-0.2, abs=1e-9)
        g, r = (build_scene(system).lens_light[b] for b in "gr")
        assert len(lens_galaxy_components(system, "g")) == 2
        x = np.array([0.05, 3.0]) * system.lens_half_light_radius
        colour = -2.5 * np.log10(g.surface_brightness(x, 0 * x) / r.surface_brightness(x, 0 * x))
        assert colour[0] - colour[1] > 0.05  # the centre is redder than the outskirts


def test_an_envelope_with_stars_following_one_sersic_is_refused():
    from simlens.errors import RecipeError

    with pytest.raises(RecipeError, match="stars_and_halo"):
        parse_recipe(PHYSICAL_RECIPE.replace("[lens.mass]\n", '[lens.mass]\nmodel = "stars_and_halo"\n'
                                             'halo_mass = 1e13\n') + ENVELOPE)


def test_the_default_envelope_with_a_g_offset_of_0_2_gives_the_published_gradient():
    # Early-type colour gradients: d(g - r) / d log10 R of about -0.1 mag per dex within R_e
    # (Tortora et al. 2010, MNRAS 407, 144; La Barbera et al. 2010; from memory, scatter about
    # 0.05).  The envelope's defaults (half the light, 4 times the core's R_e, n = 1) with g bluer
    # by 0.2 mag give it, measured on the scene's surface brightness between 0.1 and 1 R_e.
    text = PHYSICAL_RECIPE.replace("[lens.light.scaling]", "[lens.light]\nsersic_index = 4.0\n\n[lens.light.scaling]")
    recipe = parse_recipe(text + "\n[lens.light.envelope]\ncolor_offsets = { g = -0.2 }\n")
    for system in PopulationSampler(recipe).draw_many(range(3)):
        g, r = (build_scene(system).lens_light[b] for b in "gr")
        a = math.radians(system.lens_angle)
        radius = np.array([0.1, 1.0]) * system.lens_half_light_radius / math.sqrt(system.lens_q)  # major axis
        x, y = radius * math.cos(a), radius * math.sin(a)
        colour = -2.5 * np.log10(g.surface_brightness(x, y) / r.surface_brightness(x, y))
        assert colour[1] - colour[0] == pytest.approx(-0.1, abs=0.05)

"""Labelled non-lenses worth training against: the same galaxies without lensing, and look-alikes.

A recipe's ``[negatives]`` table turns a fraction of the systems into non-lenses of chosen classes
(relative weights).  A negative keeps the lens galaxy it was drawn with -- the same population,
selection and placement as the lenses -- but nothing is deflected (``System.lensing = False``), so
the image finder sees at most one image of the source centre.  Its class says what was added:

* ``unlensed_source``: the background source, unlensed, behind or beside the galaxy (0.3 to 2.5
  Einstein radii from its centre);
* ``ring_galaxy``: a blue star-forming ring (a collisional ring galaxy) at 0.6 to 2.5 Einstein
  radii around the galaxy;
* ``spiral_arms``: blue logarithmic spiral arms on a faint disk around the galaxy;
* ``tidal_features``: red shells or streams (arc segments of the host's colour at 1.5 to 4
  half-light radii), with a red merging companion in half the cases;
* ``edge_on_disk``: a blue edge-on disk galaxy (axis ratio 0.08 to 0.2) next to the galaxy;
* ``blue_companions``: one to three compact blue galaxies at 0.6 to 2.5 Einstein radii (chance
  alignments).

Colours: "blue" features take the source galaxy's colours, "red" ones the lens light's (templates
where the recipe uses them).  The look-alikes have no background source; their magnitudes are set
relative to the lens light or the source, about as bright as magnified arcs (ranges chosen by
eye to resemble arcs, not from a published census).
The truth's ``system_class`` names the class (lenses: ``lens``; sky-mode non-lenses:
``missed_caustics`` or ``source_in_front``) and ``is_lens`` follows :func:`simlens.scoring.lens_labels`.
"""

from __future__ import annotations

import math

import numpy as np

from ..imaging.light import GaussianRing, Sersic, SpiralArms

__all__ = ["NEGATIVE_CLASSES", "lookalike_light"]

NEGATIVE_CLASSES = ("unlensed_source", "ring_galaxy", "spiral_arms", "tidal_features", "edge_on_disk",
                    "blue_companions")


def _offset(rng, r_lo: float, r_hi: float) -> tuple[float, float]:
    r = math.sqrt(r_lo**2 + rng.uniform() * (r_hi**2 - r_lo**2))
    phi = rng.uniform(0.0, 2.0 * math.pi)
    return r * math.cos(phi), r * math.sin(phi)


def lookalike_light(kind: str, rng, scale: float, lens_r_e: float, lens_q: float, lens_angle: float,
                    lens_mags: dict, source_mags: dict) -> tuple:
    """``((unit-flux profile, {band: AB magnitude}), ...)`` added in the lens plane for ``kind``;
    ``scale`` is the galaxy's Einstein radius (arcsec), or its half-light radius if that is zero."""
    ref_lens = min(lens_mags.values())  # brightest band: only offsets matter below
    blue = {b: m - min(source_mags.values()) for b, m in source_mags.items()}  # source colours
    red = {b: m - ref_lens for b, m in lens_mags.items()}  # lens colours

    def mags(base: float, colours: dict) -> dict:
        return {b: base + c for b, c in colours.items()}

    lens_base = ref_lens
    out = []
    if kind == "ring_galaxy":
        radius = scale * rng.uniform(0.6, 2.5)
        ring = GaussianRing(flux=1.0, radius=radius, width=radius * rng.uniform(0.08, 0.25),
                            q=float(np.clip(lens_q + rng.normal(0, 0.1), 0.4, 1.0)), angle=lens_angle)
        out.append((ring, mags(min(source_mags.values()) - rng.uniform(1.0, 2.5), blue)))
    elif kind == "spiral_arms":
        arms = SpiralArms(flux=1.0, scale_radius=max(scale, lens_r_e) * rng.uniform(0.5, 1.2),
                          pitch=rng.uniform(10.0, 30.0), arms=int(rng.choice([2, 2, 3])), q=lens_q,
                          angle=lens_angle, phase=rng.uniform(0, 360))
        out.append((arms, mags(lens_base + rng.uniform(0.3, 1.5), blue)))
    elif kind == "tidal_features":
        for _ in range(int(rng.integers(1, 4))):
            radius = lens_r_e * rng.uniform(1.5, 4.0)
            shell = GaussianRing(flux=1.0, radius=radius, width=radius * rng.uniform(0.05, 0.15), q=lens_q,
                                 angle=lens_angle, arc_angle=rng.uniform(0, 360), arc_width=rng.uniform(20, 70))
            out.append((shell, mags(lens_base + rng.uniform(1.5, 3.0), red)))
        if rng.uniform() < 0.5:  # a merging companion
            x, y = _offset(rng, 1.0 * lens_r_e, 3.0 * lens_r_e)
            companion = Sersic(flux=1.0, half_light_radius=lens_r_e * rng.uniform(0.3, 0.8), sersic_index=4.0,
                               q=rng.uniform(0.6, 1.0), angle=rng.uniform(0, 180), center=(x, y))
            out.append((companion, mags(lens_base + rng.uniform(0.5, 2.0), red)))
    elif kind == "edge_on_disk":
        x, y = _offset(rng, 0.8 * scale, 2.5 * scale)
        disk = Sersic(flux=1.0, half_light_radius=rng.uniform(0.4, 1.2), sersic_index=1.0,
                      q=rng.uniform(0.08, 0.2), angle=math.degrees(math.atan2(y, x)) + 90 + rng.normal(0, 20),
                      center=(x, y))
        out.append((disk, mags(min(source_mags.values()) - rng.uniform(0.0, 1.5), blue)))
    elif kind == "blue_companions":
        for _ in range(int(rng.integers(1, 4))):
            x, y = _offset(rng, 0.6 * scale, 2.5 * scale)
            knot = Sersic(flux=1.0, half_light_radius=rng.uniform(0.08, 0.3), sersic_index=1.0,
                          q=rng.uniform(0.5, 1.0), angle=rng.uniform(0, 180), center=(x, y))
            out.append((knot, mags(min(source_mags.values()) + rng.uniform(-1.0, 0.5), blue)))
    elif kind != "unlensed_source":
        raise ValueError(f"unknown negative class {kind!r}; known: {', '.join(NEGATIVE_CLASSES)}")
    return tuple(out)

"""Every random stream of simlens, and the key space each lives in.

A run has one integer seed.  System ``i`` (candidate ``k``) draws everything from streams derived
from ``numpy.random.SeedSequence(seed, spawn_key=(i,))`` (``(i, k)`` for ``k > 0``), one Philox key
per named stream, so a system can be re-drawn alone, identically, whatever the order or the number
of processes that draw the others.  Other streams use spawn keys no system can have: fields take
three words ending in FIELD_TAG, an injection run one word pair ending in INJECTION_TAG after a
marker no system id reaches.  Add a new kind of stream here, with its own tag.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

__all__ = ["SYSTEM_STREAMS", "FIELD_STREAMS", "INJECTION_STREAMS", "CADENCE_STREAMS", "system_streams", "field_streams", "injection_streams", "cadence_streams", "grid_cell"]

# Named random streams of a system; append new names at the end to keep old draws unchanged.
# "physics" feeds, in code order, the deflector and source geometry, subhalos, placement, lens light,
# source size and clumps; "observation" the sky position and the noise seeds; "seeing" the bands'
# scatter about one drawn seeing (simlens.truth.psf); "neighbours" the unlensed objects of a crowded
# cutout ([neighbours]); "stamps" the choice of a source's image stamp ([source.stamps]); "transient" a
# supernova's peak time, a quasar's black-hole mass and walk ([source.supernova], variability).
SYSTEM_STREAMS = ("parameters", "physics", "observation", "negatives", "seeing", "neighbours", "stamps", "transient")
# Of a field image: lens places, unlensed background objects, noise (append new names at the end).
FIELD_STREAMS = ("layout", "background", "noise")
# Of an injection run: the added electrons' noise, the redshifts of automatically selected lenses.
INJECTION_STREAMS = ("noise", "lens_redshifts")
# Of a survey's epochs ([survey.cadence]): visit times and weather, each visit's conditions.
CADENCE_STREAMS = ("visits", "conditions")


class _Streams(dict):
    """The named generators of one system, each made on first use (most draws use a few): a Philox
    counter-based generator keyed by 128 bits of the system's SeedSequence state per name."""

    def __init__(self, names: Sequence[str], state: np.ndarray):
        super().__init__()
        self._keys = {name: state[2 * i:2 * i + 2] for i, name in enumerate(names)}

    def __missing__(self, name: str) -> np.random.Generator:
        rng = np.random.Generator(np.random.Philox(key=self._keys[name]))
        self[name] = rng
        return rng


def system_streams(seed: int, system_id: int, names: Sequence[str], candidate: int = 0) -> dict[str, np.random.Generator]:
    """Independent generators for one system, one per named purpose.

    The streams depend only on ``(seed, system_id, candidate)`` and the position of each name in
    ``names``, never on which process draws the system or in which order.  ``candidate`` numbers the
    redraws of a system that selection cuts rejected (0: the first draw).
    """
    key = (int(system_id),) if candidate == 0 else (int(system_id), int(candidate))
    root = np.random.SeedSequence(entropy=int(seed), spawn_key=key)
    return _Streams(names, root.generate_state(2 * len(names), np.uint64))


# Spawn-key tags: system streams use keys of one or two words, so a key of three words never meets
# one of them.
FIELD_TAG = 0x6669656C64  # "field"
INJECTION_TAG = 0x696E6A656374  # "inject"
CADENCE_TAG = 0x636164656E6365  # "cadence"


def field_streams(seed: int, field_index: int) -> dict[str, np.random.Generator]:
    """Independent generators for one field image (FIELD_STREAMS), apart from every system's
    streams; they depend only on ``(seed, field_index)``."""
    root = np.random.SeedSequence(entropy=int(seed), spawn_key=(int(field_index), 0, FIELD_TAG))
    return _Streams(FIELD_STREAMS, root.generate_state(2 * len(FIELD_STREAMS), np.uint64))


def injection_streams(seed: int) -> dict[str, np.random.Generator]:
    """Generators for one injection run (INJECTION_STREAMS), apart from every system's and field's
    streams; the injected systems themselves draw from their own system streams."""
    root = np.random.SeedSequence(entropy=int(seed), spawn_key=(0, 0, INJECTION_TAG))
    return _Streams(INJECTION_STREAMS, root.generate_state(2 * len(INJECTION_STREAMS), np.uint64))


def cadence_streams(seed: int) -> dict[str, np.random.Generator]:
    """Generators for a survey's epochs (CADENCE_STREAMS), shared by all systems of a run and apart
    from every system's, field's and injection's streams; they depend only on ``seed``."""
    root = np.random.SeedSequence(entropy=int(seed), spawn_key=(0, 0, CADENCE_TAG))
    return _Streams(CADENCE_STREAMS, root.generate_state(2 * len(CADENCE_STREAMS), np.uint64))


def grid_cell(system_id: int, grid_sizes: Sequence[int]) -> tuple[int, ...]:
    """Indices into each grid parameter for ``system_id`` (cell ``system_id mod n_cells``)."""
    if not grid_sizes:
        return ()
    n_cells = int(np.prod(grid_sizes))
    return tuple(int(i) for i in np.unravel_index(system_id % n_cells, tuple(grid_sizes)))

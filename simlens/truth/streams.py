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

__all__ = ["SYSTEM_STREAMS", "FIELD_STREAMS", "INJECTION_STREAMS", "CADENCE_STREAMS", "system_streams", "field_streams", "injection_streams", "cadence_streams", "grid_cell",
           "system_streams_many", "seed_sequence_states"]

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
        self._names, self._state = names, state

    def __missing__(self, name: str) -> np.random.Generator:
        i = self._names.index(name)
        rng = np.random.Generator(np.random.Philox(key=self._state[2 * i:2 * i + 2]))
        self[name] = rng
        return rng


def system_streams(seed: int, system_id: int, names: Sequence[str], candidate: int = 0) -> dict[str, np.random.Generator]:
    """Independent generators for one system, one per named purpose.

    The streams depend only on ``(seed, system_id, candidate)`` and the position of each name in
    ``names``, never on which process draws the system or in which order.  ``candidate`` numbers the
    redraws of a system that selection cuts rejected (0: the first draw).
    """
    return system_streams_many(seed, [system_id], names, [candidate])[0]


def system_streams_many(seed: int, system_ids: Sequence[int], names: Sequence[str],
                        candidates: Sequence[int] | None = None) -> list:
    """``[system_streams(seed, i, names, c) for i, c in zip(system_ids, candidates)]``, the seed
    sequences' states hashed for all systems at once (:func:`seed_sequence_states`)."""
    ids = [int(i) for i in system_ids]
    candidates = [0] * len(ids) if candidates is None else [int(c) for c in candidates]
    keys = [(i,) if c == 0 else (i, c) for i, c in zip(ids, candidates)]
    states = seed_sequence_states(int(seed), keys, 2 * len(names))
    return [_Streams(names, state) for state in states]


# numpy's SeedSequence (numpy/random/bit_generator.pyx, after M. E. O'Neill's seed_seq_fe), its
# hash constants, arithmetic modulo 2^32
_POOL_SIZE = 4
_INIT_A, _MULT_A, _INIT_B, _MULT_B = 0x43B0D7E5, 0x931E8875, 0x8B51F9DD, 0x58F38DED
_MIX_MULT_L, _MIX_MULT_R, _XSHIFT = 0xCA01F9DD, 0x4973F715, 16


def _words(value: int) -> list[int]:
    """An integer as numpy's SeedSequence takes it: 32-bit words, least significant first."""
    words = [value & 0xFFFFFFFF]
    value >>= 32
    while value:
        words.append(value & 0xFFFFFFFF)
        value >>= 32
    return words


def seed_sequence_states(entropy: int, spawn_keys: Sequence[tuple], n_words: int) -> np.ndarray:
    """``np.random.SeedSequence(entropy, spawn_key=k).generate_state(n_words, np.uint64)`` for
    every key of ``spawn_keys`` (rows of the result), computed on arrays: the same hash, vectorised
    over keys of equal length (tests/test_streams.py compares it with numpy's)."""
    out = np.empty((len(spawn_keys), n_words), np.uint64)
    run = _words(entropy)
    if len(run) < _POOL_SIZE:
        run = run + [0] * (_POOL_SIZE - len(run))
    groups: dict = {}
    for row, key in enumerate(spawn_keys):
        words = [w for part in key for w in _words(int(part))]
        groups.setdefault(len(words), []).append((row, words))
    with np.errstate(over="ignore"):
        for members in groups.values():
            rows = np.array([r for r, _ in members])
            entropy_array = np.concatenate([np.tile(np.array(run, np.uint32), (rows.size, 1)),
                                            np.array([w for _, w in members], np.uint32)], axis=1)
            out[rows] = _hash_state(entropy_array, n_words)
    return out


def _hash_state(entropy: np.ndarray, n_words: int) -> np.ndarray:
    """The pool mixing and state generation of SeedSequence for rows of ``entropy`` (uint32)."""
    u32 = np.uint32
    hash_const = u32(_INIT_A)

    def hashmix(value):
        nonlocal hash_const
        value = value ^ hash_const
        hash_const = u32(hash_const * u32(_MULT_A))
        value = value * hash_const
        return value ^ (value >> u32(_XSHIFT))

    def mix(x, y):
        result = u32(_MIX_MULT_L) * x - u32(_MIX_MULT_R) * y
        return result ^ (result >> u32(_XSHIFT))

    n, length = entropy.shape
    pool = [hashmix(entropy[:, i] if i < length else np.zeros(n, u32)) for i in range(_POOL_SIZE)]
    for i_src in range(_POOL_SIZE):
        for i_dst in range(_POOL_SIZE):
            if i_src != i_dst:
                pool[i_dst] = mix(pool[i_dst], hashmix(pool[i_src]))
    for i_src in range(_POOL_SIZE, length):
        for i_dst in range(_POOL_SIZE):
            pool[i_dst] = mix(pool[i_dst], hashmix(entropy[:, i_src]))
    state = np.empty((n, 2 * n_words), u32)
    const = u32(_INIT_B)
    for i_dst in range(2 * n_words):
        value = pool[i_dst % _POOL_SIZE] ^ const
        const = u32(const * u32(_MULT_B))
        value = value * const
        state[:, i_dst] = value ^ (value >> u32(_XSHIFT))
    return state.astype("<u4").view("<u8").astype(np.uint64)


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

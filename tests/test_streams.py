"""The vectorised seed sequences reproduce numpy's SeedSequence exactly (numpy is the reference)."""

from __future__ import annotations

import numpy as np
import pytest

from simlens.truth.streams import SYSTEM_STREAMS, seed_sequence_states, system_streams, system_streams_many


@pytest.mark.parametrize("seed", [0, 1, 42, 20261204, 2**32 - 1, 2**32, 2**40 + 5, 2**63 - 1])
def test_states_equal_numpy_seed_sequence(seed):
    keys = [(0,), (1,), (7,), (123456,), (2**32 - 1,), (2**32 + 3,), (5, 1), (5, 2), (99, 2**33), (3, 0, 0x6669656C64)]
    states = seed_sequence_states(seed, keys, 16)
    for key, state in zip(keys, states):
        expected = np.random.SeedSequence(entropy=seed, spawn_key=key).generate_state(16, np.uint64)
        assert np.array_equal(state, expected), key


def test_many_streams_draw_what_numpy_seed_sequences_give():
    # the reference: Philox keyed by numpy's SeedSequence(seed, spawn_key=(id,) or (id, candidate))
    ids, candidates = [0, 3, 10**6, 17], [0, 0, 2, 5]
    many = system_streams_many(7, ids, SYSTEM_STREAMS, candidates)
    for streams, i, c in zip(many, ids, candidates):
        key = (i,) if c == 0 else (i, c)
        state = np.random.SeedSequence(entropy=7, spawn_key=key).generate_state(2 * len(SYSTEM_STREAMS), np.uint64)
        one = system_streams(7, i, SYSTEM_STREAMS, c)
        for name in ("parameters", "physics", "transient"):
            k = SYSTEM_STREAMS.index(name)
            expected = np.random.Generator(np.random.Philox(key=state[2 * k:2 * k + 2])).uniform(size=5)
            assert np.array_equal(streams[name].uniform(size=5), expected)
            assert np.array_equal(one[name].uniform(size=5), expected)

"""``tdkit._seeding.spawned_seed``: numpy's SeedSequence values, computed without the object.

The reference is numpy itself: ``np.random.SeedSequence(entropy,
spawn_key=key).generate_state(1, dtype=np.uint32)[0]`` (numpy's documented
seeding API, NEP 19). Every episode seed of every run goes through this port,
so any difference would change every seeded result.
"""

from __future__ import annotations

import numpy as np
from hypothesis import given
from hypothesis import strategies as st

from tdkit import _seeding
from tdkit._seeding import spawned_seed
from tdkit.runs import episode_seed

words = st.one_of(st.integers(0, 2**32 - 1), st.integers(0, 2**200))


def numpy_seed(entropy, spawn_key, key):
    child = np.random.SeedSequence(entropy, spawn_key=(*spawn_key, key))
    return int(child.generate_state(1, dtype=np.uint32)[0])


@given(words, st.lists(words, max_size=4).map(tuple), words)
def test_spawned_seed_equals_numpy(entropy, spawn_key, key):
    assert spawned_seed(entropy, spawn_key, key) == numpy_seed(entropy, spawn_key, key)


@given(st.integers(0, 2**64), st.lists(st.integers(0, 2**64), max_size=2).map(tuple),
       st.integers(0, 2**40))
def test_episode_seed_equals_the_spawned_sequence(entropy, spawn_key, episode):
    root = np.random.SeedSequence(entropy, spawn_key=spawn_key)
    assert episode_seed(root, episode) == numpy_seed(entropy, spawn_key, episode)


def test_the_port_is_used_and_agrees_with_numpy_at_import():
    # _FAST_SPAWN is False only if this numpy computes other values than the port.
    assert _seeding._FAST_SPAWN


def test_entropy_the_port_does_not_take_goes_to_numpy():
    # A list of words and numpy integers are valid SeedSequence entropy too.
    cases = (([1, 2, 3], ()), (np.uint64(7), (np.int64(2),)), (5, (np.int64(2),)))
    for entropy, spawn_key in cases:
        assert spawned_seed(entropy, spawn_key, 9) == numpy_seed(entropy, spawn_key, 9)


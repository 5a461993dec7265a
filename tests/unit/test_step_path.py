"""The learners' per-step path: pure-Python greedy forms, cached action sets, table views.

The pure-Python forms in ``tdkit._greedy`` must pick exactly what the numpy
forms pick from the same random numbers (an equivalence, checked with
hypothesis), masks must be checked once per distinct mask, and the views the
per-step path reads and writes must be the public tables themselves.
"""

from __future__ import annotations

import pickle

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import tdkit
from tdkit._errors import InvalidParameterError
from tdkit._greedy import (
    ActionSets,
    greedy_action,
    greedy_index,
    immutable_mask,
    masked_max,
    row_max,
)

# Few distinct values, so ties are common.
rows = st.integers(1, 7).flatmap(
    lambda n: st.lists(st.sampled_from([-1.0, 0.0, 0.5, 2.0]), min_size=n, max_size=n)
)


@settings(max_examples=300)
@given(row=rows, seed=st.integers(0, 2**32 - 1), data=st.data())
def test_pure_python_greedy_equals_numpy_greedy_draw_for_draw(row, seed, data):
    n = len(row)
    bits = data.draw(st.lists(st.booleans(), min_size=n, max_size=n))
    mask = np.array(bits) if any(bits) else None
    sets = ActionSets(n)
    allowed = None if mask is None else sets.get(mask)
    numpy_rng, python_rng = np.random.default_rng(seed), np.random.default_rng(seed)
    for _ in range(5):
        expected = greedy_action(np.array(row), mask, numpy_rng)
        assert greedy_index(tuple(row), allowed, python_rng.random) == expected
    assert numpy_rng.random() == python_rng.random()  # same numbers consumed
    assert row_max(tuple(row), allowed) == masked_max(np.array(row), mask)


def test_greedy_index_refuses_a_nan_maximum():
    with pytest.raises(FloatingPointError, match="NaN"):
        greedy_index((float("nan"), 1.0), None, lambda: 0.0)


def test_action_sets_check_each_mask_once_and_accept_integer_masks():
    sets = ActionSets(4)
    taxi_like = np.array([1, 0, 1, 1], dtype=np.int8)  # gymnasium's Taxi gives int8 masks
    allowed = sets.get(taxi_like)
    assert allowed.indices == (0, 2, 3)
    assert allowed.mask.dtype == bool and not allowed.mask.flags.writeable
    assert sets.get(taxi_like.copy()) is allowed  # a look-up, no new arrays
    assert sets.of(allowed.mask) is allowed
    assert sets.get(np.array([True, False, True, True])).indices == (0, 2, 3)


def test_an_immutable_mask_is_known_by_identity_and_cannot_change():
    sets = ActionSets(4)
    frozen = immutable_mask([1, 0, 1, 1])
    allowed = sets.get(frozen)
    assert allowed.indices == (0, 2, 3)
    assert sets.get(frozen) is allowed and sets.of(frozen) is allowed
    with pytest.raises(ValueError):  # numpy refuses: the memory is a bytes object
        frozen.flags.writeable = True
    # a writable array is read by its contents every time, even when changed in place
    mask = np.array([1, 1, 0, 0], dtype=np.int8)
    assert sets.get(mask).indices == (0, 1)
    mask[2] = 1
    assert sets.get(mask).indices == (0, 1, 2)


_mask_kinds = st.sampled_from(["int8", "bool", "immutable", "view of immutable", "edited"])


@given(st.lists(st.tuples(st.lists(st.booleans(), min_size=3, max_size=3), _mask_kinds),
                min_size=1, max_size=40),
       st.integers(1, 3))
def test_action_sets_give_the_set_of_every_mask_whatever_its_kind(masks, limit):
    # Identity is trusted only for immutable arrays: masks edited in place, views, other
    # dtypes and a cache emptied when full all give the set of their current contents.
    sets = ActionSets(3, limit=limit)
    held = []  # immutable masks passed again later, as a mask reader hands them out
    edited = np.ones(3, dtype=np.int8)
    for values, kind in masks:
        if not any(values):
            values = [True, *values[1:]]
        if kind == "int8":
            mask = np.array(values, dtype=np.int8)
        elif kind == "bool":
            mask = np.array(values)
        elif kind == "edited":
            edited[:] = values
            mask = edited
        else:
            mask = immutable_mask(values)
            held.append(mask)
            if kind == "view of immutable":
                mask = mask[:]
        for m in (mask, *held[-2:]):
            assert sets.get(m).indices == tuple(np.flatnonzero(m).tolist())
            assert sets.of(sets.get(m).mask).indices == tuple(np.flatnonzero(m).tolist())


@pytest.mark.parametrize(
    ("mask", "fragment"),
    [
        (np.array([0, 0, 0, 0], dtype=np.int8), "allows no action"),
        (np.array([0, 2, 1, 0]), "booleans"),
        (np.array([True, False]), "shape"),
        (np.array([0.0, 1.0, 1.0, 1.0]), "booleans"),
    ],
)
def test_bad_masks_are_refused_every_time(mask, fragment):
    sets = ActionSets(4)
    for _ in range(2):  # never cached
        with pytest.raises(InvalidParameterError, match=fragment):
            sets.get(mask)


def test_a_bad_next_mask_names_itself_and_leaves_the_learner_unchanged():
    agent = tdkit.QLearning(3, 2, seed=0)
    with pytest.raises(InvalidParameterError, match="next_mask"):
        agent.observe(0, 0, 1.0, 1, False, False, next_mask=np.array([0, 0]))
    assert agent.update() == () and agent.steps_ == 0


def test_the_per_step_path_reads_and_writes_the_public_tables():
    agent = tdkit.QLearning(3, 2, gamma=1.0, step_size=1.0, exploration=0.0, seed=0)
    agent._q[1] = [4.0, 7.0]  # written from outside: the per-step path must see it
    assert agent.act(1) == 1
    agent.observe(0, 0, 1.0, 1, False, False)
    assert agent.update() == (8.0,)
    assert agent.table[0, 0] == 8.0 and agent.visits[0, 0] == 1


@pytest.mark.parametrize("cls", [tdkit.QLearning, tdkit.Sarsa, tdkit.ExpectedSarsa])
def test_a_pickled_learner_continues_exactly(cls):
    def run(agent, steps):
        out = []
        for t in range(steps):
            s = t % 5
            a = agent.act(s, mask=np.array([1, 1, t % 2], dtype=np.int8))
            agent.observe(s, a, float(t % 3), (s + 1) % 5, t % 7 == 6, False)
            out.extend(agent.update())
        return out

    agent = cls(5, 3, seed=3)
    run(agent, 30)
    clone = pickle.loads(pickle.dumps(agent))
    assert run(clone, 40) == run(agent, 40)
    np.testing.assert_array_equal(clone.table, agent.table)


ALL_LEARNERS = [getattr(tdkit.learners, name) for name in tdkit.learners.__all__]
PREDICTION = {"TD0", "TDLambda", "DifferentialTD"}


def _cached_rows_match_the_array(agent):
    for s, row in enumerate(agent._rows):
        if row is not None:
            assert row == agent._values[s].tolist(), f"row {s} of the cache is stale"
            assert all(type(v) is float for v in row)


@pytest.mark.parametrize("cls", ALL_LEARNERS, ids=lambda c: c.__name__)
@settings(max_examples=15, deadline=None)
@given(seed=st.integers(0, 2**16), data=st.data())
def test_the_row_cache_always_equals_the_value_array(cls, seed, data):
    """Every learner keeps its per-step row cache equal to its numpy table.

    The cache is read by act and by the targets; a write that reaches the
    array but not the cache (or the other way round) would make the learner
    act and learn on values its table does not hold. Random episodes with
    masks, time limits and cut episodes exercise every write path.
    """
    n_states, n_actions = 4, 3
    extra = {"policy": [[1 / 3] * 3] * 4} if cls.__name__ in PREDICTION else {}
    agent = cls(n_states, n_actions, seed=seed, initial_value=(-1.0, 1.0), **extra)
    steps = data.draw(st.lists(
        st.tuples(st.integers(0, n_states - 1), st.floats(-2, 2), st.integers(0, 9),
                  st.lists(st.booleans(), min_size=n_actions, max_size=n_actions)),
        min_size=1, max_size=25,
    ))
    s = 0
    for s2, r, end, bits in steps:
        mask = np.array(bits) if any(bits) else None
        a = agent.act(s)
        agent.observe(s, a, r, s2, end == 0, end == 1, next_mask=mask)
        agent.update()
        _cached_rows_match_the_array(agent)
        if end == 2:
            agent.end_episode()
            _cached_rows_match_the_array(agent)
        s = s2
    agent._q[0] = 5.0  # a write through the writable array from outside
    assert agent._row(0) == [5.0] * agent._values.shape[1]
    _cached_rows_match_the_array(agent)

"""Tests of tdkit.encoders: observations to table rows, columns to env actions."""

from __future__ import annotations

import json
from typing import Any

import gymnasium
import numpy as np
import pytest
from gymnasium import spaces
from hypothesis import given, settings
from hypothesis import strategies as st

from tdkit._errors import CapacityError, InvalidParameterError
from tdkit.encoders import (
    ActionEncoder,
    BinEncoder,
    DiscreteEncoder,
    HashIndexEncoder,
    IntegerEncoder,
    MultiDiscreteEncoder,
    StateEncoder,
    TupleEncoder,
    action_encoder_for_space,
    for_space,
    from_description,
)

sizes_st = st.lists(st.integers(1, 6), min_size=1, max_size=4)
starts_st = st.integers(-5, 5)


# -- IntegerEncoder / DiscreteEncoder ---------------------------------------------------------


def test_integer_encoder_accepts_python_and_numpy_integers() -> None:
    enc = IntegerEncoder(5)
    for obs in (3, np.int64(3), np.uint8(3), np.int32(3), np.array(3)):
        assert enc.encode(obs) == 3
        assert type(enc.encode(obs)) is int
    assert enc.to_env(4) == 4 and type(enc.to_env(np.int64(4))) is int
    assert enc.to_index(np.int64(2)) == 2
    assert enc.n_states == enc.n_actions == 5


@pytest.mark.parametrize("bad", [-1, 5, 100, np.int64(-1), np.array(-2), -5])
def test_integer_encoder_rejects_out_of_range_without_wrapping(bad: Any) -> None:
    enc = IntegerEncoder(5)
    with pytest.raises(InvalidParameterError, match=r"outside \[0, 5\)"):
        enc.encode(bad)
    with pytest.raises(InvalidParameterError, match=r"outside \[0, 5\)"):
        enc.to_env(bad)
    with pytest.raises(InvalidParameterError, match=r"outside \[0, 5\)"):
        enc.to_index(bad)


@pytest.mark.parametrize("bad", [1.0, "1", None, True, np.bool_(False), np.array([1]), (1,)])
def test_integer_encoder_rejects_non_integers(bad: Any) -> None:
    with pytest.raises(InvalidParameterError, match="must be an integer"):
        IntegerEncoder(5).encode(bad)


@pytest.mark.parametrize("n", [0, -1, 2.0, True, None])
def test_sizes_are_validated(n: Any) -> None:
    with pytest.raises(InvalidParameterError, match="n must be an integer >= 1"):
        IntegerEncoder(n)
    with pytest.raises(InvalidParameterError):
        DiscreteEncoder(n)


@given(n=st.integers(1, 50), start=st.integers(-100, 100), data=st.data())
def test_discrete_encoder_round_trip(n: int, start: int, data: st.DataObject) -> None:
    enc = DiscreteEncoder(n, start=start)
    assert [enc.encode(v) for v in range(start, start + n)] == list(range(n))
    i = data.draw(st.integers(0, n - 1))
    assert enc.encode(enc.to_env(i)) == i and enc.to_index(enc.to_env(i)) == i
    space = spaces.Discrete(n, start=start)
    assert space.contains(enc.to_env(i))
    outside = data.draw(st.one_of(st.integers(max_value=start - 1), st.integers(start + n)))
    with pytest.raises(InvalidParameterError, match="outside"):
        enc.encode(outside)


def test_discrete_encoder_start_is_validated() -> None:
    with pytest.raises(InvalidParameterError, match="start must be an integer"):
        DiscreteEncoder(3, start=0.5)


# -- MultiDiscreteEncoder and TupleEncoder ----------------------------------------------------


def _all_vectors(sizes: list[int], starts: list[int]) -> np.ndarray:
    grids = np.meshgrid(
        *[np.arange(s, s + n) for n, s in zip(sizes, starts, strict=True)], indexing="ij"
    )
    return np.stack([g.ravel() for g in grids], axis=1)  # row-major (C) order


@settings(max_examples=60)
@given(sizes=sizes_st, data=st.data())
def test_multidiscrete_is_a_row_major_bijection(sizes: list[int], data: st.DataObject) -> None:
    starts = data.draw(st.lists(starts_st, min_size=len(sizes), max_size=len(sizes)))
    enc = MultiDiscreteEncoder(sizes, start=starts)
    vectors = _all_vectors(sizes, starts)
    indices = [enc.encode(v) for v in vectors]
    assert indices == list(range(enc.n_states))  # onto range(n_states), in C order
    assert indices == [
        int(np.ravel_multi_index(tuple(v - np.array(starts)), sizes)) for v in vectors
    ]
    for i in indices:
        back = enc.to_env(i)
        assert back.dtype == np.int64 and enc.to_index(back) == i
    space = spaces.MultiDiscrete(sizes, start=starts)
    assert all(space.contains(enc.to_env(i)) for i in indices)


@settings(max_examples=60)
@given(sizes=sizes_st, data=st.data())
def test_tuple_encoder_is_a_row_major_bijection(sizes: list[int], data: st.DataObject) -> None:
    starts = data.draw(st.lists(starts_st, min_size=len(sizes), max_size=len(sizes)))
    enc = TupleEncoder(sizes, starts=starts)
    tuples = [tuple(int(x) for x in v) for v in _all_vectors(sizes, starts)]
    indices = [enc.encode(t) for t in tuples]
    assert indices == list(range(enc.n_states))
    assert [enc.to_env(i) for i in indices] == tuples
    assert enc.n_states == int(np.prod(sizes))


def test_multidiscrete_with_matrix_nvec_flattens_in_c_order() -> None:
    enc = MultiDiscreteEncoder([[2, 3], [4, 5]])
    assert enc.n_states == 120
    obs = np.array([[1, 2], [3, 4]])
    assert enc.encode(obs) == int(np.ravel_multi_index((1, 2, 3, 4), (2, 3, 4, 5)))
    np.testing.assert_array_equal(enc.to_env(enc.encode(obs)), obs)


def test_multidiscrete_reads_a_boolean_vector_as_zeros_and_ones() -> None:
    # A MultiBinary-like observation: True/False are the digits 1/0 (row-major, as above).
    enc = MultiDiscreteEncoder([2, 2, 2])
    assert enc.encode(np.array([True, False, True])) == enc.encode([1, 0, 1]) == 5


@pytest.mark.parametrize(
    ("obs", "fragment"),
    [
        ([0, 3], "out of range"),
        ([-1, 0], "out of range"),
        ([0], "shape (2,)"),
        ([0.0, 1.0], "integer array"),
        ("ab", "integer array"),
    ],
)
def test_multidiscrete_rejects_bad_vectors(obs: Any, fragment: str) -> None:
    with pytest.raises(InvalidParameterError) as info:
        MultiDiscreteEncoder([2, 3]).encode(obs)
    assert fragment in str(info.value)


@pytest.mark.parametrize(
    ("obs", "fragment"),
    [
        ((0, 3), "out of range"),
        ((-1, 0), "out of range"),
        ((0,), "sequence of 2 integers"),
        (5, "sequence of 2 integers"),
        ((0, 1.5), "must be an integer"),
        ((True, 1), "bool"),
    ],
)
def test_tuple_encoder_rejects_bad_tuples(obs: Any, fragment: str) -> None:
    with pytest.raises(InvalidParameterError) as info:
        TupleEncoder([2, 3]).encode(obs)
    assert fragment in str(info.value)


@pytest.mark.parametrize(
    ("make", "fragment"),
    [
        (lambda: MultiDiscreteEncoder([]), "non-empty"),
        (lambda: MultiDiscreteEncoder([2, 0]), ">= 1"),
        (lambda: MultiDiscreteEncoder([2.5]), "array of integers"),
        (lambda: MultiDiscreteEncoder([2, 3], start=[0]), "shape of nvec"),
        (lambda: TupleEncoder([]), "non-empty"),
        (lambda: TupleEncoder([2, 3], starts=[0]), "one entry per size"),
        (lambda: TupleEncoder([2, "3"]), "sequence of integers"),
        (lambda: TupleEncoder([2**40, 2**40]), "too many"),
    ],
)
def test_vector_encoder_constructors_validate(make: Any, fragment: str) -> None:
    with pytest.raises(InvalidParameterError) as info:
        make()
    assert fragment in str(info.value)


# -- BinEncoder ------------------------------------------------------------------------------


edges_st = st.lists(
    st.lists(st.floats(-10, 10, allow_nan=False), min_size=0, max_size=5, unique=True).map(sorted),
    min_size=1,
    max_size=3,
)


@settings(max_examples=100)
@given(edges=edges_st, data=st.data())
def test_bin_encoder_agrees_with_digitize(edges: list[list[float]], data: st.DataObject) -> None:
    enc = BinEncoder(edges)
    bins = [len(e) + 1 for e in edges]
    assert enc.n_states == int(np.prod(bins)) and enc.bins == tuple(bins)
    # points drawn anywhere, plus points exactly on the edges (the boundary case)
    on_edges = [[*e, -20.0, 20.0] for e in edges]
    x = np.array(
        [data.draw(st.one_of(st.floats(-20, 20), st.sampled_from(pts))) for pts in on_edges]
    )
    per_dim = [int(np.digitize(x[k], edges[k])) for k in range(len(edges))]
    assert per_dim == [
        int(np.searchsorted(np.asarray(edges[k]), x[k], side="right")) for k in range(len(edges))
    ]
    assert enc.encode(x) == int(np.ravel_multi_index(per_dim, bins))
    assert enc.encode(x.tolist()) == enc.encode(tuple(x)) == enc.encode(x)


def test_bin_encoder_boundaries_and_scalars() -> None:
    enc = BinEncoder([[0.0, 1.0]])
    assert [enc.encode(v) for v in (-5.0, 0.0, 0.5, 1.0, 9.0)] == [0, 1, 1, 2, 2]
    assert enc.encode(np.float32(0.5)) == 1 and enc.encode(np.array([0.5])) == 1
    box = BinEncoder([[0.0], [0.0], [0.0], [0.0]])
    assert box.encode(np.array([[1.0, -1.0], [-1.0, 1.0]])) == 0b1001  # a (2, 2) Box


@pytest.mark.parametrize(
    ("obs", "fragment"),
    [
        ([0.0], "has 1 component(s); the edges define 2"),
        ([np.nan, 0.0], "NaN"),
        ([0.0, "a"], "non-numeric"),
        ([None, 0.0], "non-numeric"),
    ],
)
def test_bin_encoder_rejects_bad_observations(obs: Any, fragment: str) -> None:
    with pytest.raises(InvalidParameterError) as info:
        BinEncoder([[0.0], [1.0]]).encode(obs)
    assert fragment in str(info.value)


@pytest.mark.parametrize(
    "edges",
    [[], [[1.0, 0.0]], [[0.0, 0.0]], [[np.inf]], [[[0.0, 1.0]]], "abc", 3, [["a"]]],
)
def test_bin_encoder_validates_edges(edges: Any) -> None:
    with pytest.raises(InvalidParameterError, match="edges"):
        BinEncoder(edges)


# -- HashIndexEncoder ------------------------------------------------------------------------


def test_hash_index_first_seen_order_and_states() -> None:
    enc = HashIndexEncoder(4, states=[("a", 1)])
    assert enc.encode((0, 0)) == 1
    assert enc.encode(("a", 1)) == 0
    assert enc.encode(frozenset({1})) == 2
    assert enc.states == [("a", 1), (0, 0), frozenset({1})]
    enc.states.append("not registered")  # a copy: the encoder is unchanged
    assert len(enc) == 3 and enc.n_states == 4
    assert enc.register([(0, 0), "x"]) == [1, 3]


def test_hash_index_capacity_error_names_capacity_state_and_fix() -> None:
    enc = HashIndexEncoder(2)
    enc.register(["s0", "s1"])
    with pytest.raises(CapacityError) as info:
        enc.encode(("new", 7))
    text = str(info.value)
    assert "capacity 2" in text and "('new', 7)" in text and "larger capacity" in text
    assert isinstance(info.value, ValueError)
    assert enc.encode("s1") == 1  # known states still encode when full


@pytest.mark.parametrize("obs", [[1, 2], np.array([1, 2]), {"x": 1}])
def test_hash_index_unhashable_suggests_conversion(obs: Any) -> None:
    with pytest.raises(TypeError, match=r"not hashable.*tuple\(obs\)"):
        HashIndexEncoder(3).encode(obs)


def test_hash_index_as_action_encoder() -> None:
    enc = HashIndexEncoder(3, states=["left", "right", "stay"])
    assert [enc.to_env(i) for i in range(3)] == ["left", "right", "stay"]
    assert enc.to_index("stay") == 2 and enc.n_actions == 3
    with pytest.raises(InvalidParameterError, match="no registered value"):
        HashIndexEncoder(3, states=["left"]).to_env(2)
    with pytest.raises(InvalidParameterError, match="register"):
        enc.register("left")


def test_hash_index_describe_round_trips_tuples_and_numpy_scalars() -> None:
    enc = HashIndexEncoder(10, states=[(1, (2, "x")), "s", 3, np.int64(4), 2.5, None, True])
    desc = json.loads(json.dumps(enc.describe()))
    back = from_description(desc)
    assert back == enc
    assert [back.encode(s) for s in enc.states] == list(range(7))


@pytest.mark.parametrize("state", [frozenset({1}), (1, float("nan")), object()])
def test_hash_index_describe_refuses_non_json_states(state: Any) -> None:
    enc = HashIndexEncoder(3, states=[1, state])
    with pytest.raises(InvalidParameterError, match="cannot be saved as JSON"):
        enc.describe()


# -- spaces ------------------------------------------------------------------------------------


def test_blackjack_observation_space() -> None:
    # Blackjack: Sutton & Barto (2018), Reinforcement Learning: An Introduction, Example 5.1.
    env = gymnasium.make("Blackjack-v1")
    enc = for_space(env.observation_space)
    assert isinstance(enc, TupleEncoder) and enc.n_states == 32 * 11 * 2
    seen = set()
    for seed in range(30):
        obs, _ = env.reset(seed=seed)
        done = False
        while not done:
            i = enc.encode(obs)
            assert 0 <= i < enc.n_states and enc.to_env(i) == tuple(int(v) for v in obs)
            seen.add(i)
            obs, _, terminated, truncated, _ = env.step(1)  # hit
            done = terminated or truncated
    assert len(seen) > 10


@pytest.mark.parametrize(
    ("space", "expected"),
    [
        (spaces.Discrete(16), IntegerEncoder(16)),
        (spaces.Discrete(5, start=2), DiscreteEncoder(5, start=2)),
        (spaces.MultiDiscrete([3, 4]), MultiDiscreteEncoder([3, 4])),
        (spaces.MultiDiscrete([3, 4], start=[1, -1]), MultiDiscreteEncoder([3, 4], [1, -1])),
        (spaces.MultiBinary(3), MultiDiscreteEncoder([2, 2, 2])),
        (
            spaces.Tuple((spaces.Discrete(2), spaces.Discrete(3, start=1))),
            TupleEncoder([2, 3], [0, 1]),
        ),
    ],
)
def test_for_space(space: spaces.Space, expected: Any) -> None:
    enc = for_space(space)
    assert enc == expected
    space.seed(0)
    for _ in range(20):
        obs = space.sample()
        assert 0 <= enc.encode(obs) < enc.n_states


@pytest.mark.parametrize(
    ("space", "fragment"),
    [
        (spaces.Box(-1.0, 1.0, shape=(2,)), "BinEncoder"),
        (spaces.Dict({"a": spaces.Discrete(2)}), "HashIndexEncoder"),
        (spaces.Tuple((spaces.Discrete(2), spaces.Box(0.0, 1.0))), "HashIndexEncoder"),
        (None, "expected a gymnasium.spaces.Space"),
    ],
)
def test_for_space_refuses_with_advice(space: Any, fragment: str) -> None:
    with pytest.raises(InvalidParameterError) as info:
        for_space(space)
    assert fragment in str(info.value)


def test_action_encoder_for_space() -> None:
    assert action_encoder_for_space(spaces.Discrete(4)) == IntegerEncoder(4)
    enc = action_encoder_for_space(spaces.Discrete(3, start=-1))
    assert [enc.to_env(i) for i in range(3)] == [-1, 0, 1]
    with pytest.raises(InvalidParameterError, match="Discrete action space"):
        action_encoder_for_space(spaces.Box(-1.0, 1.0))


@pytest.mark.parametrize(
    "enc",
    [
        IntegerEncoder(3),
        DiscreteEncoder(3, start=-1),
        MultiDiscreteEncoder([2, 3], start=[0, 1]),
        TupleEncoder([2, 2]),
        BinEncoder([[0.0, 0.5], []]),
        HashIndexEncoder(5, states=[(0, 1)]),
    ],
    ids=lambda e: type(e).__name__,
)
def test_describe_is_json_and_rebuilds_an_equal_encoder(enc: Any) -> None:
    desc = enc.describe()
    assert json.loads(json.dumps(desc)) == desc or type(enc) is HashIndexEncoder
    assert from_description(json.loads(json.dumps(desc))) == enc
    assert isinstance(enc, StateEncoder)
    if not isinstance(enc, BinEncoder):
        assert isinstance(enc, ActionEncoder)


@pytest.mark.parametrize("desc", [{}, {"kind": "nope"}, None, {"kind": "integer", "size": 3}])
def test_from_description_refuses_bad_input(desc: Any) -> None:
    with pytest.raises(InvalidParameterError):
        from_description(desc)


def test_docstring_examples_run() -> None:
    import doctest

    import tdkit.encoders as module

    assert doctest.testmod(module, optionflags=doctest.ELLIPSIS).failed == 0

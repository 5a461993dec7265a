"""The bootstrap values of tdkit.learners._targets: one definition, three callers.

1. The ``(K, A)`` row versions agree with the one-row versions bit for bit
   (hypothesis over rows with ties, masks, ε and τ), so the numpy batch, the
   scalar learners and the compiled kernels compute the same numbers.
2. The one-row versions agree with independent definitions: the probabilities
   of :class:`tdkit.exploration.EpsilonGreedy` / :class:`Softmax` (Sutton &
   Barto 2018, Section 2.2 and Eq. 13.2; Expected SARSA's target is
   :math:`\\sum_a \\pi(a) q(a)`, Eq. 6.9) and the tie rule of
   :func:`tdkit._greedy.greedy_action`.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from tdkit._greedy import (
    ActionSets,
    greedy_action,
    greedy_index,
    greedy_pick,
    greedy_pick_rows,
    greedy_rows,
)
from tdkit.exploration import EpsilonGreedy, Softmax
from tdkit.learners import _targets as T


@st.composite
def rows_and_masks(draw, *, masked: bool | None = None):
    """(K, A) rows drawn from a few values (so ties are common), a mask or None, K uniforms."""
    k = draw(st.integers(1, 6))
    a = draw(st.integers(1, 7))
    pool = draw(st.lists(st.floats(-5, 5, allow_nan=False), min_size=1, max_size=4))
    cells = draw(st.lists(st.sampled_from(pool), min_size=k * a, max_size=k * a))
    rows = np.array(cells, dtype=np.float64).reshape(k, a)
    use_mask = draw(st.booleans()) if masked is None else masked
    mask = None
    if use_mask:
        bits = draw(st.lists(st.booleans(), min_size=k * a, max_size=k * a))
        mask = np.array(bits, dtype=bool).reshape(k, a)
        mask[np.arange(k), draw(st.lists(st.integers(0, a - 1), min_size=k, max_size=k))] = True
    us = draw(st.lists(st.floats(0, 1, exclude_max=True), min_size=3 * k, max_size=3 * k))
    return rows, mask, np.array(us).reshape(3, k)


def allowed_of(mask: np.ndarray | None, i: int, n: int):
    return range(n) if mask is None else tuple(int(a) for a in np.flatnonzero(mask[i]))


epsilons = st.floats(0, 1)
temperatures = st.floats(0.05, 20)


# --------------------------------------------------------------------------- 1. rows == row
@given(rows_and_masks(), epsilons, temperatures)
def test_row_versions_and_array_versions_agree_exactly(data, eps, tau):
    rows, mask, u = data
    k, n = rows.shape
    got = {
        "max": T.greedy_max_rows(rows, mask),
        "argmax": T.greedy_index_rows(rows, mask, u[0]),
        "eps_expect": T.expected_epsilon_greedy_rows(rows, mask, eps),
        "soft_expect": T.expected_softmax_rows(rows, mask, tau),
        "eps_choice": T.epsilon_greedy_index_rows(rows, mask, eps, u[0]),
        "soft_choice": T.softmax_index_rows(rows, mask, tau, u[1]),
        "double": T.double_value_rows(rows, rows[::-1] * 2.0 + 1.0, mask, u[2]),
        "coin": np.stack(T.double_coin_rows(u[1]), axis=1),
    }
    for i in range(k):
        values = rows[i].tolist()  # the scalar learners' hot path reads lists
        other = (rows[::-1] * 2.0 + 1.0)[i].tolist()
        allowed = allowed_of(mask, i, n)
        want = {
            "max": T.greedy_max(values, allowed),
            "argmax": T.greedy_index(values, allowed, u[0, i]),
            "eps_expect": T.expected_epsilon_greedy(values, allowed, eps),
            "soft_expect": T.expected_softmax(values, allowed, tau),
            "eps_choice": T.epsilon_greedy_index(values, allowed, eps, u[0, i]),
            "soft_choice": T.softmax_index(values, allowed, tau, u[1, i]),
            "double": T.double_value(values, other, allowed, u[2, i]),
        }
        for name, value in want.items():
            assert got[name][i] == value, (name, i, rows[i], None if mask is None else mask[i])
        assert tuple(got["coin"][i]) == T.double_coin(u[1, i])


# --------------------------------------------------------------------------- 2. definitions
@given(rows_and_masks(), epsilons)
def test_epsilon_greedy_expectation_is_the_policy_average(data, eps):
    # Expected SARSA's bootstrap sum_a pi(a) q(a) (Sutton & Barto 2018, Eq. 6.9) with the
    # epsilon-greedy probabilities of tdkit.exploration, ties sharing the greedy mass.
    rows, mask, _ = data
    for i in range(rows.shape[0]):
        m = None if mask is None else mask[i]
        probs = EpsilonGreedy(eps).probabilities(rows[i], m)
        want = float(probs @ rows[i])
        got = T.expected_epsilon_greedy(rows[i].tolist(), allowed_of(mask, i, rows.shape[1]), eps)
        # Both sides are sums of <= 7 terms of size <= 5: rounding error < 1e-13.
        assert got == pytest.approx(want, abs=1e-12)


@given(rows_and_masks(), epsilons)
def test_one_number_epsilon_greedy_has_the_epsilon_greedy_probabilities(data, eps):
    # pi(a) = eps / n + (1 - eps) [a greedy] / |greedy| (Sutton & Barto 2018, Section 2.2;
    # EpsilonGreedy.probabilities). The choice is a step function of u: each action owns
    # at most two intervals of [0, 1) (one while exploring, one as a greedy tie) whose
    # lengths are its probability; N grid midpoints u_j = (j + 1/2) / N count an
    # interval's length within 1 / N per end, so |share - pi(a)| <= 4 / N.
    rows, mask, _ = data
    n_grid = 4000
    grid = (np.arange(n_grid) + 0.5) / n_grid
    a_count = rows.shape[1]
    for i in range(rows.shape[0]):
        allowed = allowed_of(mask, i, a_count)
        values = rows[i].tolist()
        picks = np.array([T.epsilon_greedy_index(values, allowed, eps, u) for u in grid])
        share = np.bincount(picks, minlength=a_count) / n_grid
        probs = EpsilonGreedy(eps).probabilities(rows[i], None if mask is None else mask[i])
        np.testing.assert_allclose(share, probs, rtol=0, atol=4 / n_grid + 1e-12)


@given(rows_and_masks(), temperatures)
def test_softmax_expectation_and_draw_follow_the_boltzmann_probabilities(data, tau):
    # pi(a) proportional to exp(q(a) / tau) over allowed actions (Sutton & Barto 2018, Eq. 13.2).
    rows, mask, u = data
    for i in range(rows.shape[0]):
        m = None if mask is None else mask[i]
        allowed = allowed_of(mask, i, rows.shape[1])
        probs = Softmax(tau).probabilities(rows[i], m)
        nz = probs > 0
        want = float(probs[nz] @ rows[i][nz])
        assert T.expected_softmax(rows[i].tolist(), allowed, tau) == pytest.approx(want, abs=1e-12)
        # The draw is the action whose cumulative-probability interval holds u (inverse
        # transform sampling), away from the interval ends where rounding may decide.
        cumulative = np.cumsum(probs)
        if np.abs(cumulative - u[0, i]).min() > 1e-9:
            expected = int(np.searchsorted(cumulative, u[0, i], side="right"))
            assert T.softmax_index(rows[i].tolist(), allowed, tau, u[0, i]) == expected


@given(rows_and_masks(), st.integers(0, 2**32 - 1))
def test_greedy_index_uses_the_tie_rule_of_greedy_action(data, seed):
    # Same uniform number, same tie: greedy_action draws u = rng.random() and picks tie
    # floor(u * k); greedy_index is handed that u.
    rows, mask, _ = data
    for i in range(rows.shape[0]):
        m = None if mask is None else mask[i]
        u = np.random.default_rng(seed).random()
        want = greedy_action(rows[i], m, np.random.default_rng(seed))
        assert T.greedy_index(rows[i].tolist(), allowed_of(mask, i, rows.shape[1]), u) == want


@given(rows_and_masks(), st.floats(0, 1, exclude_max=True))
def test_the_tie_rule_is_defined_once_and_the_per_step_form_adapts_it(data, u):
    # The targets' argmax (scalar learners, numpy batch, compiled kernels) is the kernel's
    # greedy_pick; the per-step greedy_index (a tuple row, an ActionSet, a draw callable)
    # must choose what greedy_pick chooses from the number it draws, and draw only on ties.
    assert T.greedy_index is greedy_pick and T.greedy_index_rows is greedy_pick_rows
    rows, mask, _ = data
    drawn: list[float] = []

    def draw() -> float:
        drawn.append(u)
        return u

    for i in range(rows.shape[0]):
        values = rows[i].tolist()
        indices = allowed_of(mask, i, rows.shape[1])
        allowed = None if mask is None else ActionSets(rows.shape[1]).get(mask[i])
        before = len(drawn)
        assert greedy_index(tuple(values), allowed, draw) == T.greedy_index(values, indices, u)
        top = max(values[a] for a in indices)
        assert len(drawn) - before == (sum(values[a] == top for a in indices) > 1)


def test_the_per_step_greedy_refuses_nan_that_greedy_pick_reports():
    nan = float("nan")
    with pytest.raises(FloatingPointError, match="NaN"):
        greedy_index((nan, 1.0), None, lambda: 0.0)  # a NaN maximum
    with pytest.raises(FloatingPointError, match="NaN"):
        greedy_index((1.0, nan, 1.0), None, lambda: 0.0)  # ties, and a NaN among them
    with pytest.raises(FloatingPointError, match="learner 1"):
        greedy_rows(np.array([[0.0, 1.0], [nan, 1.0]]), np.array([0.5, 0.5]))


def test_nan_makes_choices_undefined_and_is_reported_as_minus_one():
    values = [0.0, float("nan"), 1.0]
    assert T.greedy_index(values, range(3), 0.5) == -1
    assert T.softmax_index(values, range(3), 1.0, 0.5) == -1
    assert np.isnan(T.double_value(values, [1.0, 2.0, 3.0], range(3), 0.5))
    rows = np.array([values, [0.0, 2.0, 1.0]])
    np.testing.assert_array_equal(T.greedy_index_rows(rows, None, np.array([0.5, 0.5])), [-1, 1])
    # A masked NaN is not a candidate.
    assert T.greedy_index(values, (0, 2), 0.5) == 2


def test_mask_restricts_every_quantity_to_allowed_actions():
    # Hand-computed: allowed {0, 3} of [1, 9, 9, 3]: max 3, mean 2, argmax 3.
    values, allowed = [1.0, 9.0, 9.0, 3.0], (0, 3)
    assert T.greedy_max(values, allowed) == 3.0
    assert T.greedy_index(values, allowed, 0.99) == 3
    assert T.expected_epsilon_greedy(values, allowed, 0.5) == 0.5 * 2.0 + 0.5 * 3.0
    assert T.uniform_index(allowed, 0.49) == 0 and T.uniform_index(allowed, 0.5) == 3
    assert T.epsilon_greedy_index(values, allowed, 1.0, 0.7) == 3      # explore: u / eps
    assert T.epsilon_greedy_index(values, allowed, 0.5, 0.2) == 0      # 0.2 / 0.5 = 0.4 -> 0
    assert T.epsilon_greedy_index([1.0, 2.0, 2.0], range(3), 0.5, 0.7) == 1  # (0.7-.5)/.5 = .4
    assert T.epsilon_greedy_index([1.0, 2.0, 2.0], range(3), 0.5, 0.8) == 2  # .6 -> tie 1
    assert T.double_coin(0.25) == (0, 0.5) and T.double_coin(0.75) == (1, 0.5)


def test_a_tiny_epsilon_raises_no_warning_for_rows_that_do_not_explore():
    # u / epsilon of a row that does not explore is never used; with epsilon = 1e-300 it
    # exceeded every integer and its cast warned (hypothesis found it).
    rows = np.array([[0.0, 1.0, 0.5], [2.0, 0.0, 0.0], [0.0, 0.0, 0.0]])
    u = np.array([0.5, 1e-310, 0.9])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        got = T.epsilon_greedy_index_rows(rows, None, 1e-300, u)
    want = [T.epsilon_greedy_index(row.tolist(), range(3), 1e-300, x)
            for row, x in zip(rows, u, strict=True)]
    assert got.tolist() == want

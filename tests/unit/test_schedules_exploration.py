"""Schedules and exploration rules."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy import stats

from tdkit.exploration import UCB, EpsilonGreedy, Softmax, as_exploration
from tdkit.schedules import Constant, Exponential, Linear, VisitCount, as_schedule


def test_linear_and_exponential_values():
    lin = Linear(1.0, 0.0, duration=10)
    assert [lin.value(t) for t in (0, 5, 10, 99)] == [1.0, 0.5, 0.0, 0.0]
    exp = Exponential(1.0, decay=0.9, minimum=0.05)
    assert exp.value(1) == pytest.approx(0.9)
    assert exp.value(10) == pytest.approx(0.9**10)
    assert exp.value(10_000) == 0.05


def test_visit_count_is_one_over_n_to_the_power():
    # alpha = 1 / n(s, a)^omega (Even-Dar & Mansour 2003, polynomial learning rates)
    sched = VisitCount(power=0.8)
    for n in (1, 2, 7, 1000):
        assert sched.value(0, n) == pytest.approx(n**-0.8)


@pytest.mark.parametrize(
    ("maker", "word"),
    [
        (lambda: VisitCount(power=0.0), "power"),
        (lambda: VisitCount(power=1.5), "power"),
        (lambda: Linear(1.0, 0.0, duration=0), "duration"),
        (lambda: Exponential(1.0, decay=1.5), "decay"),
        (lambda: Exponential(0.1, decay=0.5, minimum=0.2), "minimum"),
    ],
)
def test_bad_schedule_parameters_are_named(maker, word):
    with pytest.raises(ValueError, match=word):
        maker()


def test_as_schedule_rejects_a_schedule_leaving_the_range():
    with pytest.raises(ValueError, match=r"step_size schedule .* outside \(0, 1\]"):
        as_schedule(Linear(2.0, 0.5, 10), owner="X", name="step_size", low=0.0, high=1.0,
                    low_open=True)
    assert as_schedule(VisitCount(1.0), owner="X", name="step_size", low=0.0, high=1.0,
                       low_open=True) == VisitCount(1.0)


@given(
    values=st.lists(st.integers(-3, 3).map(float), min_size=1, max_size=6),
    eps=st.floats(0.0, 1.0),
    data=st.data(),
)
def test_epsilon_greedy_probabilities_sum_to_one_and_respect_masks(values, eps, data):
    q = np.array(values)
    mask = np.array(data.draw(st.lists(st.booleans(), min_size=len(q), max_size=len(q))))
    if not mask.any():
        mask[data.draw(st.integers(0, len(q) - 1))] = True
    rule = EpsilonGreedy(eps)
    probs = rule.probabilities(q, mask)
    assert probs.sum() == pytest.approx(1.0)
    assert np.all(probs[~mask] == 0.0)
    # closed-form expectation equals the explicit sum (Sutton & Barto 2018, Eq. 6.9)
    assert rule.expected_value(q, mask) == pytest.approx(float(probs[mask] @ q[mask]))


def test_epsilon_greedy_frequencies_match_its_probabilities():
    # chi-square goodness of fit; threshold is the 1 - 1e-6 quantile, so a
    # correct rule fails this with probability 1e-6 (and the seed is fixed).
    q = np.array([0.0, 2.0, 2.0, 1.0, -1.0])
    rule = EpsilonGreedy(0.3)
    rng = np.random.default_rng(123)
    n = 40_000
    counts = np.bincount([rule.select(q, None, rng) for _ in range(n)], minlength=5)
    expected = n * rule.probabilities(q, None)
    chi2 = ((counts - expected) ** 2 / expected).sum()
    assert chi2 < stats.chi2.ppf(1 - 1e-6, df=4)


def test_softmax_matches_boltzmann_and_never_picks_masked():
    q = np.array([1.0, 2.0, 3.0, 10.0])
    mask = np.array([True, True, True, False])
    rule = Softmax(temperature=2.0)
    probs = rule.probabilities(q, mask)
    ref = np.exp(q[:3] / 2.0) / np.exp(q[:3] / 2.0).sum()  # Boltzmann distribution
    np.testing.assert_allclose(probs[:3], ref)
    rng = np.random.default_rng(0)
    picks = [rule.select(q, mask, rng) for _ in range(3000)]
    assert 3 not in picks


def test_softmax_is_stable_for_huge_values():
    probs = Softmax(0.01).probabilities(np.array([1e6, 1e6 - 1.0]), None)
    assert np.all(np.isfinite(probs)) and probs[0] == pytest.approx(1.0)


def test_ucb_tries_untried_actions_first_then_uses_the_bonus():
    rule = UCB(c=1.0)
    rng = np.random.default_rng(0)
    q = np.array([5.0, 0.0, 0.0])
    counts = np.array([10, 0, 3])
    assert rule.select(q, None, rng, counts=counts) == 1
    counts = np.array([100, 1, 100])
    # bonus of action 1: sqrt(ln 201 / 1) = 2.30 < 5 - 0: still exploit action 0
    assert rule.select(q, None, rng, counts=counts) == 0
    q = np.array([1.0, 0.0, 1.0])
    # now 0 + 2.30 beats 1 + sqrt(ln 201 / 100) = 1.23
    assert rule.select(q, None, rng, counts=counts) == 1
    assert math.isclose(rule.probabilities(q, None, counts=counts)[1], 1.0)


@pytest.mark.parametrize("bad", [-0.1, 1.5, "0.1", None])
def test_as_exploration_names_the_problem(bad):
    with pytest.raises(ValueError, match="exploration"):
        as_exploration(bad, owner="QLearning")


def test_constant_schedule_round_trip_describe():
    from tdkit.exploration import exploration_from_description
    from tdkit.schedules import schedule_from_description

    for sched in (Constant(0.3), Linear(1, 0.1, 5), Exponential(1, 0.5, 0.1), VisitCount(0.7)):
        assert schedule_from_description(sched.describe()) == sched
    for rule in (EpsilonGreedy(Linear(1, 0.1, 5)), Softmax(0.5), UCB(2.0)):
        assert exploration_from_description(rule.describe()).describe() == rule.describe()


def test_learners_pass_visit_counts_to_ucb():
    # UCB tries every untried action first (Sutton & Barto 2018, Section 2.7): a
    # learner that failed to hand it the counts would raise or repeat actions.
    import tdkit

    agent = tdkit.QLearning(1, 4, exploration=UCB(c=1.0), seed=0)
    taken = []
    for _ in range(4):
        a = agent.act(0)
        taken.append(a)
        agent.observe(0, a, 0.0, 0, True, False)
        agent.update()
    assert sorted(taken) == [0, 1, 2, 3]

"""Semantics of the one-step learners: targets, terminal vs truncated, ties, masks."""

from __future__ import annotations

import numpy as np
import pytest

import tdkit
from tdkit import DoubleQLearning, ExpectedSarsa, QLearning, Sarsa

LEARNERS = [QLearning, Sarsa, ExpectedSarsa, DoubleQLearning]


def set_table(agent, values):
    """Write ``values`` into every table a learner keeps (test-only access)."""
    values = np.asarray(values, dtype=float)
    if isinstance(agent, DoubleQLearning):
        agent._q_a[:] = values
        agent._q_b[:] = values
        agent._q[:] = 2 * values
    else:
        agent._q[:] = values


@pytest.mark.parametrize("cls", LEARNERS)
@pytest.mark.parametrize(
    ("kwargs", "name"),
    [
        ({"gamma": 1.5}, "gamma"),
        ({"gamma": -0.1}, "gamma"),
        ({"step_size": 0.0}, "step_size"),
        ({"step_size": 1.5}, "step_size"),
        ({"exploration": 1.1}, "exploration"),
        ({"exploration": -0.1}, "exploration"),
        ({"initial_value": float("nan")}, "initial_value"),
        ({"seed": -3}, "seed"),
    ],
)
def test_bad_hyper_parameters_fail_at_construction_naming_them(cls, kwargs, name):
    with pytest.raises(ValueError, match=name):
        cls(3, 2, **kwargs)


def test_error_message_shape_gives_value_and_fix():
    with pytest.raises(ValueError) as info:
        QLearning(3, 2, step_size=1.5)
    message = str(info.value)
    assert "QLearning" in message and "(0, 1]" in message and "1.5" in message
    assert "schedule" in message


@pytest.mark.parametrize("cls", LEARNERS)
def test_terminated_does_not_bootstrap(cls):
    agent = cls(2, 2, gamma=0.9, step_size=1.0, exploration=0.0, seed=0)
    set_table(agent, [[0.0, 0.0], [100.0, 100.0]])
    agent.observe(0, 1, 1.0, 1, True, False)
    agent.update()
    assert agent.table[0, 1] == pytest.approx(1.0 if not isinstance(agent, DoubleQLearning)
                                              else 0.5)  # Double-Q moves one of two tables


@pytest.mark.parametrize("cls", LEARNERS)
def test_truncated_bootstraps(cls):
    agent = cls(2, 2, gamma=0.9, step_size=1.0, exploration=0.0, seed=0)
    set_table(agent, [[0.0, 0.0], [100.0, 100.0]])
    agent.observe(0, 1, 1.0, 1, False, True)
    agent.update()
    expected = 1.0 + 0.9 * 100.0
    if isinstance(agent, DoubleQLearning):
        expected = (expected + 0.0) / 2  # one table moved, the other still at 0
    assert agent.table[0, 1] == pytest.approx(expected)


@pytest.mark.parametrize("cls", [QLearning, ExpectedSarsa, DoubleQLearning, Sarsa])
def test_masked_actions_never_enter_the_target(cls):
    # Next state's masked action holds a huge value; with it masked the target
    # is r + gamma * 2 (the only allowed value), whatever the policy.
    agent = cls(2, 2, gamma=0.5, step_size=1.0, exploration=0.3, seed=0)
    set_table(agent, [[0.0, 0.0], [1000.0, 2.0]])
    agent.observe(0, 0, 1.0, 1, False, False, next_mask=np.array([False, True]))
    agent.update()
    expected = 1.0 + 0.5 * 2.0
    if isinstance(agent, DoubleQLearning):
        expected /= 2
    assert agent.table[0, 0] == pytest.approx(expected)


def test_bad_mask_is_rejected_clearly():
    agent = QLearning(2, 3, seed=0)
    with pytest.raises(ValueError, match="shape"):
        agent.act(0, mask=[True, False])
    with pytest.raises(ValueError, match="no action"):
        agent.act(0, mask=[False, False, False])


def test_bad_observation_and_reward_leave_the_table_untouched():
    agent = QLearning(3, 2, seed=0)
    before = agent.table.copy()
    with pytest.raises(ValueError, match="outside"):
        agent.observe(0, 1, 1.0, 3, False, False)
    with pytest.raises(ValueError, match="outside"):
        agent.observe(-1, 1, 1.0, 0, False, False)
    with pytest.raises(ValueError, match="finite"):
        agent.observe(0, 1, float("nan"), 1, False, False)
    with pytest.raises(ValueError, match="integer"):
        agent.act(1.5)
    assert agent.update() == ()
    np.testing.assert_array_equal(agent.table, before)


def test_q_learning_update_matches_the_formula():
    # Q(s,a) += alpha [r + gamma max_a' Q(s',a') - Q(s,a)]  (Watkins & Dayan 1992;
    # Sutton & Barto 2018, Eq. 6.8)
    agent = QLearning(2, 3, gamma=0.9, step_size=0.25, seed=0)
    set_table(agent, [[1.0, 2.0, 3.0], [4.0, -1.0, 6.0]])
    agent.observe(0, 1, 0.5, 1, False, False)
    (delta,) = agent.update()
    assert delta == pytest.approx(0.5 + 0.9 * 6.0 - 2.0)
    assert agent.table[0, 1] == pytest.approx(2.0 + 0.25 * delta)


def test_expected_sarsa_update_matches_the_formula():
    # target r + gamma sum_a pi(a|s') Q(s',a) with epsilon-greedy pi
    # (van Seijen et al. 2009; Sutton & Barto 2018, Eq. 6.9)
    agent = ExpectedSarsa(2, 3, gamma=0.9, step_size=1.0, exploration=0.3, seed=0)
    set_table(agent, [[0.0, 0.0, 0.0], [4.0, -1.0, 6.0]])
    agent.observe(0, 0, 0.5, 1, False, False)
    agent.update()
    pi = np.array([0.1, 0.1, 0.8])
    assert agent.table[0, 0] == pytest.approx(0.5 + 0.9 * pi @ [4.0, -1.0, 6.0])


def test_sarsa_commits_the_action_used_in_its_target():
    # Q(s', .) takes distinct values, so the updated Q(s,a) tells which a' the
    # target used; the next act(s') must return that same a'.
    for seed in range(40):
        agent = Sarsa(2, 3, gamma=1.0, step_size=1.0, exploration=1.0, seed=seed)
        set_table(agent, [[0.0, 0.0, 0.0], [10.0, 20.0, 30.0]])
        agent.observe(0, 0, 0.0, 1, False, False)
        agent.update()
        used = round(agent.table[0, 0] / 10.0) - 1
        assert agent.act(1) == used


def test_sarsa_uses_the_action_taken_when_act_comes_before_update():
    for seed in range(40):
        agent = Sarsa(2, 3, gamma=1.0, step_size=1.0, exploration=1.0, seed=seed)
        set_table(agent, [[0.0, 0.0, 0.0], [10.0, 20.0, 30.0]])
        agent.observe(0, 0, 0.0, 1, False, False)
        taken = agent.act(1)
        agent.update()
        assert agent.table[0, 0] == pytest.approx(10.0 * (taken + 1))


def test_sarsa_commitment_does_not_cross_episodes_or_masks():
    agent = Sarsa(2, 3, gamma=1.0, step_size=1.0, exploration=0.0, seed=0)
    set_table(agent, [[0.0, 0.0, 0.0], [0.0, 0.0, 5.0]])
    agent.observe(0, 0, 0.0, 1, False, False)
    agent.update()  # commits action 2 in state 1
    assert agent.act(1, mask=np.array([True, True, False])) in (0, 1)
    agent.observe(0, 0, 0.0, 1, False, True)  # truncated: episode ends, nothing committed
    agent.update()
    assert agent._committed is None


def test_double_q_learning_keeps_the_sum_of_its_tables():
    rng = np.random.default_rng(0)
    agent = DoubleQLearning(3, 2, gamma=0.9, step_size=0.3, exploration=0.2, seed=1)
    for _ in range(500):
        s, s2 = rng.integers(3, size=2)
        agent.observe(int(s), agent.act(int(s)), float(rng.normal()), int(s2),
                      bool(rng.random() < 0.1), False)
        agent.update()
    a, b = agent.tables
    np.testing.assert_allclose(agent._q, a + b, atol=1e-12)
    np.testing.assert_allclose(agent.table, (a + b) / 2)


@pytest.mark.parametrize("cls", LEARNERS)
def test_same_seed_same_run_different_seed_different_run(cls):
    def run(seed):
        agent = cls(5, 3, exploration=0.5, seed=seed)
        rng = np.random.default_rng(99)
        actions = []
        s = 0
        for _ in range(300):
            a = agent.act(s)
            actions.append(a)
            s2 = int(rng.integers(5))
            agent.observe(s, a, float(rng.normal()), s2, s2 == 4, False)
            agent.update()
            s = 0 if s2 == 4 else s2
        return actions, agent.table.copy()

    a1, t1 = run(3)
    a2, t2 = run(3)
    a3, _ = run(4)
    assert a1 == a2
    np.testing.assert_array_equal(t1, t2)
    assert a1 != a3


def test_help_shows_equation_and_reference():
    doc = QLearning.__doc__
    assert r"\max_{a" in doc and "Watkins" in doc
    for cls in (Sarsa, ExpectedSarsa, DoubleQLearning):
        assert "References" in cls.__doc__ and ".. math::" in cls.__doc__


def test_optimistic_and_random_initial_values():
    agent = QLearning(3, 2, initial_value=5.0, seed=0)
    assert np.all(agent.table == 5.0)
    a = QLearning(3, 2, initial_value=(-1.0, 1.0), seed=0).table
    b = QLearning(3, 2, initial_value=(-1.0, 1.0), seed=0).table
    np.testing.assert_array_equal(a, b)
    assert a.min() >= -1.0 and a.max() < 1.0 and len(np.unique(a)) == 6
    with pytest.raises(ValueError, match="initial_value"):
        QLearning(3, 2, initial_value=(1.0, -1.0))


def test_visit_count_step_size_averages_samples():
    # alpha = 1/n makes Q(s,a) the sample mean of its targets (terminal transitions).
    agent = QLearning(1, 1, step_size=tdkit.schedules.VisitCount(power=1.0), seed=0)
    rewards = [3.0, -1.0, 7.0, 2.0]
    for r in rewards:
        agent.observe(0, 0, r, 0, True, False)
        agent.update()
    assert agent.table[0, 0] == pytest.approx(np.mean(rewards))
    assert agent.visits[0, 0] == 4

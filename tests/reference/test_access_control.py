"""The access-control queuing task (Sutton & Barto 2018, Example 10.2, recalled from memory).

Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An Introduction,
2nd ed., MIT Press, Section 10.3, Example 10.2 and Figure 10.5: 10 servers,
priorities paying 1, 2, 4, 8 equally likely, a busy server frees with
probability 0.06 per step, the customer at the head of the queue is accepted
or rejected. Figure 10.5 (recalled from memory) shows a threshold policy: the
highest priority is accepted whenever a server is free, lower priorities only
when enough servers are free.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import linprog

import tdkit
from tdkit import InvalidParameterError, policy_gain, relative_value_iteration
from tdkit.envs.access_control import (
    ACCEPT,
    REJECT,
    access_control,
    access_control_env,
    decode_state,
)

N_SERVERS, N_PRIORITIES, P_FREE = 10, 4, 0.06
PAYMENTS = (1.0, 2.0, 4.0, 8.0)


@pytest.fixture(scope="module")
def mdp():
    return access_control()


@pytest.fixture(scope="module")
def solution(mdp):
    return relative_value_iteration(mdp)


def _free(mdp):
    return np.array([decode_state(s)[0] for s in range(mdp.n_states)])


def test_the_model_follows_the_description(mdp):
    free = _free(mdp)
    priority = np.array([decode_state(s)[1] for s in range(mdp.n_states)])
    assert mdp.n_states == (N_SERVERS + 1) * N_PRIORITIES
    assert not mdp.terminal.any()
    # Rewards: the priority's payment when accepted with a free server, else 0.
    np.testing.assert_array_equal(mdp.R[:, REJECT], 0.0)
    np.testing.assert_array_equal(
        mdp.R[:, ACCEPT], np.where(free > 0, np.array(PAYMENTS)[priority], 0.0)
    )
    # Busy servers free independently with probability 0.06 (binomial), so the expected
    # number of free servers next step is f' + (10 - f') * 0.06 with f' the count after
    # the decision; the next priority is uniform.
    next_free = mdp.P @ free
    after_reject = free
    after_accept = np.maximum(free - 1, 0)
    np.testing.assert_allclose(next_free[:, REJECT],
                               after_reject + (N_SERVERS - after_reject) * P_FREE)
    np.testing.assert_allclose(next_free[:, ACCEPT],
                               after_accept + (N_SERVERS - after_accept) * P_FREE)
    next_priority = mdp.P.reshape(mdp.n_states, 2, N_SERVERS + 1, N_PRIORITIES).sum(axis=2)
    np.testing.assert_allclose(next_priority, 1.0 / N_PRIORITIES)
    # With no free server the customer is rejected whatever the action.
    none_free = free == 0
    np.testing.assert_array_equal(mdp.P[none_free, REJECT], mdp.P[none_free, ACCEPT])


def test_the_exact_gain_matches_a_linear_program(mdp, solution):
    # Independent: the average-reward LP over state-action frequencies (Puterman,
    # M. L. (1994), Markov Decision Processes, Wiley, Section 8.8.2), with scipy.
    n, m = mdp.n_states, mdp.n_actions
    flow = np.zeros((n, n * m))
    for s in range(n):
        for a in range(m):
            flow[:, s * m + a] -= mdp.P[s, a]
            flow[s, s * m + a] += 1.0
    res = linprog(-mdp.R.ravel(), A_eq=np.vstack([flow, np.ones(n * m)]),
                  b_eq=np.append(np.zeros(n), 1.0), bounds=(0, None), method="highs")
    assert res.status == 0
    # HiGHS solves to its default feasibility tolerance 1e-7, rewards reach 8: 1e-6.
    assert solution.gain == pytest.approx(-res.fun, abs=1e-6)
    assert policy_gain(mdp, solution.policy) == pytest.approx(solution.gain, abs=1e-8)


def test_the_optimal_policy_has_the_threshold_structure_of_figure_10_5(mdp, solution):
    # Sutton & Barto 2018, Figure 10.5 (recalled from memory): accept the highest
    # priority whenever a server is free; accept a lower priority only when at least
    # a threshold number of servers is free; the threshold falls as priority rises.
    free = _free(mdp)
    q = solution.q.reshape(N_SERVERS + 1, N_PRIORITIES, 2)
    accept = q[..., ACCEPT] > q[..., REJECT] + 1e-9  # strict: ties only where no server is free
    np.testing.assert_allclose(q[0, :, ACCEPT], q[0, :, REJECT], atol=1e-9)
    assert accept[1:, -1].all(), "the highest priority must be accepted whenever possible"
    thresholds = []
    for p in range(N_PRIORITIES):
        column = accept[1:, p]  # free = 1..10
        first = int(np.argmax(column)) if column.any() else N_SERVERS
        assert (column[first:]).all() and not column[:first].any(), (
            f"priority {PAYMENTS[p]:g}: accepted for free servers {np.flatnonzero(column) + 1}, "
            "not a threshold"
        )
        thresholds.append(first + 1)
    assert thresholds == sorted(thresholds, reverse=True)
    assert thresholds[0] > thresholds[-1]  # lower priorities really are held back
    assert free.shape == (mdp.n_states,)


def test_the_environment_never_terminates():
    env = access_control_env()
    obs, _ = env.reset(seed=0)
    assert decode_state(obs)[0] == N_SERVERS  # every server free at the start
    rng = np.random.default_rng(0)
    total = 0.0
    for _ in range(2000):
        obs, reward, terminated, truncated, _ = env.step(int(rng.integers(2)))
        assert not terminated and not truncated
        total += reward
    assert total > 0
    assert env.unwrapped.mdp.n_states == 44


def test_bad_parameters_are_refused():
    with pytest.raises(InvalidParameterError, match="n_servers"):
        access_control(n_servers=0)
    with pytest.raises(InvalidParameterError, match="p_free"):
        access_control(p_free=1.5)
    with pytest.raises(InvalidParameterError, match="payments"):
        access_control(payments=())
    with pytest.raises(InvalidParameterError, match="payments"):
        access_control(payments="1248")


def test_reachable_from_the_catalogue():
    assert tdkit.envs.problems.access_control is access_control


def _greedy(table):
    """The agent's greedy policy as act(explore=False) plays it: uniform over tied maxima
    (a first-index argmax would read pairs never tried, still tied at 0, as "reject")."""
    best = table == table.max(axis=1, keepdims=True)
    return best / best.sum(axis=1, keepdims=True)


def test_differential_q_learning_reaches_near_the_exact_gain(mdp, solution):
    """The greedy policy of Differential Q-learning (Wan, Naik & Sutton 2021, ICML) after
    40,000 steps earns within a quarter of the gap between the optimum and accepting
    everyone, i.e. within 0.14 of the exact gain 2.7476 (5%).

    Margin: ``python benchmarks/access_control_gains.py`` with this setting measured,
    for the greedy policy read with a first-index argmax, a gap (as that fraction) of
    mean 0.023 and maximum 0.113 over seeds 0-99, but 2 of seeds 100-299 above 0.25,
    one near gain 0: untried states whose two values are still tied at 0 were read as
    "reject", and a chain that reaches them with every server free stays there. Read as
    the agent acts (ties uniform), as here and in the script now: seeds 100-199 give a
    mean of 0.023 and a maximum of 0.104, 0 of 100 above 0.25 (one-sided 95% bound on
    the failure rate: 3%; not derived for 1/1000).
    The seed is fixed, so the test is deterministic. Exploration 0.1 (common practice)
    and step sizes 1 / n(s, a)^0.6 (Even-Dar & Mansour 2003, "Learning rates for
    Q-learning", JMLR 5).
    """
    from tdkit.schedules import VisitCount

    env = access_control_env()
    agent = tdkit.DifferentialQLearning.for_env(
        env, step_size=VisitCount(0.6), reward_step_size=0.1, exploration=0.1, seed=0
    )
    tdkit.train(agent, env, steps=40_000, seed=0)
    everyone = policy_gain(mdp, np.full(mdp.n_states, ACCEPT))
    greedy = policy_gain(mdp, _greedy(agent.table))
    assert solution.gain - greedy <= 0.25 * (solution.gain - everyone)
    assert greedy > everyone

"""The ε-greedy Bellman operator and action masks in the exact solvers.

The fixed point of the ε-greedy operator (what Expected SARSA converges to
under constant exploration) is checked against an independent computation
written here with numpy only: ε-soft policy iteration with dense linear
solves (Sutton & Barto 2018, Reinforcement Learning: An Introduction, 2nd ed.,
Section 5.4: the fixed point of ε-soft policy improvement satisfies exactly
the ε-greedy Bellman equation). Bounds: ``value_iteration`` states
``||v - v_fixed|| < tol / 2`` (Puterman 1994, Theorem 6.3.1 applied to the
ε-greedy operator, a gamma-contraction); rounding slack ``_ROUND`` as derived
in ``tests/unit/test_dp.py`` (models here have the same sizes, rewards and gamma).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tdkit._errors import InvalidParameterError
from tdkit.dp import (
    bellman_residual,
    epsilon_greedy_policy,
    evaluate_policy,
    greedy_policy,
    policy_iteration,
    value_iteration,
)
from tdkit.envs.finite import FiniteMDP
from tdkit.envs.problems import cliff_walking
from tdkit.testing.strategies import finite_mdps

_ROUND = 1e-10
_TOL = 1e-8

MDPS = finite_mdps(n_states=(1, 6), n_actions=(1, 4), gamma=(0.0, 0.95))
PROPER_MDPS = finite_mdps(n_states=(2, 6), n_actions=(1, 3), gamma=1.0, min_termination=0.2)


def _with_masks(mdp: FiniteMDP, bits: list[bool]) -> FiniteMDP:
    """The same model with action masks from ``bits`` (each row keeps an action)."""
    n, m = mdp.n_states, mdp.n_actions
    masks = np.array((bits * (n * m))[: n * m], dtype=bool).reshape(n, m)
    masks[np.arange(n), np.arange(n) % m] = True
    return FiniteMDP(mdp.P, mdp.R, gamma=mdp.gamma, terminal=mdp.terminal, masks=masks)


MASKED_MDPS = st.builds(_with_masks, MDPS, st.lists(st.booleans(), min_size=1, max_size=24))


def _soft_policy_iteration(P, R, gamma, terminal, allowed, epsilon):
    """Independent ε-soft policy iteration on dense arrays (numpy only).

    Evaluate pi = epsilon uniform over allowed actions + (1 - epsilon) on one
    greedy action by solving (I - gamma P_pi) v = r_pi on non-terminal states,
    then switch to a strictly better allowed action (by more than 1e-12).
    """
    n = R.shape[0]
    rows = np.arange(n)
    policy = np.argmax(allowed, axis=1)
    live = ~terminal
    for _ in range(500):
        pi = epsilon * allowed / allowed.sum(axis=1, keepdims=True)
        pi[rows, policy] += 1.0 - epsilon
        p_pi = np.einsum("sa,sat->st", pi, P)
        r_pi = (pi * R).sum(axis=1)
        v = np.zeros(n)
        system = np.eye(live.sum()) - gamma * p_pi[np.ix_(live, live)]
        v[live] = np.linalg.solve(system, r_pi[live])
        q = R + gamma * np.einsum("sat,t->sa", P, v)
        q[terminal] = 0.0
        q = np.where(allowed, q, -np.inf)
        better = q[rows, policy] < q.max(axis=1) - 1e-12
        if not better.any():
            return v, q
        policy = np.where(better, np.argmax(q, axis=1), policy)
    raise AssertionError("independent policy iteration did not stabilise")


def _independent(mdp, epsilon):
    allowed = np.ones((mdp.n_states, mdp.n_actions), bool) if mdp.masks is None else mdp.masks
    return _soft_policy_iteration(
        np.asarray(mdp.P), np.asarray(mdp.R), mdp.gamma, mdp.terminal, allowed, epsilon
    )


# ---------------------------------------------------------------- the ε-greedy fixed point
@settings(max_examples=80, deadline=None)
@given(MASKED_MDPS, st.sampled_from([0.0, 0.05, 0.3, 1.0]))
def test_epsilon_greedy_fixed_point_matches_soft_policy_iteration(mdp, epsilon):
    v_ref, q_ref = _independent(mdp, epsilon)
    sol = value_iteration(mdp, tol=_TOL, exploration=epsilon)
    assert sol.operator == ("optimality" if epsilon == 0 else f"epsilon-greedy({epsilon!r})")
    assert sol.exploration == epsilon
    assert np.max(np.abs(sol.v - v_ref)) < _TOL / 2 + _ROUND
    assert sol.error_bound < _TOL / 2
    allowed = np.isfinite(q_ref)
    np.testing.assert_array_equal(np.isfinite(sol.q), allowed)  # -inf exactly on masked
    # q = R + gamma P v: within gamma * tol / 2 of the reference.
    assert np.max(np.abs(sol.q[allowed] - q_ref[allowed])) < _TOL / 2 + _ROUND
    exact = policy_iteration(mdp, exploration=epsilon)
    # Policy iteration's values are exact up to rounding; its improvement
    # threshold atol = 1e-12 costs at most 1e-12 / (1 - 0.95) = 2e-11.
    assert np.max(np.abs(exact.v - v_ref)) < _ROUND
    assert exact.method == "policy_iteration" and exact.error_bound == 0.0


@settings(max_examples=40, deadline=None)
@given(PROPER_MDPS, st.sampled_from([0.1, 0.5]))
def test_epsilon_greedy_fixed_point_undiscounted(mdp, epsilon):
    """gamma = 1 with every pair terminating w.p. >= 0.2: T_eps has modulus 0.8,
    so a change < tol puts v within 0.8 / 0.2 * tol = 4 tol of the fixed point."""
    v_ref, _ = _independent(mdp, epsilon)
    sol = value_iteration(mdp, tol=_TOL, exploration=epsilon)
    assert np.max(np.abs(sol.v - v_ref)) < 4 * _TOL + _ROUND
    assert np.max(np.abs(policy_iteration(mdp, exploration=epsilon).v - v_ref)) < _ROUND


@settings(max_examples=60, deadline=None)
@given(MDPS, st.sampled_from([0.1, 0.5]))
def test_fixed_point_is_the_value_of_its_own_epsilon_greedy_policy(mdp, epsilon):
    """v = v_pi for pi = ε-greedy(q) with ties sharing the greedy mass.

    Policy iteration gives the exact fixed point; its ε-greedy policy (ties
    within 1e-9 grouped) is evaluated exactly. A tie grouped by mistake costs
    at most 1e-9 / (1 - 0.95) = 2e-8.
    """
    sol = policy_iteration(mdp, exploration=epsilon)
    pi = epsilon_greedy_policy(sol.q, epsilon)
    assert np.max(np.abs(evaluate_policy(mdp, pi) - sol.v)) < 2e-8 + _ROUND
    assert bellman_residual(mdp, sol.v, pi) < 2e-8 + _ROUND


def test_one_state_bandit_by_hand():
    # Rewards 1 and 0, gamma 0.5. T_eps v = (1 - eps) * 1 + eps * 0.5 + 0.5 v, so
    # v = (1 - eps / 2) / 0.5: eps = 0.2 -> 1.8; the optimum is 1 / 0.5 = 2.
    bandit = FiniteMDP(np.ones((1, 2, 1)), [[1.0, 0.0]], gamma=0.5)
    assert value_iteration(bandit, exploration=0.2).v[0] == pytest.approx(1.8, abs=1e-10)
    assert value_iteration(bandit).v[0] == pytest.approx(2.0, abs=1e-10)
    # With action 0 masked the only policy takes action 1: v = 0.
    masked = FiniteMDP(np.ones((1, 2, 1)), [[1.0, 0.0]], gamma=0.5, masks=[[False, True]])
    sol = value_iteration(masked, exploration=0.2)
    assert sol.v[0] == 0.0 and sol.q[0, 0] == -np.inf and sol.policy[0] == 1


def test_cliff_walking_epsilon_greedy_takes_the_safer_path():
    """Sutton & Barto (2018), Example 6.6 (Figure 6.4): with ε = 0.1 exploration
    on-policy control learns the safer path away from the cliff, Q-learning the
    optimal path along its edge (return -13 from the start)."""
    mdp = cliff_walking()
    up, right = 0, 1
    optimal = policy_iteration(mdp)
    soft = policy_iteration(mdp, exploration=0.1)
    start = 36
    assert optimal.v[start] == pytest.approx(-13.0)
    assert soft.v[start] < optimal.v[start] - 1.0  # exploring near the cliff costs
    edge = np.arange(24, 34)  # row 2, columns 0-9, directly above the cliff
    assert (optimal.policy[edge] == right).all()
    assert (soft.policy[edge] == up).all()
    vi = value_iteration(mdp, exploration=0.1, tol=1e-9)
    assert np.max(np.abs(vi.v - soft.v)) < 1e-7


def test_epsilon_greedy_policy_shares_ties_and_respects_masks():
    pi = epsilon_greedy_policy([[1.0, 2.0, 2.0, 0.0]], 0.2)
    np.testing.assert_allclose(pi, [[0.05, 0.45, 0.45, 0.05]])
    pi = epsilon_greedy_policy([[5.0, 2.0, 2.0]], 0.3, masks=[[False, True, True]])
    np.testing.assert_allclose(pi, [[0.0, 0.5, 0.5]])
    with pytest.raises(InvalidParameterError, match="epsilon must be in"):
        epsilon_greedy_policy([[1.0]], 1.5)


def test_exploration_is_validated():
    mdp = FiniteMDP(np.ones((1, 2, 1)), [[1.0, 0.0]], gamma=0.5)
    for bad in (-0.1, 1.5, "0.1", True):
        with pytest.raises(InvalidParameterError, match="exploration"):
            value_iteration(mdp, exploration=bad)
    with pytest.raises(InvalidParameterError, match="exploration"):
        policy_iteration(mdp, exploration=2.0)


# ---------------------------------------------------------------- masks in the solvers
@settings(max_examples=60, deadline=None)
@given(MASKED_MDPS)
def test_masked_actions_never_enter_the_solution(mdp):
    sol = policy_iteration(mdp)
    vi = value_iteration(mdp, tol=_TOL)
    masks = mdp.masks
    assert masks[np.arange(mdp.n_states), sol.policy].all()
    assert masks[np.arange(mdp.n_states), vi.policy].all()
    assert (sol.q[~masks] == -np.inf).all()
    assert np.max(np.abs(vi.v - sol.v)) < _TOL / 2 + _ROUND
    # v* of the masked model equals v* of the model restricted by brute force:
    # the best allowed deterministic policy (PI on the same model without the
    # masked actions' rewards being reachable: their rewards set to -1e6).
    penalised = FiniteMDP(
        mdp.P, np.where(masks, mdp.R, -1e6), gamma=mdp.gamma, terminal=mdp.terminal
    )
    assert np.max(np.abs(policy_iteration(penalised).v - sol.v)) < 1e-8
    assert bellman_residual(mdp, sol.q) < 1e-9
    assert greedy_policy(sol.q).policy.tolist() == sol.policy.tolist()


def test_evaluate_policy_refuses_a_masked_action():
    P = np.zeros((2, 2, 2))
    P[0, :, 1] = 1.0
    mdp = FiniteMDP(P, [[1.0, 5.0], [0.0, 0.0]], gamma=0.9, terminal=[False, True],
                    masks=[[True, False], [True, True]])
    assert evaluate_policy(mdp, [0, 1]).tolist() == [1.0, 0.0]  # terminal rows: any action
    with pytest.raises(InvalidParameterError, match=r"action 1 in state 0.*masks"):
        evaluate_policy(mdp, [1, 0])
    assert mdp.masks[1].all()


# ---------------------------------------------------------------- Expected SARSA's fixed point
@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("masked", [False, True])
def test_expected_sarsa_expected_update_is_the_epsilon_greedy_operator(seed, masked):
    """Differential check: tdkit.ExpectedSarsa's target, averaged over the model's
    successors, is the ε-greedy Bellman operator of tdkit.dp, so the fixed point
    that ``value_iteration(exploration=ε)`` computes is a fixed point of the
    learner's expected update (van Seijen et al. 2009, "A theoretical and
    empirical analysis of Expected Sarsa") and Q* is not.

    With step size 1 an update sets Q(s, a) to the target itself, so each
    successor's target is read off exactly; no sampling, no margin beyond
    rounding (sums of <= 3 terms of size <= 10: 1e-12).
    """
    import tdkit

    epsilon = 0.2
    mdp = tdkit.envs.problems.garnet(8, 3, 3, gamma=0.9, seed=seed)
    if masked:
        nxt, probs, _ = mdp.successors
        masks = np.ones((8, 3), dtype=bool)
        masks[np.arange(8), np.arange(8) % 3] = False
        mdp = FiniteMDP.from_successors(nxt, probs, mdp.R, gamma=0.9, masks=masks)
    next_states, probs, rewards = mdp.successors
    allowed = np.ones((8, 3), dtype=bool) if mdp.masks is None else mdp.masks

    def expected_update(table):
        agent = tdkit.ExpectedSarsa(8, 3, gamma=0.9, step_size=1.0, exploration=epsilon, seed=0)
        out = np.zeros((8, 3))
        for s, a in zip(*np.nonzero(allowed), strict=True):
            for k in np.flatnonzero(probs[s, a] > 0):
                agent._q[...] = table  # white-box: set the learned table directly
                s2 = int(next_states[s, a, k])
                agent.observe(int(s), int(a), float(rewards[s, a, k]), s2, False, False,
                              next_mask=None if mdp.masks is None else allowed[s2].copy())
                agent.update()
                out[s, a] += probs[s, a, k] * agent.table[s, a]
        return out

    fixed = policy_iteration(mdp, exploration=epsilon).q
    table = np.where(allowed, fixed, 0.0)
    gap = np.abs(expected_update(table) - table)[allowed]
    assert gap.max() < 1e-12
    optimal = np.where(allowed, policy_iteration(mdp).q, 0.0)
    assert np.abs(expected_update(optimal) - optimal)[allowed].max() > 1e-3

"""``tdkit.solve``: every method gives the exact answer within its stated bound.

The reference is policy iteration (exact up to rounding: dense solves; the
rounding slack ``_ROUND`` is derived in ``tests/unit/test_dp.py`` for these sizes,
rewards in [-1, 1] and gamma <= 0.95). The bound under test is the one each
method states: ``||v - v_fixed|| <= error_bound < tol / 2`` (Puterman 1994,
Markov Decision Processes, Theorem 6.3.1 for value iteration; Section 6.6.3,
the MacQueen-Porteus bounds, for modified policy iteration and Gauss-Seidel),
``q`` within ``gamma * error_bound``, and a greedy policy within ``tol`` of
the optimum.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import tdkit
from tdkit._errors import InvalidParameterError
from tdkit.dp import ConvergenceError, evaluate_policy, policy_iteration, value_iteration
from tdkit.dp_solve import METHODS, solve
from tdkit.envs.finite import FiniteMDP
from tdkit.envs.problems import garnet, gridworld_4x4
from tdkit.testing.strategies import finite_mdps

_ROUND = 1e-10
_TOL = 1e-7
_ITERATIVE = ("modified_policy_iteration", "gauss_seidel", "value_iteration")

MDPS = finite_mdps(n_states=(1, 6), n_actions=(1, 3), gamma=(0.0, 0.95))


def _with_masks(mdp: FiniteMDP, bits: list[bool]) -> FiniteMDP:
    n, m = mdp.n_states, mdp.n_actions
    masks = np.array((bits * (n * m))[: n * m], dtype=bool).reshape(n, m)
    masks[np.arange(n), np.arange(n) % m] = True
    if mdp.is_sparse:
        nxt, probs, _ = mdp.successors
        return FiniteMDP.from_successors(
            nxt, probs, mdp.R, gamma=mdp.gamma, terminal=mdp.terminal, masks=masks
        )
    return FiniteMDP(mdp.P, mdp.R, gamma=mdp.gamma, terminal=mdp.terminal, masks=masks)


ANY_MDPS = st.one_of(
    MDPS, st.builds(_with_masks, MDPS, st.lists(st.booleans(), min_size=1, max_size=18))
)


def _soft(policy, epsilon, mdp):
    allowed = np.ones((mdp.n_states, mdp.n_actions)) if mdp.masks is None else mdp.masks * 1.0
    probs = epsilon * allowed / allowed.sum(axis=1, keepdims=True)
    probs[np.arange(mdp.n_states), policy] += 1.0 - epsilon
    return probs


@settings(max_examples=100, deadline=None)
@given(ANY_MDPS, st.sampled_from(_ITERATIVE), st.sampled_from([0.0, 0.2]))
def test_every_method_meets_its_stated_bound(mdp, method, epsilon):
    exact = policy_iteration(mdp, exploration=epsilon)
    sol = solve(mdp, method=method, tol=_TOL, exploration=epsilon)
    assert sol.method == method and sol.exploration == epsilon
    assert sol.error_bound < _TOL / 2
    assert np.max(np.abs(sol.v - exact.v)) <= sol.error_bound + _ROUND
    allowed = np.isfinite(exact.q)
    np.testing.assert_array_equal(np.isfinite(sol.q), allowed)
    gap_q = np.max(np.abs(sol.q[allowed] - exact.q[allowed]))
    assert gap_q <= mdp.gamma * sol.error_bound + _ROUND
    # The greedy (ε-greedy) policy of the solution is tol-optimal for its operator.
    v_policy = evaluate_policy(mdp, _soft(sol.policy, epsilon, mdp))
    assert np.all(v_policy >= exact.v - _TOL - _ROUND)
    assert np.all(sol.v[mdp.terminal] == 0.0)


@settings(max_examples=40, deadline=None)
@given(MDPS)
def test_auto_and_policy_iteration_are_exact(mdp):
    exact = policy_iteration(mdp)
    for method in ("auto", "policy_iteration"):
        sol = solve(mdp, method=method)
        assert np.max(np.abs(sol.v - exact.v)) < _TOL / 2 + _ROUND


def test_large_sparse_garnet_all_methods_agree_within_their_bounds():
    # 3000 states (Archibald, McKinnon & Thomas 1995 Garnet) with gamma 0.95:
    # plain value iteration (bound tol / 2) against the certified methods.
    mdp = garnet(3000, 4, 8, gamma=0.95, seed=5)
    tol = 1e-6
    reference = value_iteration(mdp, tol=tol)
    for method in ("modified_policy_iteration", "gauss_seidel", "auto"):
        sol = solve(mdp, method=method, tol=tol)
        assert sol.error_bound < tol / 2
        assert np.max(np.abs(sol.v - reference.v)) <= sol.error_bound + reference.error_bound
    assert solve(mdp, tol=tol).method == "modified_policy_iteration"
    # Fewer full backups than value iteration: the span certificate settles long
    # before the sup norm of the change does (0.95^k shrinks slowly).
    assert solve(mdp, tol=tol).iterations * 2 < reference.iterations


def test_auto_switches_and_says_so():
    assert solve(gridworld_4x4()).method == "policy_iteration"  # gamma = 1
    P = np.zeros((2, 1, 2))
    P[0, 0, 1] = P[1, 0, 0] = 1.0
    near_one = FiniteMDP(P, [[1.0], [0.0]], gamma=0.999999)
    sol = solve(near_one)
    assert sol.method == "policy_iteration"
    np.testing.assert_allclose(sol.v[0], 1.0 / (1.0 - 0.999999**2), rtol=1e-8)
    with pytest.raises(ConvergenceError, match="modified_policy_iteration"):
        solve(near_one, method="modified_policy_iteration", max_iterations=20)


def test_bad_arguments():
    mdp = garnet(20, 2, 3, gamma=0.9, seed=0)
    with pytest.raises(InvalidParameterError, match="method must be one of"):
        solve(mdp, method="fastest")
    with pytest.raises(InvalidParameterError, match="gamma < 1"):
        solve(gridworld_4x4(), method="gauss_seidel")
    with pytest.raises(InvalidParameterError, match="evaluation_sweeps"):
        solve(mdp, evaluation_sweeps=0)
    assert set(METHODS) >= {"auto", "modified_policy_iteration", "gauss_seidel"}
    assert tdkit.solve is solve

"""Exact solvers: Bellman properties over random finite MDPs, and unit checks.

Properties (issue 3) are checked over models drawn by
``tdkit.testing.strategies.finite_mdps``. Tolerances: the solver bounds are
stated in ``tdkit.dp`` (Puterman 1994, Markov Decision Processes, Theorem
6.3.1; Williams & Baird 1993); on top of them we allow ``_ROUND``, a bound
on floating-point rounding derived below.
"""

from __future__ import annotations

import sys
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from tdkit._errors import InvalidParameterError
from tdkit.dp import (
    ConvergenceError,
    Solution,
    action_values,
    bellman_expectation_operator,
    bellman_optimality_operator,
    bellman_residual,
    evaluate_policy,
    greedy_policy,
    policy_iteration,
    value_iteration,
)
from tdkit.envs.finite import FiniteMDP
from tdkit.envs.problems import garnet, gridworld_4x4, gridworld_5x5
from tdkit.testing.strategies import finite_mdps, policies

# Rewards are in [-1, 1] and gamma <= 0.95, so |v| <= 1 / (1 - 0.95) = 20. A
# dense solve of (I - gamma P) v = r has sup-norm condition number at most
# (1 + gamma) / (1 - gamma) <= 39, so its relative error is below
# 39 * S * eps ~ 39 * 6 * 2.2e-16 ~ 5e-14, i.e. absolute error < 1e-12 at
# |v| <= 20; sums of S <= 6 terms add ~ 6 eps * 20 ~ 3e-14. _ROUND = 1e-10
# leaves two orders of magnitude of headroom and is still far below every
# tolerance under test (>= 1e-7).
_ROUND = 1e-10
_TOL = 1e-6

MDPS = finite_mdps(n_states=(1, 6), n_actions=(1, 3), gamma=(0.0, 0.95))
PROPER_MDPS = finite_mdps(n_states=(2, 6), n_actions=(1, 3), gamma=1.0, min_termination=0.2)


def _optimal_values(mdp):
    return policy_iteration(mdp).v


# ---------------------------------------------------------------- properties
@settings(max_examples=80, deadline=None)
@given(MDPS)
def test_value_iteration_meets_its_stated_bound(mdp):
    """||v - v*|| < tol / 2, residual < tol (1 - gamma) / 2, greedy policy tol-optimal."""
    sol = value_iteration(mdp, tol=_TOL)
    v_star = _optimal_values(mdp)
    assert np.max(np.abs(sol.v - v_star)) < _TOL / 2 + _ROUND
    assert sol.residual < _TOL * (1 - mdp.gamma) / 2 + _ROUND
    assert sol.residual == pytest.approx(bellman_residual(mdp, sol.v), abs=1e-15)
    v_greedy = evaluate_policy(mdp, sol.policy)
    assert np.all(v_greedy >= v_star - _TOL - _ROUND)


@settings(max_examples=80, deadline=None)
@given(MDPS.flatmap(lambda m: st.tuples(st.just(m), policies(m))))
def test_evaluate_policy_solves_the_expectation_equation(case):
    mdp, policy = case
    v = evaluate_policy(mdp, policy)
    assert np.max(np.abs(bellman_expectation_operator(mdp, v, policy) - v)) < _ROUND
    assert bellman_residual(mdp, v, policy) < _ROUND
    assert np.all(v[mdp.terminal] == 0.0)
    # Iterative evaluation stops when the change is below tol (1 - gamma) / gamma,
    # which bounds its error by tol; the sparse solver bounds it by tol too.
    iterative = evaluate_policy(mdp, policy, method="iterative", tol=1e-9)
    assert np.max(np.abs(iterative - v)) < 1e-9 + _ROUND
    krylov = evaluate_policy(mdp, policy, method="sparse", tol=1e-9)
    assert np.max(np.abs(krylov - v)) < 1e-9 + _ROUND


@settings(max_examples=80, deadline=None)
@given(
    MDPS.flatmap(
        lambda m: st.tuples(
            st.just(m),
            hnp.arrays(np.float64, (2, m.n_states), elements=st.floats(-100, 100)),
        )
    )
)
def test_optimality_operator_is_a_gamma_contraction(case):
    """||T u - T w|| <= gamma ||u - w|| (Puterman 1994, Proposition 6.2.4).

    Rounding: T evaluates R + gamma * sum of <= 6 products of values <= 100,
    each with error <= 8 eps * 100 < 2e-13 per component; slack 1e-12.
    """
    mdp, (u, w) = case
    u, w = u.copy(), w.copy()
    u[mdp.terminal] = w[mdp.terminal] = 0.0  # terminal values are 0 by definition
    gap = np.max(np.abs(bellman_optimality_operator(mdp, u) - bellman_optimality_operator(mdp, w)))
    assert gap <= mdp.gamma * np.max(np.abs(u - w), initial=0.0) + 1e-12


@settings(max_examples=60, deadline=None)
@given(MDPS)
def test_greedy_policy_of_q_star_has_value_v_star(mdp):
    sol = policy_iteration(mdp)
    greedy = greedy_policy(sol.q)
    # Every maximiser is within 1e-9 of the max, so each greedy policy (the
    # deterministic one and the uniform mixture over ties) loses at most
    # 1e-9 / (1 - gamma) <= 2e-8 (Singh & Yee 1994, "An upper bound on the
    # loss from approximate optimal-value functions", Machine Learning 16).
    for policy in (greedy.policy, greedy.stochastic()):
        assert np.max(np.abs(evaluate_policy(mdp, policy) - sol.v)) < 2e-8 + _ROUND


@settings(max_examples=60, deadline=None)
@given(MDPS)
def test_policy_iteration_and_value_iteration_agree(mdp):
    pi_sol = policy_iteration(mdp)
    vi_sol = value_iteration(mdp, tol=_TOL)
    assert np.max(np.abs(pi_sol.v - vi_sol.v)) < _TOL / 2 + _ROUND
    assert pi_sol.residual < _ROUND


@settings(max_examples=60, deadline=None)
@given(MDPS.flatmap(lambda m: st.tuples(st.just(m), policies(m))))
def test_no_policy_beats_v_star(case):
    mdp, policy = case
    assert np.all(evaluate_policy(mdp, policy) <= _optimal_values(mdp) + _ROUND)


@settings(max_examples=60, deadline=None)
@given(PROPER_MDPS.flatmap(lambda m: st.tuples(st.just(m), policies(m))))
def test_undiscounted_models_with_proper_policies(case):
    """gamma = 1: evaluation on non-terminal states, PI = VI, no policy beats v*.

    Every pair terminates with probability >= 0.2 per step, so T is a
    contraction with modulus 0.8 and VI's residual stop (< tol) puts v within
    tol / 0.2 = 5 tol of v*.
    """
    mdp, policy = case
    v = evaluate_policy(mdp, policy)
    assert bellman_residual(mdp, v, policy) < _ROUND
    iterative = evaluate_policy(mdp, policy, method="iterative", tol=1e-10)
    # Change < 1e-10 with modulus 0.8: error <= 0.8 / 0.2 * 1e-10 = 4e-10.
    assert np.max(np.abs(iterative - v)) < 4e-10 + _ROUND
    v_star = _optimal_values(mdp)
    assert np.all(v <= v_star + _ROUND)
    vi = value_iteration(mdp, tol=_TOL)
    assert np.max(np.abs(vi.v - v_star)) < 5 * _TOL + _ROUND


@settings(max_examples=40, deadline=None)
@given(MDPS)
def test_solvers_give_the_same_answers_on_dense_and_sparse_forms(mdp):
    other = mdp.to_dense() if mdp.is_sparse else mdp.to_sparse()
    for solve in (policy_iteration, value_iteration):
        a, b = solve(mdp), solve(other)
        np.testing.assert_allclose(a.v, b.v, atol=1e-9)
        np.testing.assert_allclose(a.q, b.q, atol=1e-9)


# ---------------------------------------------------------------- unit checks
def _two_state():
    """State 0: action 0 stays (reward 0), action 1 ends with reward 1; state 1 terminal."""
    P = np.zeros((2, 2, 2))
    P[0, 0, 0] = P[0, 1, 1] = 1.0
    return FiniteMDP(P, [[0.0, 1.0], [0.0, 0.0]], gamma=0.9, terminal=[False, True])


def test_action_values_ignore_values_given_to_terminal_states():
    q = action_values(_two_state(), np.array([10.0, 1e6]))
    np.testing.assert_allclose(q, [[9.0, 1.0], [0.0, 0.0]])


def test_solution_fields():
    sol = value_iteration(_two_state())
    assert isinstance(sol, Solution)
    np.testing.assert_allclose(sol.v, [1.0, 0.0], atol=1e-10)
    assert sol.policy.tolist() == [1, 0]
    assert sol.q.shape == (2, 2) and sol.iterations >= 1
    with pytest.raises(ValueError, match="read-only"):
        sol.v[0] = 3.0


def test_bellman_residual_on_q_and_v():
    mdp = _two_state()
    q_star = np.array([[0.9, 1.0], [0.0, 0.0]])
    assert bellman_residual(mdp, q_star) == pytest.approx(0.0, abs=1e-15)
    assert bellman_residual(mdp, np.zeros((2, 2))) == pytest.approx(1.0)
    # Under the policy "always stay", q(0, 0) = 0 is consistent, q(0, 1) = 1 too.
    assert bellman_residual(mdp, np.array([[0.0, 1.0], [0.0, 0.0]]), policy=[0, 0]) == 0.0
    assert bellman_residual(mdp, np.array([1.0, 0.0])) == pytest.approx(0.0, abs=1e-15)


def test_greedy_policy_reports_ties():
    greedy = greedy_policy([[1.0, 1.0 + 1e-12, 0.0], [2.0, 3.0, 3.0]], atol=1e-9)
    assert greedy.policy.tolist() == [0, 1]
    assert greedy.ties.tolist() == [True, True]
    np.testing.assert_allclose(greedy.stochastic(), [[0.5, 0.5, 0], [0, 0.5, 0.5]])
    assert greedy_policy([[1.0, 1.0 + 1e-12]], atol=0.0).ties.tolist() == [False]


def test_value_iteration_error_bound_on_a_textbook_problem():
    # Sutton & Barto (2018), Example 3.5 gridworld with a loose tolerance: the
    # stated bound ||v - v*|| < tol / 2 must hold where it is not trivially met.
    mdp = gridworld_5x5()
    v_star = policy_iteration(mdp).v
    for tol in (1.0, 1e-2, 1e-4):
        sol = value_iteration(mdp, tol=tol)
        assert np.max(np.abs(sol.v - v_star)) < tol / 2
        assert sol.residual < tol * (1 - mdp.gamma) / 2
    assert value_iteration(mdp, tol=1.0).iterations < value_iteration(mdp, tol=1e-4).iterations


def test_value_iteration_refuses_to_stop_early_at_the_cap():
    # The stated bound does not hold after 3 sweeps, so no Solution is returned.
    with pytest.raises(ConvergenceError, match=r"max_iterations=3.*policy_iteration"):
        value_iteration(gridworld_5x5(), max_iterations=3)


def test_value_iteration_gamma_zero_is_one_sweep():
    sol = value_iteration(gridworld_5x5().with_gamma(0.0))
    assert sol.iterations == 1
    np.testing.assert_array_equal(sol.v, gridworld_5x5().R.max(axis=1))


def test_improper_policy_with_gamma_one_raises_naming_states():
    # Sutton & Barto (2018), Example 4.1 gridworld, undiscounted: "always up"
    # bumps into the top wall forever from the top row.
    mdp = gridworld_4x4()
    with pytest.raises(InvalidParameterError, match=r"proper.*state\(s\) \[1, 2, 3"):
        evaluate_policy(mdp, np.zeros(16, dtype=int))


def test_policy_iteration_with_gamma_one_starts_from_a_proper_policy():
    sol = policy_iteration(gridworld_4x4())
    assert sol.v.min() == pytest.approx(-3.0)
    with pytest.raises(InvalidParameterError, match="proper"):
        policy_iteration(gridworld_4x4(), initial_policy=np.zeros(16, dtype=int))


@pytest.mark.parametrize(
    ("policy", "fragment"),
    [
        (np.zeros(5, dtype=int), "policy must have shape (S,) = (16,)"),
        (np.full(16, 4), "policy[0] = 4 is not an action index in [0, 4)"),
        (np.full((16, 4), 0.3), "policy[0, :] sums to 1.2"),
        (np.full(16, 0.5), "must hold action indices"),
        (np.tile([1.5, -0.5, 0.0, 0.0], (16, 1)), "policy[0, 1] = -0.5 is negative"),
        (np.full((16, 4), "x"), "policy must be an array of real numbers"),
    ],
)
def test_bad_policies_are_rejected(policy, fragment):
    with pytest.raises(InvalidParameterError) as info:
        evaluate_policy(gridworld_4x4().with_gamma(0.9), policy)
    assert fragment in str(info.value)


def test_bad_arguments_are_rejected():
    mdp = gridworld_5x5()
    with pytest.raises(InvalidParameterError, match=r"mdp must be a tdkit\.FiniteMDP"):
        value_iteration("gridworld")
    with pytest.raises(InvalidParameterError, match="tol must be in"):
        value_iteration(mdp, tol=0.0)
    with pytest.raises(InvalidParameterError, match="method must be"):
        evaluate_policy(mdp, np.zeros(25, dtype=int), method="magic")
    with pytest.raises(InvalidParameterError, match=r"v must have shape \(25,\)"):
        action_values(mdp, np.zeros(3))
    with pytest.raises(InvalidParameterError, match=r"q must have shape \(25, 4\)"):
        bellman_residual(mdp, np.zeros((25, 3)))
    with pytest.raises(InvalidParameterError, match="v0 must be an array of real numbers"):
        value_iteration(mdp, v0=[[0.0], [1.0, 2.0]])  # ragged: numpy's own error, named


def test_large_sparse_evaluation_methods_agree():
    # 4000 states (> 3000): "auto" takes the sparse GMRES path. Both methods
    # bound their error by tol = 1e-9, so they differ by < 2e-9.
    mdp = garnet(4000, 2, 5, gamma=0.9, seed=3)
    policy = np.arange(4000) % 2
    auto = evaluate_policy(mdp, policy, tol=1e-9)
    iterative = evaluate_policy(mdp, policy, method="iterative", tol=1e-9)
    assert np.max(np.abs(auto - iterative)) < 2e-9
    assert bellman_residual(mdp, auto, policy) < 1e-9 * (1 - 0.9)


def test_evaluation_falls_back_to_iteration_without_scipy(monkeypatch):
    mdp = garnet(3500, 2, 4, gamma=0.8, seed=1)
    policy = np.zeros(3500, dtype=int)
    expected = evaluate_policy(mdp, policy, method="direct")
    for name in ("scipy", "scipy.sparse", "scipy.sparse.linalg"):
        monkeypatch.setitem(sys.modules, name, None)  # makes the import fail
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fallback = evaluate_policy(mdp, policy, tol=1e-9)
    assert np.max(np.abs(fallback - expected)) < 1e-9 + _ROUND
    with pytest.raises(InvalidParameterError, match="needs scipy"):
        evaluate_policy(mdp, policy, method="sparse")

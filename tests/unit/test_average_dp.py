"""Exact average-reward ground truth: relative value iteration and the gain of a policy.

Independent solutions written here (none of tdkit's code is used for them):

* the linear program of the average-reward criterion (Puterman, M. L. (1994),
  Markov Decision Processes, Wiley, Section 8.8.2: maximise sum r(s, a) x(s, a)
  over state-action frequencies x >= 0 with flow balance and sum x = 1), solved
  by scipy.optimize.linprog; its optimum is the optimal gain of a unichain model;
* Howard's policy iteration for average reward (Howard, R. A. (1960), Dynamic
  Programming and Markov Processes, MIT Press; Puterman 1994, Section 8.6),
  with the evaluation equations h + rho = r_pi + P_pi h, h(ref) = 0 solved by numpy;
* stationary distributions from numpy's eigen-decomposition.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from scipy.optimize import linprog

import tdkit
from tdkit import FiniteMDP, InvalidParameterError, policy_gain, relative_value_iteration


# ---------------------------------------------------------------- independent solutions
def lp_gain(P: np.ndarray, R: np.ndarray) -> float:
    """Optimal gain by the dual linear program (Puterman 1994, Section 8.8.2)."""
    n, m = P.shape[:2]
    balance = np.zeros((n, n * m))
    for j in range(n):
        for s in range(n):
            for a in range(m):
                balance[j, s * m + a] = (s == j) - P[s, a, j]
    a_eq = np.vstack([balance, np.ones((1, n * m))])
    b_eq = np.zeros(n + 1)
    b_eq[-1] = 1.0
    res = linprog(-R.ravel(), A_eq=a_eq, b_eq=b_eq, bounds=(0, None), method="highs")
    assert res.status == 0, res.message
    return float(-res.fun)


def howard(P: np.ndarray, R: np.ndarray, ref: int = 0) -> tuple[float, np.ndarray]:
    """Average-reward policy iteration (Howard 1960) for a model whose policies are irreducible."""
    n = P.shape[0]
    policy = np.zeros(n, dtype=int)
    for _ in range(1000):
        p_pi, r_pi = P[np.arange(n), policy], R[np.arange(n), policy]
        # unknowns (h_0..h_{n-1}, rho): h + rho - P h = r, and h[ref] = 0
        a = np.zeros((n + 1, n + 1))
        a[:n, :n] = np.eye(n) - p_pi
        a[:n, n] = 1.0
        a[n, ref] = 1.0
        sol = np.linalg.solve(a, np.append(r_pi, 0.0))
        h, rho = sol[:n], sol[n]
        q = R + P @ h
        best = q.max(axis=1)
        keep = q[np.arange(n), policy] >= best - 1e-12
        if keep.all():
            return float(rho), h
        policy = np.where(keep, policy, q.argmax(axis=1))
    raise AssertionError("policy iteration did not stop")


def eig_stationary(chain: np.ndarray) -> np.ndarray:
    values, vectors = np.linalg.eig(chain.T)
    k = int(np.argmin(np.abs(values - 1.0)))
    mu = np.real(vectors[:, k])
    return mu / mu.sum()


# ---------------------------------------------------------------- model strategies
@st.composite
def positive_models(draw):
    """Every entry of P positive: every policy's chain is irreducible and aperiodic."""
    n = draw(st.integers(2, 6))
    m = draw(st.integers(1, 3))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    P = rng.random((n, m, n)) + 0.05
    P /= P.sum(axis=2, keepdims=True)
    return P, rng.normal(size=(n, m))


@st.composite
def hub_models(draw):
    """Sparse random rows plus probability >= 0.1 of reaching a hub state: unichain, often
    with transient states (the hub may be left forever by no policy)."""
    n = draw(st.integers(2, 7))
    m = draw(st.integers(1, 3))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    P = rng.random((n, m, n)) * (rng.random((n, m, n)) < 0.4)
    hub = int(rng.integers(n))
    P[:, :, hub] += 0.1 + rng.random((n, m))
    P /= P.sum(axis=2, keepdims=True)
    return P, rng.integers(-3, 4, size=(n, m)).astype(float)


@st.composite
def periodic_models(draw):
    """Bipartite models: every transition crosses between two halves, so every recurrent
    class has an even period (plain value iteration oscillates on them)."""
    half = draw(st.integers(1, 4))
    m = draw(st.integers(1, 3))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    n = 2 * half
    P = np.zeros((n, m, n))
    P[:half, :, half:] = rng.random((half, m, half)) + 0.05
    P[half:, :, :half] = rng.random((half, m, half)) + 0.05
    P /= P.sum(axis=2, keepdims=True)
    return P, rng.normal(size=(n, m))


def _check_optimality_equation(mdp: FiniteMDP, sol) -> None:
    # h + rho = max_a [r + P h], within the solver's tolerance (bias is tau * w with
    # span(T w - w) <= 1e-9, so the equation holds to about 1e-8).
    backed = (mdp.R + mdp.P @ sol.bias).max(axis=1)
    np.testing.assert_allclose(sol.bias + sol.gain, backed, atol=1e-7)


# ---------------------------------------------------------------- against the LP and Howard
@settings(max_examples=60, deadline=None)
@given(model=positive_models())
def test_gain_and_bias_match_lp_and_howard_on_irreducible_models(model):
    P, R = model
    mdp = FiniteMDP(P, R, gamma=0.9)
    sol = relative_value_iteration(mdp, tol=1e-10)
    assert sol.gain == pytest.approx(lp_gain(P, R), abs=1e-7)
    rho, h = howard(P, R)
    assert sol.gain == pytest.approx(rho, abs=1e-8)
    np.testing.assert_allclose(sol.bias, h, atol=1e-7)  # unique: h(ref) = 0 fixes the constant
    assert sol.bias[0] == 0.0
    assert sol.residual <= 1e-10
    assert policy_gain(mdp, sol.policy) == pytest.approx(sol.gain, abs=1e-8)


@settings(max_examples=60, deadline=None)
@given(model=hub_models(), ref=st.integers(0, 6))
def test_gain_matches_lp_on_unichain_models_with_transient_states(model, ref):
    P, R = model
    mdp = FiniteMDP(P, R, gamma=0.5)
    sol = relative_value_iteration(mdp, reference_state=ref % mdp.n_states)
    assert sol.gain == pytest.approx(lp_gain(P, R), abs=1e-7)
    assert sol.bias[ref % mdp.n_states] == 0.0
    _check_optimality_equation(mdp, sol)
    assert policy_gain(mdp, sol.policy) == pytest.approx(sol.gain, abs=1e-7)


@settings(max_examples=60, deadline=None)
@given(model=periodic_models())
def test_periodic_models_converge_through_the_aperiodicity_transform(model):
    P, R = model
    mdp = FiniteMDP(P, R, gamma=0.9)
    sol = relative_value_iteration(mdp, tol=1e-10)
    assert sol.gain == pytest.approx(lp_gain(P, R), abs=1e-7)
    _rho, h = howard(P, R)
    np.testing.assert_allclose(sol.bias, h, atol=1e-7)
    _check_optimality_equation(mdp, sol)


def test_a_deterministic_two_cycle_converges_to_the_exact_answer():
    # Period 2, every policy: plain relative value iteration oscillates between
    # (0, 2) and (2, 0)-shaped iterates forever; the transformed one converges.
    # Rewards 2 (state 0) and 0 (state 1): gain 1, and h(0) + 1 = 2 + h(1),
    # h(1) + 1 = 0 + h(0)  =>  h(1) = -1 with h(0) = 0.
    P = np.zeros((2, 1, 2))
    P[0, 0, 1] = P[1, 0, 0] = 1.0
    sol = relative_value_iteration(FiniteMDP(P, [[2.0], [0.0]], gamma=0.9))
    assert sol.gain == pytest.approx(1.0, abs=1e-9)
    np.testing.assert_allclose(sol.bias, [0.0, -1.0], atol=1e-8)


# ---------------------------------------------------------------- conventions
@settings(max_examples=30, deadline=None)
@given(model=hub_models(), gamma=st.floats(0.0, 1.0))
def test_gamma_is_ignored_and_sparse_equals_dense(model, gamma):
    P, R = model
    dense = FiniteMDP(P, R, gamma=0.3)
    a = relative_value_iteration(dense)
    b = relative_value_iteration(dense.with_gamma(gamma).to_sparse())
    assert a.gain == pytest.approx(b.gain, abs=1e-12)
    np.testing.assert_allclose(a.bias, b.bias, atol=1e-10)
    pol = a.policy
    assert policy_gain(dense, pol) == pytest.approx(policy_gain(dense.to_sparse(), pol), abs=1e-10)


@settings(max_examples=40, deadline=None)
@given(model=hub_models(), data=st.data())
def test_terminal_states_restart_from_the_initial_distribution(model, data):
    """A model with terminal states equals the model whose terminal transitions are
    redirected to the start distribution, built here by hand."""
    P, R = model
    n = P.shape[0]
    assume(n >= 3)
    term = np.zeros(n, dtype=bool)
    term[data.draw(st.integers(1, n - 1))] = True
    init = np.where(term, 0.0, np.random.default_rng(n).random(n) + 0.1)
    init /= init.sum()
    mdp = FiniteMDP(P, R, gamma=0.9, terminal=term, initial=init)
    live = ~term
    redirected = P[live][:, :, live] + P[live][:, :, term].sum(axis=2, keepdims=True) * init[live]
    by_hand = FiniteMDP(redirected, R[live], gamma=0.9)
    a, b = relative_value_iteration(mdp), relative_value_iteration(by_hand)
    assert a.gain == pytest.approx(lp_gain(redirected, R[live]), abs=1e-7)
    assert a.gain == pytest.approx(b.gain, abs=1e-9)
    np.testing.assert_allclose(a.bias[live], b.bias, atol=1e-8)
    assert a.bias[term][0] == pytest.approx(init @ a.bias, abs=1e-12)
    assert policy_gain(mdp, a.policy) == pytest.approx(a.gain, abs=1e-8)


@settings(max_examples=40, deadline=None)
@given(model=hub_models(), seed=st.integers(0, 2**16))
def test_policy_gain_is_the_stationary_mean_reward(model, seed):
    P, R = model
    n, m, _ = P.shape
    probs = np.random.default_rng(seed).dirichlet(np.ones(m), size=n)
    chain = np.einsum("sa,sat->st", probs, P)
    expected = eig_stationary(chain) @ (probs * R).sum(axis=1)
    assert policy_gain(FiniteMDP(P, R, gamma=0.9), probs) == pytest.approx(expected, abs=1e-8)


# ---------------------------------------------------------------- refusals
def _two_absorbing_states() -> FiniteMDP:
    # Action 0 stays put; action 1 moves 0 -> 1 and 1 -> 0. "Always stay" has two
    # closed classes {0} and {1}: multichain.
    P = np.zeros((2, 2, 2))
    P[0, 0, 0] = P[1, 0, 1] = P[0, 1, 1] = P[1, 1, 0] = 1.0
    return FiniteMDP(P, [[1.0, 0.0], [0.0, 0.0]], gamma=0.9)


def test_policy_gain_refuses_a_multichain_policy_with_the_reason():
    mdp = _two_absorbing_states()
    with pytest.raises(InvalidParameterError, match="multichain"):
        policy_gain(mdp, [0, 0])
    assert policy_gain(mdp, [1, 1]) == pytest.approx(0.0)
    assert policy_gain(mdp, [0, 1]) == pytest.approx(1.0)  # 1 -> 0, then stay: one class


def test_relative_value_iteration_reports_a_multichain_model():
    # Two absorbing states with different rewards and no way between them: the
    # optimal gain is 1 from state 0 and 0 from state 1; the span never shrinks.
    P = np.zeros((2, 1, 2))
    P[0, 0, 0] = P[1, 0, 1] = 1.0
    with pytest.raises(InvalidParameterError, match="multichain"):
        relative_value_iteration(FiniteMDP(P, [[1.0], [0.0]], gamma=0.9), max_iterations=500)


@pytest.mark.parametrize(
    ("call", "match"),
    [
        (lambda m: relative_value_iteration(m, tol=0.0), "tol"),
        (lambda m: relative_value_iteration(m, reference_state=5), "reference_state"),
        (lambda m: relative_value_iteration(m, reference_state=True), "reference_state"),
        (lambda m: relative_value_iteration(m, max_iterations=0), "max_iterations"),
        (lambda m: relative_value_iteration("model"), "FiniteMDP"),
        (lambda m: policy_gain(m, [0, 2]), "action index"),
        (lambda m: policy_gain(m, [0.5, 0.5]), "ints"),
        (lambda m: policy_gain(m, [[0.5, 0.6], [1.0, 0.0]]), "sum to 1"),
        (lambda m: policy_gain(m, np.zeros((3, 2))), "shape"),
    ],
)
def test_bad_input_is_refused_with_a_clear_error(call, match):
    with pytest.raises(InvalidParameterError, match=match):
        call(_two_absorbing_states())


def test_a_terminal_reference_state_is_refused():
    P = np.zeros((2, 1, 2))
    P[0, 0, 1] = 1.0
    mdp = FiniteMDP(P, [[1.0], [0.0]], gamma=1.0, terminal=[False, True])
    with pytest.raises(InvalidParameterError, match="terminal"):
        relative_value_iteration(mdp, reference_state=1)
    # Restarting from 0 each step: gain 1 (the terminal transition takes no time step).
    assert relative_value_iteration(mdp).gain == pytest.approx(1.0)


def test_reachable_from_the_dp_module_and_the_package():
    assert tdkit.dp.relative_value_iteration is relative_value_iteration
    assert tdkit.dp.policy_gain is policy_gain

"""Solvers near gamma = 1: a bounded amount of work, clear refusals, progress.

Work is measured in sweeps (calls of the model's one Bellman operation,
``FiniteMDP.expected_next``), never in wall-clock time.
"""

from __future__ import annotations

import numpy as np
import pytest

from tdkit._errors import InvalidParameterError, TdkitError
from tdkit.dp import (
    DEFAULT_MAX_ITERATIONS,
    ConvergenceError,
    evaluate_policy,
    policy_iteration,
    value_iteration,
)
from tdkit.envs.finite import FiniteMDP
from tdkit.envs.problems import gridworld_4x4


class _SweepBudget:
    """Counts calls of ``expected_next`` on one model and stops the test past a budget."""

    def __init__(self, monkeypatch, mdp, budget):
        self.calls = 0
        original = mdp.expected_next

        def counted(v):
            self.calls += 1
            if self.calls > budget:
                raise AssertionError(f"more than {budget} sweeps")
            return original(v)

        monkeypatch.setattr(mdp, "expected_next", counted)


def _two_state_cycle(gamma):
    """0 -> 1 (reward 1), 1 -> 0 (reward 0): v(0) = 1 / (1 - gamma^2), v(1) = gamma v(0)."""
    P = np.zeros((2, 1, 2))
    P[0, 0, 1] = P[1, 0, 0] = 1.0
    return FiniteMDP(P, [[1.0], [0.0]], gamma=gamma)


def test_value_iteration_near_gamma_one_raises_within_the_default_cap(monkeypatch):
    # The contraction bound asks for log(5e-17) / log(0.999999) ~ 3.7e7 sweeps.
    mdp = _two_state_cycle(0.999999)
    budget = _SweepBudget(monkeypatch, mdp, DEFAULT_MAX_ITERATIONS + 5)
    with pytest.raises(ConvergenceError, match=r"max_iterations=10000.*policy_iteration") as info:
        value_iteration(mdp)
    assert isinstance(info.value, TdkitError) and isinstance(info.value, RuntimeError)
    assert "more sweeps" in str(info.value)
    assert budget.calls <= DEFAULT_MAX_ITERATIONS + 1


def test_policy_iteration_solves_the_same_model_exactly():
    gamma = 0.999999
    sol = policy_iteration(_two_state_cycle(gamma))
    v0 = 1.0 / (1.0 - gamma**2)
    # Dense solve with condition number ~ 2 / (1 - gamma) = 2e6: relative error
    # below 2e6 * 2 * eps ~ 1e-9.
    np.testing.assert_allclose(sol.v, [v0, gamma * v0], rtol=1e-8)


def test_undiscounted_model_without_reachable_terminal_is_refused_before_any_sweep(monkeypatch):
    mdp = _two_state_cycle(1.0)  # no terminal state at all: values are infinite
    budget = _SweepBudget(monkeypatch, mdp, 0)
    for solver in (value_iteration, policy_iteration):
        with pytest.raises(InvalidParameterError, match=r"gamma=1.*state\(s\) \[0, 1\]"):
            solver(mdp)
    with pytest.raises(InvalidParameterError, match="gamma=1"):
        value_iteration(mdp, exploration=0.1)
    assert budget.calls == 0


def test_undiscounted_state_cut_off_from_the_terminal_is_refused():
    # States 0 and 1 loop on each other, state 2 reaches the terminal state 3.
    P = np.zeros((4, 1, 4))
    P[0, 0, 1] = P[1, 0, 0] = P[2, 0, 3] = 1.0
    mdp = FiniteMDP(P, np.zeros((4, 1)), gamma=1.0, terminal=[False, False, False, True])
    with pytest.raises(InvalidParameterError, match=r"2 state\(s\) \[0, 1\]"):
        value_iteration(mdp)


def test_masked_route_to_the_terminal_does_not_count():
    # Action 1 of state 0 would end the episode, but it is masked.
    P = np.zeros((2, 2, 2))
    P[0, 0, 0] = P[0, 1, 1] = 1.0
    masks = [[True, False], [True, True]]
    mdp = FiniteMDP(P, [[-1.0, 0.0], [0, 0]], gamma=1.0, terminal=[False, True], masks=masks)
    with pytest.raises(InvalidParameterError, match="allowed action"):
        value_iteration(mdp)


def test_undiscounted_positive_loop_diverges_and_is_refused():
    # State 0: action 0 stays and pays +1 forever; action 1 ends the episode.
    # A terminal state is reachable, but v*(0) = +inf: value iteration grows by
    # 1 per sweep, so the change never shrinks (Bertsekas & Tsitsiklis 1996,
    # Neuro-Dynamic Programming, Section 2.1: improper policies must have
    # return -inf for the undiscounted problem to be well posed).
    P = np.zeros((2, 2, 2))
    P[0, 0, 0] = P[0, 1, 1] = 1.0
    mdp = FiniteMDP(P, [[1.0, 0.0], [0.0, 0.0]], gamma=1.0, terminal=[False, True])
    with pytest.raises(ConvergenceError, match="diverge"):
        value_iteration(mdp)


def test_undiscounted_negative_loop_converges():
    # The same model with cost -1 for staying: the improper policy has return
    # -inf, so v*(0) = 0 (end at once) and value iteration converges.
    P = np.zeros((2, 2, 2))
    P[0, 0, 0] = P[0, 1, 1] = 1.0
    mdp = FiniteMDP(P, [[-1.0, 0.0], [0.0, 0.0]], gamma=1.0, terminal=[False, True])
    assert value_iteration(mdp).v.tolist() == [0.0, 0.0]


def test_explicit_cap_and_iterative_evaluation_cap_raise():
    mdp = _two_state_cycle(0.999)
    with pytest.raises(ConvergenceError, match="max_iterations=50"):
        value_iteration(mdp, max_iterations=50)
    with pytest.raises(ConvergenceError, match="max_iterations=50"):
        evaluate_policy(mdp, [0, 0], method="iterative", max_iterations=50)


def test_error_bound_is_reported_and_holds():
    mdp = _two_state_cycle(0.9)
    sol = value_iteration(mdp, tol=1e-3)
    v_star = np.array([1.0, 0.9]) / (1.0 - 0.81)
    assert sol.method == "value_iteration"
    assert np.max(np.abs(sol.v - v_star)) <= sol.error_bound < 1e-3 / 2
    assert value_iteration(gridworld_4x4()).error_bound == np.inf  # gamma = 1: no bound


def test_progress_bar_counts_sweeps(capsys):
    pytest.importorskip("tqdm")
    sol = value_iteration(_two_state_cycle(0.5), progress=True)
    err = capsys.readouterr().err
    assert "value_iteration" in err and "sweep" in err
    assert f"{sol.iterations}/{DEFAULT_MAX_ITERATIONS}" in err

"""The verifier knows average-reward agents: the gain is checked, discounted probes are skipped.

The gain check's margin is derived in ``tdkit.verify._average_checks`` for a
false-alarm rate of 1e-5 per run (0 false alarms in 300 seeds per learner measured by
``benchmarks/calibrate_average_check.py --seeds 300``); here a few seeds run in CI.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import tdkit
from tdkit.schedules import Exponential
from tdkit.verify import verify_agent
from tdkit.verify._average_checks import (
    average_probe,
    best_epsilon_greedy_gain,
    check_average_reward,
)
from tdkit.verify._runner import DISCOUNTED_CHECKS

AVERAGE_LEARNERS = [tdkit.DifferentialQLearning, tdkit.DifferentialSarsa, tdkit.DifferentialTD]


def _factory(cls):
    """Defaults, except what the learner needs: a policy to predict, decaying exploration
    for the on-policy learner (it converges to the gain of the policy it follows)."""

    def make(env, seed):
        if cls is tdkit.DifferentialTD:
            n, m = env.observation_space.n, env.action_space.n
            return cls.for_env(env, policy=np.full((n, m), 1.0 / m), seed=seed)
        if cls is tdkit.DifferentialSarsa:
            return cls.for_env(env, exploration=Exponential(0.2, 0.999, 0.01), seed=seed)
        return cls.for_env(env, seed=seed)

    return make


@pytest.mark.parametrize("cls", AVERAGE_LEARNERS, ids=lambda c: c.__name__)
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_differential_learners_pass_the_verifier(cls, seed):
    report = verify_agent(_factory(cls), level="quick", seed=seed)
    assert report.passed, str(report)
    assert report["average_reward"].status == "passed"
    for name in DISCOUNTED_CHECKS:
        assert report[name].status == "skipped"
        assert "average-reward agent" in report[name].message


def test_a_discounted_learner_still_gets_every_discounted_check():
    report = verify_agent(
        lambda env, seed: tdkit.QLearning.for_env(env, step_size=0.5, seed=seed), seed=1
    )
    assert report["average_reward"].status == "skipped"
    assert all(report[name].status == "passed" for name in DISCOUNTED_CHECKS
               if name != "next_action")


# The probe's epsilon-greedy gain by hand (Sutton & Barto 2018, Section 5.4 for the
# epsilon-soft fixed point; the chain is average_probe's): only state 0 has a choice.
# With q = epsilon / 2 the chance of the worse action there, the stationary
# distribution solves mu1 = mu0 q / 2, mu2 = 2 mu0 (1 - q), so mu0 = 1 / (3 - 1.5 q),
# and the gain is mu0 q * 1 + mu2 * 3 = (6 - 5 q) / (3 - 1.5 q): 2 at epsilon 0.
@settings(max_examples=25, deadline=None)
@given(st.floats(0.0, 1.0))
def test_the_best_epsilon_greedy_gain_of_the_probe_matches_its_closed_form(epsilon):
    q = epsilon / 2
    expected = (6 - 5 * q) / (3 - 1.5 * q)
    assert best_epsilon_greedy_gain(average_probe(), epsilon) == pytest.approx(expected,
                                                                               rel=1e-9)


def test_on_policy_differential_sarsa_with_constant_exploration_is_held_to_its_own_gain():
    # Constant epsilon 0.1 (the constructor's default): differential SARSA converges to
    # the best epsilon-greedy gain (1.966 here), not to the optimal 2; the check says so.
    make = lambda env, seed: tdkit.DifferentialSarsa.for_env(env, seed=seed)  # noqa: E731
    passed, message = check_average_reward(make, seed=2)
    assert passed, message
    assert "on-policy targets the epsilon-greedy gain" in message
    # Differential Q-learning bootstraps on the maximum: held to the optimal gain only.
    make_q = lambda env, seed: tdkit.DifferentialQLearning.for_env(env, seed=seed)  # noqa: E731
    passed, message = check_average_reward(make_q, seed=2)
    assert passed, message
    assert "epsilon-greedy" not in message and "vs exact 2.0000:" in message


@pytest.mark.parametrize("name", sorted(DISCOUNTED_CHECKS))
def test_run_check_skips_a_discounted_check_for_an_average_reward_agent_as_verify_agent_does(
        name):
    # The calibration script re-measures single checks with run_check; it must decide
    # exactly as the full report does (it once ran convergence on differential learners).
    from tdkit.verify import run_check

    make = _factory(tdkit.DifferentialQLearning)
    result = run_check(make, name, level="quick", seed=1)
    assert result.status == "skipped"
    assert "average-reward agent" in result.message


def test_best_epsilon_greedy_gain_refuses_a_model_too_large_to_enumerate():
    from tdkit import InvalidParameterError
    from tdkit.envs import problems

    with pytest.raises(InvalidParameterError, match="too many to enumerate"):
        best_epsilon_greedy_gain(problems.gridworld_4x4(), 0.1)

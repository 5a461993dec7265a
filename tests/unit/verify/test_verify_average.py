"""The verifier knows average-reward agents: the gain is checked, discounted probes are skipped.

The gain check's margin is derived in ``tdkit.verify._average_checks`` for a
false-alarm rate of 1/1000 (0 false alarms in 300 seeds per learner measured by
``benchmarks/calibrate_average_check.py --seeds 300``); here a few seeds run in CI.
"""

from __future__ import annotations

import numpy as np
import pytest

import tdkit
from tdkit.schedules import Exponential
from tdkit.verify import verify_agent
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

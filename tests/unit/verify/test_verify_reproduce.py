"""A failed check's "reproduce:" code rebuilds the failing run through tdkit.train.

The verifier drives every episode through tdkit.runs.run_episode with the probe's
time limit as max_episode_steps; the code printed in the report calls tdkit.train
with the same environment, seeds, episodes and time limit, so the rebuilt agent
ends with exactly the values the failure message quotes.
"""

from __future__ import annotations

import re

import numpy as np

import tdkit
from tdkit.learners import QLearning
from tdkit.verify import probes, run_check


class BootstrapsWhenTruncated(QLearning):
    """Checks truncated first: bootstraps at a time limit even when the episode terminated."""

    def _learn(self, transition):
        s, a, r, s2, terminated, truncated, next_mask = transition
        if truncated:
            terminated = False
        return super()._learn((s, a, r, s2, terminated, truncated, next_mask))


def make_agent(env, seed):
    return BootstrapsWhenTruncated.for_env(env, step_size=0.5, exploration=0.1, seed=seed)


def test_the_reproduce_code_rebuilds_the_failing_values():
    result = run_check(make_agent, "both_flags", seed=4)
    assert result.failed
    assert "terminated and truncated are both set: terminated wins" in result.message
    found = re.match(r"Q\((\d+), (\d+)\) = ([-\d.e]+)", result.message)
    assert found, result.message
    s, a, value = int(found[1]), int(found[2]), float(found[3])
    assert "max_episode_steps=2" in result.reproduce and "at after" not in result.reproduce
    scope = {"tdkit": tdkit, "np": np, "make_agent": make_agent}
    exec(result.rebuild, scope)
    rebuilt = float(scope["agent"].q_values(s)[a])
    # The message prints 4 significant digits.
    assert abs(rebuilt - value) <= 5e-4 * max(1.0, abs(value)), (rebuilt, value)


def test_every_probe_named_in_a_report_can_be_built_by_name():
    for name in probes.PROBES:
        probe = probes.get(name)
        assert probe.name == name
        env = probe.make_env()
        obs, _ = env.reset(seed=0)
        assert env.observation_space.contains(obs)


def test_an_unknown_probe_name_is_a_clear_error():
    import pytest

    with pytest.raises(tdkit.InvalidParameterError, match="unknown probe 'nope'"):
        probes.get("nope")


def test_average_reward_agents_get_the_gain_check_and_others_skip_it():
    # The check itself is derived and calibrated in tdkit.verify._average_checks
    # (docs/average-reward.md); here: verify_agent runs it for agents with an
    # average_reward attribute and skips it, with a reason, for the rest.
    def make_differential(env, seed):
        return tdkit.DifferentialQLearning.for_env(env, seed=seed)

    result = run_check(make_differential, "average_reward", seed=0)
    assert result.passed, result
    skipped = run_check(make_agent, "average_reward", seed=0)
    assert skipped.skipped and "average_reward" in skipped.message

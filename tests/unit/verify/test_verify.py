"""tdkit.verify: reports, how checks adapt to agents, compare_updates, compare_performance,
the pytest helpers, and the copyable example of docs/verify.md.

Every tdkit learner is verified at both levels in test_verify_learners.py; the
deliberately broken agents are in test_verify_mutants.py."""

from __future__ import annotations

import concurrent.futures
import functools
import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings

import tdkit
import tdkit.learners
from tdkit import InvalidParameterError
from tdkit.envs.problems import gridworld_4x4
from tdkit.testing.pytest_helpers import AgentCheck, agent_checks, parametrize_agent_checks
from tdkit.testing.streams import transition_streams
from tdkit.verify import (
    CHECK_NAMES,
    RecordedTransition,
    agent_factory,
    assert_agent,
    compare_performance,
    compare_updates,
    record_transitions,
    run_check,
    verify_agent,
)
from tdkit.verify._probes import masks_probe

ROOT = next(p for p in Path(__file__).resolve().parents if (p / "pyproject.toml").exists())

# Factories of tdkit learners used as known-good agents in this file (every learner,
# at both levels, is verified in test_verify_learners.py).
Q_LEARNING = agent_factory(tdkit.QLearning, step_size=0.5, exploration=0.1)
EXPECTED_SARSA = agent_factory(tdkit.ExpectedSarsa, step_size=0.5, exploration=0.1)


def td0_uniform(env, seed):
    n, m = env.observation_space.n, env.action_space.n
    return tdkit.learners.TD0.for_env(env, policy=np.full((n, m), 1.0 / m), step_size=0.1,
                                      seed=seed)


# ---------------------------------------------------------------- the report
def test_report_has_one_record_per_check_in_order_and_a_table():
    report = verify_agent(Q_LEARNING, seed=2)
    assert [c.name for c in report] == list(CHECK_NAMES) and len(report) == len(CHECK_NAMES)
    assert CHECK_NAMES[0] == "protocol"
    text = str(report)
    for name in CHECK_NAMES:
        status = "SKIP" if name == "average_reward" else "PASS"  # no average_reward attribute
        assert re.search(rf"{status}\s+{name}\s", text)
    assert "level=quick, seed=2" in text and text.endswith("PASSED")
    assert report.failures == ()
    with pytest.raises(KeyError, match="no check named"):
        report["nope"]


def test_same_seed_same_report():
    make = EXPECTED_SARSA
    assert verify_agent(make, seed=4) == verify_agent(make, seed=4)


class FirstIndexQ(tdkit.QLearning):
    def _choose(self, s, mask, explore):
        return int(np.argmax(self._q[s]))


def test_assert_agent_raises_with_the_table():
    with pytest.raises(AssertionError) as info:
        assert_agent(lambda env, seed: FirstIndexQ.for_env(env, step_size=0.5, seed=seed))
    text = str(info.value)
    assert "FAIL  tie_breaking" in text and "reproduce: seed=0, env=tie-probe" in text
    assert assert_agent(Q_LEARNING).passed


# ---------------------------------------------------------------- agents the checks adapt to
class BehaviourOnly:
    """Q-learning seen only through act/observe/update (no q_values)."""

    def __init__(self, env, seed):
        self._inner = tdkit.QLearning.for_env(env, step_size=0.5, exploration=0.1, seed=seed)

    def act(self, obs, *, mask=None, explore=True):
        return self._inner.act(obs, mask=mask, explore=explore)

    def observe(self, *args, **kwargs):
        self._inner.observe(*args, **kwargs)

    def update(self):
        return self._inner.update()


def test_agents_without_q_values_are_judged_on_behaviour():
    report = verify_agent(BehaviourOnly)
    assert report.passed, str(report)
    assert "behaviour only" in report.kind
    assert report["next_action"].skipped and "q_values" in report["next_action"].message


class BehaviourOnlyFirstIndex(BehaviourOnly):
    def __init__(self, env, seed):
        self._inner = FirstIndexQ.for_env(env, step_size=0.5, exploration=0.1, seed=seed)


def test_behaviour_only_agents_still_fail_behavioural_checks():
    assert verify_agent(BehaviourOnlyFirstIndex)["tie_breaking"].failed


# ---------------------------------------------------------------- protocol failures
class NoUpdate:
    def __init__(self, env, seed):
        self.n = env.action_space.n

    def act(self, obs, *, mask=None, explore=True):
        return 0

    def observe(self, *args, **kwargs):
        pass


class OutOfRange(NoUpdate):
    def act(self, obs, *, mask=None, explore=True):
        return self.n  # one past the last action

    def update(self):
        return ()


class UpdateReturnsNone(OutOfRange):
    def act(self, obs, *, mask=None, explore=True):
        return 0

    def update(self):
        return None


class UpdateReturnsJunkFirst(UpdateReturnsNone):
    def update(self):
        return (0.0,)


def _raises(env, seed):
    raise RuntimeError("cannot build")


@pytest.mark.parametrize(
    ("factory", "words"),
    [
        (NoUpdate, "no callable update"),
        (OutOfRange, "not in the action space"),
        (UpdateReturnsNone, "sequence of TD errors"),
        (UpdateReturnsJunkFirst, "must return () when nothing is pending"),
        (_raises, "raised RuntimeError: cannot build"),
    ],
)
def test_protocol_failures_name_the_problem_and_skip_the_rest(factory, words):
    report = verify_agent(factory)
    assert report["protocol"].failed and words in report["protocol"].message
    assert all(c.skipped and "protocol check failed" in c.message for c in list(report)[1:])
    assert not report.passed


# ---------------------------------------------------------------- reproducibility
class IgnoresSeed(tdkit.QLearning):
    """Draws from a fixed generator whatever seed it is given."""

    @classmethod
    def for_env(cls, env, **kwargs):
        kwargs["seed"] = 12345
        return super().for_env(env, **kwargs)


class FreshEntropy(tdkit.QLearning):
    @classmethod
    def for_env(cls, env, **kwargs):
        kwargs["seed"] = None
        return super().for_env(env, **kwargs)


def test_reproducibility_catches_ignored_seeds_and_unseeded_randomness():
    ignores = verify_agent(lambda env, seed: IgnoresSeed.for_env(env, seed=seed))
    assert ignores["reproducibility"].failed
    assert "does not drive" in ignores["reproducibility"].message
    fresh = verify_agent(lambda env, seed: FreshEntropy.for_env(env, seed=seed))
    assert fresh["reproducibility"].failed
    assert "not reproducible" in fresh["reproducibility"].message


def test_deterministic_agents_pass_reproducibility_with_a_note():
    def make(env, seed):  # exploration 0 and argmax: act never draws
        return FirstIndexQ.for_env(env, exploration=0.0, seed=seed)

    result = verify_agent(make)["reproducibility"]
    assert result.passed and "deterministic" in result.message


# ---------------------------------------------------------------- argument checking
def test_verify_agent_rejects_bad_arguments_naming_them():
    make = Q_LEARNING
    with pytest.raises(InvalidParameterError, match="make_agent must be a callable"):
        verify_agent(tdkit.QLearning(2, 2))
    with pytest.raises(InvalidParameterError, match="level must be 'quick' or 'full'; got 'x'"):
        verify_agent(make, level="x")
    with pytest.raises(InvalidParameterError, match="seed must be a non-negative int; got -1"):
        verify_agent(make, seed=-1)
    with pytest.raises(InvalidParameterError, match="unknown check 'nope'"):
        run_check(make, "nope")


# ---------------------------------------------------------------- pytest helpers
@parametrize_agent_checks(Q_LEARNING, checks=["protocol", "masks"])
def test_parametrize_agent_checks_gives_one_test_per_check(agent_check):
    assert agent_check().passed


def test_agent_checks_ids_and_outcomes():
    params = agent_checks(td0_uniform)
    assert [p.id for p in params] == list(CHECK_NAMES)
    masks = next(p.values[0] for p in params if p.id == "masks")
    with pytest.raises(pytest.skip.Exception, match="prediction learner"):
        masks()
    bad = AgentCheck(lambda env, seed: FirstIndexQ.for_env(env, seed=seed), "tie_breaking")
    with pytest.raises(AssertionError, match="FAIL tie_breaking"):
        bad()
    with pytest.raises(InvalidParameterError, match="unknown check"):
        agent_checks(td0_uniform, checks=["masks", "colour"])


def test_run_check_skips_when_the_protocol_fails():
    result = run_check(NoUpdate, "masks")
    assert result.skipped and "protocol check failed" in result.message
    assert run_check(NoUpdate, "protocol").failed


# ---------------------------------------------------------------- the example of docs/verify.md
def test_the_copyable_pytest_example_runs_and_passes(tmp_path):
    text = (ROOT / "docs" / "verify.md").read_text(encoding="utf-8")
    block = re.search(
        r"<!-- verify-example: start -->\s*```python\n(.*?)```\s*<!-- verify-example: end -->",
        text, re.S,
    )
    assert block is not None
    path = tmp_path / "test_my_agent.py"
    path.write_text(block.group(1), encoding="utf-8")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT / "src"),
                                                        os.environ.get("PYTHONPATH", "")])}
    done = subprocess.run(
        [sys.executable, "-m", "pytest", str(path), "-q", "-p", "no:cacheprovider",
         "-p", "no:randomly", "--rootdir", str(tmp_path)],
        capture_output=True, text=True, cwd=tmp_path, env=env, check=False,
    )
    assert done.returncode == 0, done.stdout + done.stderr
    # Every check passes except average_reward, which skips (MyQAgent has no gain).
    assert f"{len(CHECK_NAMES) + 1} passed, 1 skipped" in done.stdout, done.stdout


# ---------------------------------------------------------------- compare_updates
def _q(cls=tdkit.QLearning, n_states=5, n_actions=3, **kwargs):
    return cls(n_states, n_actions, **{"gamma": 0.9, "step_size": 0.5, "seed": 0, **kwargs})


@settings(max_examples=40, deadline=None)
@given(transition_streams(5, 3, masks=True))
def test_compare_updates_finds_no_divergence_between_equal_learners(stream):
    assert compare_updates(_q(), _q(seed=9), stream) is None
    es = functools.partial(_q, tdkit.ExpectedSarsa, exploration=0.0)
    assert compare_updates(es(), es(seed=5), stream) is None
    # With exploration 0, Expected SARSA's target is Q-learning's (Sutton & Barto 2018, 6.6).
    assert compare_updates(_q(), es(), stream) is None


@settings(max_examples=40, deadline=None)
@given(transition_streams(5, 3).map(lambda s: [(o, a, float(round(r)), *rest)
                                               for o, a, r, *rest in s]))
def test_compare_updates_reports_the_first_nonzero_update_of_a_different_step_size(stream):
    # From all-zero tables every target is 0 until the first nonzero reward, so step
    # sizes 0.5 and 0.25 first disagree exactly there: 0.5 r vs 0.25 r at (obs, action).
    first = next((i for i, t in enumerate(stream) if t[2] != 0.0), None)
    found = compare_updates(_q(), _q(step_size=0.25), stream)
    if first is None:
        assert found is None
        return
    o, a, r = stream[first][:3]
    assert (found.step, found.kind, found.state, found.action) == (first, "value", o, a)
    assert (found.expected, found.seen) == (0.5 * r, 0.25 * r)


def test_compare_updates_accepts_records_and_compares_state_values():
    stream = [(0, 0, 1.0, 1, False, False), (1, 0, 0.0, 2, True, False)]
    as_dicts = [dict(zip(["obs", "action", "reward", "next_obs", "terminated", "truncated"], t,
                         strict=True)) for t in stream]
    as_objects = [RecordedTransition(*t) for t in stream]
    policy = np.full((3, 2), 0.5)

    def td0(step_size):
        return tdkit.learners.TD0(3, 2, policy=policy, gamma=1.0, step_size=step_size, seed=0)

    for records in (stream, as_dicts, as_objects):
        assert compare_updates(td0(0.5), td0(0.5), records) is None
    found = compare_updates(td0(0.5), td0(0.1), as_dicts)
    assert (found.step, found.state, found.action) == (0, 0, None)
    assert str(found) == "step 0: V(0) = 0.1 in the candidate, 0.5 in the reference"


class Explodes(tdkit.QLearning):
    def update(self):
        if self.steps_ == 2:
            raise FloatingPointError("overflow")
        return super().update()


def test_compare_updates_reports_a_candidate_exception_as_a_divergence():
    stream = [(0, 0, 1.0, 1, False, False)] * 3
    found = compare_updates(_q(), _q(Explodes), stream)
    assert (found.step, found.kind) == (1, "exception")
    assert "FloatingPointError: overflow" in found.seen


def test_compare_updates_rejects_bad_input():
    with pytest.raises(InvalidParameterError, match="length 3"):
        compare_updates(_q(), _q(), [(0, 1, 2.0)])
    with pytest.raises(InvalidParameterError, match="no field 'terminated'"):
        compare_updates(_q(), _q(), [{"obs": 0, "action": 0, "reward": 0.0, "next_obs": 1}])
    with pytest.raises(InvalidParameterError, match="atol"):
        compare_updates(_q(), _q(), [], atol=-1.0)
    with pytest.raises(InvalidParameterError, match="q_values"):
        compare_updates(BehaviourOnly(masks_probe().make_env(), 0), _q(),
                        [(0, 0, 1.0, 1, False, False)])
    with pytest.raises(InvalidParameterError, match="reference chose action"):
        compare_updates(_q(exploration=0.0), _q(), [(0, 2, 1.0, 1, False, False)] * 2, act=True)


def test_record_transitions_replays_exactly_with_act():
    probe = masks_probe()

    def sarsa(seed):
        return tdkit.Sarsa.for_env(probe.make_env(), step_size=0.5, exploration=0.3, seed=seed)

    stream = record_transitions(sarsa(7), probe.make_env(), episodes=30, seed=1)
    assert all(isinstance(t, RecordedTransition) for t in stream)
    # Episodes start in state 0 or 1; the mask of state 1 forbids action 1.
    assert all(t.mask is None or t.mask.tolist() in ([True, True], [True, False])
               for t in stream)
    assert all(not (t.obs == 1 and t.action == 1) for t in stream)
    assert compare_updates(sarsa(7), sarsa(7), stream, act=True) is None
    found = compare_updates(sarsa(7), sarsa(8), stream, act=True)
    assert found is not None and found.kind in ("action", "value")


# ---------------------------------------------------------------- compare_performance
GRID = gridworld_4x4()  # Sutton & Barto (2018), Example 4.1: optimum -1.866... per episode
MAKE_ENV = functools.partial(GRID.to_env, 100)
GOOD = agent_factory(tdkit.QLearning, step_size=0.5, exploration=0.1)
# Crippled: step size 0.001 leaves the table near its start after 100 episodes, so the
# greedy policy wanders and hits the 100-step limit: a return near -100 against about -2.
CRIPPLED = agent_factory(tdkit.QLearning, step_size=0.001, exploration=0.1)


def test_compare_performance_calls_a_crippled_learner_worse():
    result = compare_performance(CRIPPLED, GOOD, MAKE_ENV, range(8), episodes=100)
    assert result.verdict == "worse", str(result)
    assert result.a.mean.high < result.b.mean.low
    assert compare_performance(GOOD, CRIPPLED, MAKE_ENV, range(8), episodes=100).verdict == (
        "better"
    )
    assert "A is worse than B at 95% confidence" in str(result)


def test_compare_performance_calls_two_copies_of_one_learner_no_different():
    # Under the null hypothesis Welch's test rejects with probability 1 - confidence.
    # One fixed seed block at confidence 0.99 (false alarm 1%, deterministic here), and
    # a calibration check: over 10 disjoint blocks at 0.95 the number of false alarms is
    # Binomial(10, 0.05) if the test is calibrated; P(>= 3) = 1.2%, so at most 2 pass.
    result = compare_performance(GOOD, GOOD, MAKE_ENV, range(10), episodes=300,
                                 confidence=0.99)
    assert result.verdict == "no different", str(result)
    alarms = sum(
        compare_performance(GOOD, GOOD, MAKE_ENV, range(10 * k, 10 * k + 10), episodes=300,
                            n_resamples=200).verdict != "no different"
        for k in range(1, 11)
    )
    assert alarms <= 2


def test_compare_performance_gives_the_same_result_on_any_executor():
    serial = compare_performance(GOOD, CRIPPLED, MAKE_ENV, range(4), episodes=50)
    with concurrent.futures.ThreadPoolExecutor(2) as pool:
        assert compare_performance(GOOD, CRIPPLED, MAKE_ENV, range(4), episodes=50,
                                   executor=pool) == serial
    with concurrent.futures.ProcessPoolExecutor(2) as pool:
        assert compare_performance(GOOD, CRIPPLED, MAKE_ENV, range(4), episodes=50,
                                   executor=pool) == serial


def test_compare_performance_summaries_match_tdkit_stats():
    result = compare_performance(GOOD, CRIPPLED, MAKE_ENV, range(5), episodes=50)
    assert result.a.mean.estimate == pytest.approx(np.mean(result.a.scores))
    assert result.b.iqm.estimate == pytest.approx(tdkit.stats.iqm(result.b.scores))
    assert result.welch == tdkit.stats.welch_test(result.a.scores, result.b.scores)
    assert result.seeds == (0, 1, 2, 3, 4)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"seeds": [0]}, "at least 2"),
        ({"seeds": [0, -1]}, "non-negative"),
        ({"episodes": 0}, "episodes"),
        ({"confidence": 1.5}, "confidence"),
        ({"executor": object()}, "executor"),
    ],
)
def test_compare_performance_rejects_bad_settings(kwargs, match):
    with pytest.raises(InvalidParameterError, match=match):
        compare_performance(GOOD, GOOD, MAKE_ENV, **{"seeds": range(3), **kwargs})
    with pytest.raises(InvalidParameterError, match="make_env must be callable"):
        compare_performance(GOOD, GOOD, GRID)


def test_agent_factory_pickles_and_refuses_a_seed():
    import pickle

    make = pickle.loads(pickle.dumps(agent_factory(tdkit.Sarsa, step_size=0.3)))
    agent = make(MAKE_ENV(), 4)
    assert isinstance(agent, tdkit.Sarsa) and agent.seed == 4 and agent.step_size == 0.3
    with pytest.raises(InvalidParameterError, match="seed"):
        agent_factory(tdkit.Sarsa, seed=1)

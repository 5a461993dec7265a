"""Every tdkit learner passes verify_agent: recommended settings, defaults, both levels.

The list of learners is read from ``tdkit.learners.__all__``, so learners added
later are verified too (a new learner with unusual constructor keywords gets
an entry in ``tdkit.verify.factories._EXTRA``).

CI runs a fixed subset of seeds (stated below); benchmarks/calibrate_verify.py
runs the rest and docs/verify.md publishes the measured false-alarm rates.
Every check is built for at most 1 false alarm in 1,000 runs of a correct agent
(see tdkit.verify.checks), so the seeds here are not chosen to pass: they are
the first ones after 0.
"""

from __future__ import annotations

import inspect

import numpy as np
import pytest

import tdkit.learners
from tdkit.verify import recommended_settings, run_check, verify_agent

# Hyper-parameters a team would choose for the verifier (docs/verify.md and
# tdkit.verify.recommended_settings): step size 0.1; off-policy learners explore
# with a constant epsilon = 0.1; on-policy learners decay it to 0.01 (Singh et al.
# 2000, "Convergence results for single-step on-policy reinforcement-learning
# algorithms", Machine Learning 38: GLIE); planning learners use the counts model;
# prediction learners evaluate the uniform random policy.


def _is_prediction(cls):
    return "policy" in inspect.signature(cls.__init__).parameters


def learner_factory(name, *, recommended=True):
    cls = getattr(tdkit.learners, name)

    def make(env, seed):
        kwargs = dict(recommended_settings(name)) if recommended else {}
        kwargs["seed"] = seed
        if _is_prediction(cls):
            n, m = env.observation_space.n, env.action_space.n
            kwargs["policy"] = np.full((n, m), 1.0 / m)
        return cls.for_env(env, **kwargs)

    make.__name__ = f"make_{name}" + ("" if recommended else "_defaults")
    return make


# Average-reward learners are checked by tdkit.verify._average_checks (issue 12) until
# verify_agent knows them.
LEARNERS = sorted(n for n in tdkit.learners.__all__ if not n.startswith("Differential"))
CONTROL = [n for n in LEARNERS if not _is_prediction(getattr(tdkit.learners, n))]
PLANNING = {"DynaQ", "DynaQPlus", "PrioritizedSweeping"}


def _expected_skips(name):
    # average_reward: only for agents with an average_reward attribute (none here).
    if _is_prediction(getattr(tdkit.learners, name)):
        return {"tie_breaking", "masks", "next_action", "average_reward"}
    allowed = {"next_action", "average_reward"}  # next_action needs one-step targets
    if name in PLANNING:
        allowed.add("step_size")  # planning replays pairs inside one update
    return allowed


@pytest.mark.parametrize("name", LEARNERS)
def test_every_tdkit_learner_passes_with_the_recommended_settings(name):
    report = verify_agent(learner_factory(name), level="quick", seed=0)
    assert report.passed, str(report)
    skipped = {c.name for c in report if c.skipped}
    assert skipped <= _expected_skips(name), str(report)
    for check in report:
        if check.skipped:
            assert check.message  # a reason, never a silent pass


# Defaults (the constructor's own step size 0.1 and constant epsilon 0.1), level quick:
# QLearning on 10 seeds, every other control learner on 2; the calibration script
# runs 300 seeds of each.
DEFAULT_RUNS = [("QLearning", s) for s in range(1, 11)] + [
    (name, seed) for name in CONTROL if name != "QLearning" for seed in (1, 2)
]


@pytest.mark.parametrize(("name", "seed"), DEFAULT_RUNS)
def test_every_control_learner_passes_quick_with_its_defaults(name, seed):
    report = verify_agent(learner_factory(name, recommended=False), level="quick", seed=seed)
    assert report.passed, str(report)


# Level full trains three independent runs per check (seeds s, s + 1, s + 2), so one
# full report at seed 1 covers seeds 1-3.
@pytest.mark.parametrize("name", ["QLearning", "ExpectedSarsa", "TD0"])
def test_some_learners_pass_full(name):
    report = verify_agent(learner_factory(name, recommended=False), level="full", seed=1)
    assert report.passed, str(report)


def test_one_step_sarsa_is_really_checked_for_its_next_action():
    # The SARSA-consistency check does not merely skip tdkit's Sarsa: it reads its targets.
    report = verify_agent(learner_factory("Sarsa"))
    assert report["next_action"].passed
    assert "act took that action every time" in report["next_action"].message


# Runs the calibration script (benchmarks/calibrate_verify.py) found failing before the
# verifier was mended: seeds 28, 29 and 38 of Double Q-learning's defaults on both_flags
# (its checked state was reached only by exploring), and every seed of prioritized
# sweeping's defaults on the full level's stochastic random walk (a last-outcome model
# has another fixed point there; the check now says it does not run that problem).
@pytest.mark.parametrize("seed", [28, 29, 38])
def test_double_q_learning_defaults_pass_both_flags_on_the_seeds_that_once_failed(seed):
    result = run_check(learner_factory("DoubleQLearning", recommended=False), "both_flags",
                       level="quick", seed=seed)
    assert result.passed, result


# Found by the calibration at quick seeds 1-208 (commit f181168), mended since:
# * next_action failed Double Q-learning's defaults on seeds 162 and 166. It reports the
#   mean of its two tables but bootstraps on one of them; on the deterministic probe the
#   two tables held equal entries, so a target decoded, by coincidence, as a bootstrap on a
#   non-greedy mean entry. The check now reads targets only of agents all of whose
#   one-step updates decode, and skips Double Q-learning with the reason.
# * convergence failed Sarsa(lambda)'s defaults on seed 162: the final greedy action of a
#   seldom visited corner stepped into the wall. The greedy action is now read from the
#   iterate-averaged values with a derived margin (_judge_average_policy).
@pytest.mark.parametrize("seed", [162, 166])
def test_double_q_learning_is_not_judged_on_next_actions_it_cannot_name(seed):
    result = run_check(learner_factory("DoubleQLearning", recommended=False), "next_action",
                       level="quick", seed=seed)
    assert result.skipped, result
    assert "do not read as R + gamma Q(s', a')" in result.message


def test_sarsa_lambda_defaults_pass_convergence_on_the_seed_that_once_failed():
    result = run_check(learner_factory("SarsaLambda", recommended=False), "convergence",
                       level="quick", seed=162)
    assert result.passed, result


# Found by the calibration at quick seed 236 (commit b4f646d): convergence failed Double
# Q-learning's defaults. An entry of one table, not revisited for 4,000 episodes, kept an
# early optimistic value, became that table's argmax and pulled its targets 0.6 below v* in
# the neighbouring state until it was updated near the end of training. The check now
# trains a second budget when its first judgment fails and reports only a second failure.
def test_double_q_learning_defaults_pass_convergence_with_a_second_budget_at_seed_236():
    result = run_check(learner_factory("DoubleQLearning", recommended=False), "convergence",
                       level="quick", seed=236)
    assert result.passed, result
    assert "a second budget of training was needed on gridworld-4x4 at seed 236" in (
        result.message)


def test_a_last_outcome_planner_is_not_held_to_q_star_on_a_stochastic_problem():
    result = run_check(learner_factory("PrioritizedSweeping", recommended=False),
                       "convergence", level="full", seed=1)
    assert result.passed, result
    assert "not run on random-walk-5" in result.message and "model='counts'" in result.message
    counts = run_check(learner_factory("PrioritizedSweeping"), "convergence", level="full",
                       seed=1)
    assert counts.passed and "random-walk-5" in counts.message
    assert "not run" not in counts.message

"""Mutation tests: deliberately broken agents, each with one classic bug.

``verify_agent`` must fail every mutant on the check that names its bug, and
``compare_updates`` must point at the first step where an update-rule bug
shows (the step indices below are derived by hand next to each stream).

Each mutant subclasses a tdkit learner and changes one thing; the bugs are
the ones Sutton & Barto (2018, Reinforcement Learning: An Introduction, 2nd
ed.) warn about around the algorithms they break: the terminal convention of
Section 3.4 (the value of a terminal state is 0), time limits (Section 3.4
and Pardo et al. 2018, "Time Limits in Reinforcement Learning", ICML:
truncation is not termination), tie-breaking of the greedy choice (Section
2.2: "ties broken randomly"), the on-policy target of SARSA (Section 6.4,
Eq. 6.7: A_{t+1} is the action taken next), the n-step return (Section 7.2,
Eq. 7.4: gamma^n on the bootstrap term), and discounting (Eq. 3.8).
"""

from __future__ import annotations

import numpy as np
import pytest

import tdkit
from tdkit.agent import TabularAgent
from tdkit.learners import NStepSarsa, QLearning, Sarsa, SarsaLambda
from tdkit.verify import compare_updates, record_transitions, run_check, verify_agent

# ---------------------------------------------------------------- the mutants


class BootstrapsPastTerminal(QLearning):
    """Adds gamma * max Q(next_obs) even when the episode terminated."""

    def _learn(self, transition):
        s, a, r, s2, _terminated, _truncated, next_mask = transition
        target = r + self.gamma * float(np.max(self._q[s2] if next_mask is None
                                               else self._q[s2][next_mask]))
        return (self._td_step(self._q, self._visits, s, a, target),)


class TruncationAsTerminal(QLearning):
    """Stops bootstrapping at a time limit, as if the episode had terminated."""

    def _learn(self, transition):
        s, a, r, s2, terminated, truncated, next_mask = transition
        return super()._learn((s, a, r, s2, terminated or truncated, truncated, next_mask))


class FirstIndexTies(QLearning):
    """Greedy choice by np.argmax: the lowest index wins every tie."""

    def _choose(self, s, mask, explore):
        values = self._q[s] if mask is None else np.where(mask, self._q[s], -np.inf)
        if explore and self._rng.random() < self._explore.current(self.steps_):
            allowed = np.flatnonzero(np.ones(self.n_actions, bool) if mask is None else mask)
            return int(allowed[int(self._rng.random() * allowed.size)])
        return int(np.argmax(values))


class IgnoresMaskInTargets(QLearning):
    """Maximises over every action of the next state, masked or not."""

    def _learn(self, transition):
        s, a, r, s2, terminated, truncated, _next_mask = transition
        return super()._learn((s, a, r, s2, terminated, truncated, None))


class SarsaTakesAnotherAction(Sarsa):
    """Bootstraps on a drawn next action but then acts with a fresh draw."""

    def act(self, obs, *, mask=None, explore=True):
        return TabularAgent.act(self, obs, mask=mask, explore=explore)


class OffByOneNStepSarsa(NStepSarsa):
    """n-step SARSA whose bootstrap term is discounted by gamma^(n-1) instead of gamma^n."""

    def _update_front(self, count, tail, terminated):
        steps = list(self._buffer)
        length = len(steps)
        s2, _mask2, a2 = tail
        errors = []
        for j in range(count):
            s, a = steps[j][0], steps[j][1]
            g = sum(self.gamma ** (i - j) * steps[i][2] for i in range(j, length))
            if not terminated:
                g += self.gamma ** (length - j - 1) * self._q[s2, a2]  # the bug: one power short
            errors.append(self._td_step(self._q, self._visits, s, a, g))
        return errors


class MissingGamma(QLearning):
    """Forgets the discount: target R + max_a Q(S', a)."""

    def _learn(self, transition):
        s, a, r, s2, terminated, _truncated, next_mask = transition
        best = self._q[s2] if next_mask is None else self._q[s2][next_mask]
        target = r if terminated else r + float(best.max())
        return (self._td_step(self._q, self._visits, s, a, target),)


class WrongSignGamma(QLearning):
    """Subtracts the discounted bootstrap: target R - gamma max_a Q(S', a)."""

    def _learn(self, transition):
        s, a, r, s2, terminated, _truncated, next_mask = transition
        best = self._q[s2] if next_mask is None else self._q[s2][next_mask]
        target = r if terminated else r - self.gamma * float(best.max())
        return (self._td_step(self._q, self._visits, s, a, target),)


class BootstrapsWhenTruncated(QLearning):
    """Checks ``truncated`` first: bootstraps at a time limit even when the episode terminated."""

    def _learn(self, transition):
        s, a, r, s2, terminated, truncated, next_mask = transition
        if truncated:
            terminated = False
        return super()._learn((s, a, r, s2, terminated, truncated, next_mask))


class DiscountsTwice(QLearning):
    """Applies gamma twice: target R + gamma^2 max_a Q(S', a)."""

    def _learn(self, transition):
        s, a, r, s2, terminated, _truncated, next_mask = transition
        best = self._q[s2] if next_mask is None else self._q[s2][next_mask]
        target = r if terminated else r + self.gamma * self.gamma * float(best.max())
        return (self._td_step(self._q, self._visits, s, a, target),)


class ExploresWhenGreedy(QLearning):
    """Ignores ``explore=False``: acts epsilon-greedily even when asked for the greedy action."""

    def _choose(self, s, mask, explore):
        return super()._choose(s, mask, True)


class CarriesBufferAcrossEpisodes(NStepSarsa):
    """No end_episode semantics: the n-step buffer of a cut episode runs on into the next."""

    end_episode = None  # the driver finds no end_episode to settle a cut episode

    def _learn(self, transition):
        if self._tail is not None and transition[0] != self._tail[0]:
            self._tail = (transition[0], *self._tail[1:])  # glue the next episode on
        return super()._learn(transition)


class CarriesTracesAcrossEpisodes(SarsaLambda):
    """No end_episode semantics: eligibility traces of a cut episode stay active."""

    end_episode = None

    def _learn(self, transition):
        if self._expect is not None and transition[0] != self._expect:
            self._expect = transition[0]  # keep the traces of the previous episode
        return super()._learn(transition)


class SampleAverageStepSize(QLearning):
    """Uses 1/n (the n-th visit of the pair) although a constant step size was asked."""

    def _td_step(self, values, visits, s, a, target, weight=1.0):
        visits[s, a] += 1
        delta = weight * (target - values[s, a])
        values[s, a] += delta / visits[s, a]
        return float(delta)


class MinimisingTarget(QLearning):
    """Bootstraps on the worst next action: target R + gamma min_a Q(S', a)."""

    def _learn(self, transition):
        s, a, r, s2, terminated, _truncated, next_mask = transition
        row = self._q[s2] if next_mask is None else self._q[s2][next_mask]
        target = r if terminated else r + self.gamma * float(row.min())
        return (self._td_step(self._q, self._visits, s, a, target),)


class ReportsValuesUnderTheWrongAction(QLearning):
    """Learns correctly, but ``q_values`` shifts each row by one action (an indexing bug)."""

    def q_values(self, obs):
        return np.roll(super().q_values(obs), 1)


class HalvingEncoder:
    """Sends observations 2k and 2k + 1 to the same row (a collision-prone encoder)."""

    def __init__(self, n_states):
        self.n_states = n_states

    def encode(self, obs):
        return int(obs) // 2


def _factory(cls, **kwargs):
    def make(env, seed):
        return cls.for_env(env, step_size=0.5, exploration=0.1, seed=seed, **kwargs)
    make.__name__ = f"make_{cls.__name__}"
    return make


def _colliding(env, seed):
    n = env.observation_space.n
    return QLearning(n, env.action_space.n, gamma=env.unwrapped.gamma, step_size=0.5,
                     exploration=0.1, seed=seed, state_encoder=HalvingEncoder(n))


MUTANTS = [
    pytest.param(_factory(BootstrapsPastTerminal), "terminal", id="bootstraps-past-terminal"),
    pytest.param(_factory(TruncationAsTerminal), "truncation", id="truncation-as-terminal"),
    pytest.param(_factory(FirstIndexTies), "tie_breaking", id="first-index-ties"),
    pytest.param(_factory(IgnoresMaskInTargets), "masks", id="ignores-masks-in-targets"),
    pytest.param(_factory(SarsaTakesAnotherAction), "next_action", id="sarsa-takes-another-action"),
    pytest.param(_factory(OffByOneNStepSarsa, n=2), "discounted_returns", id="n-step-off-by-one"),
    pytest.param(_factory(MissingGamma), "discounted_returns", id="missing-gamma"),
    pytest.param(_factory(WrongSignGamma), "discounted_returns", id="wrong-sign-gamma"),
    pytest.param(_colliding, "state_encoding", id="state-encoder-collisions"),
    pytest.param(_factory(BootstrapsWhenTruncated), "both_flags",
                 id="bootstraps-when-both-flags"),
    pytest.param(_factory(DiscountsTwice), "discounted_returns", id="discounts-twice"),
    pytest.param(_factory(ExploresWhenGreedy), "discounted_returns",
                 id="explores-when-greedy"),
    pytest.param(_factory(CarriesBufferAcrossEpisodes, n=3), "episode_boundaries",
                 id="carries-buffer-across-episodes"),
    pytest.param(_factory(CarriesTracesAcrossEpisodes), "episode_boundaries",
                 id="carries-traces-across-episodes"),
    pytest.param(_factory(SampleAverageStepSize), "step_size", id="one-over-n-step-size"),
    pytest.param(_factory(MinimisingTarget), "convergence", id="minimising-target"),
    pytest.param(_factory(ReportsValuesUnderTheWrongAction), "convergence",
                 id="values-under-the-wrong-action"),
]

#: The words each mutant's failure message must contain (it names the bug it saw).
NAMES = {
    "bootstraps-when-both-flags": "terminated and truncated are both set",
    "discounts-twice": "discounting twice",
    "explores-when-greedy": "exploring when explore=False",
    "carries-buffer-across-episodes": "across episodes",
    "carries-traces-across-episodes": "across episodes",
    "one-over-n-step-size": "1/n",
    "bootstraps-past-terminal": "bootstrapping past terminated",
    "truncation-as-terminal": "truncation (a time limit) as termination",
    "first-index-ties": "lowest index",
    "ignores-masks-in-targets": "masked actions",
    "missing-gamma": "missing discount",
    "minimising-target": "iterate average over the second half of training",
    "values-under-the-wrong-action": "greedy action of the averaged values",
}

#: For the calibration script (benchmarks/calibrate_verify.py): name -> factory / check.
MUTANT_FACTORIES = {p.id: p.values[0] for p in MUTANTS}
MUTANT_CHECKS = {p.id: p.values[1] for p in MUTANTS}


@pytest.mark.parametrize(("make_agent", "check"), MUTANTS)
def test_verify_agent_fails_the_mutant_on_the_check_that_names_its_bug(make_agent, check,
                                                                       request):
    # Seed 3 here (seed 0 in the control below); the calibration script runs 50 seeds.
    report = verify_agent(make_agent, level="quick", seed=3)
    assert report["protocol"].passed, report
    assert report[check].failed, report
    assert not report.passed
    # The failure names where to look: seed and probe environment, and the bug it saw.
    assert report[check].seed == 3 and report[check].env
    words = NAMES.get(request.node.callspec.id)
    if words is not None:
        assert words in report[check].message, report[check].message


@pytest.mark.parametrize("bug", ["minimising-target", "values-under-the-wrong-action"])
def test_a_convergence_bug_fails_the_second_budget_too(bug):
    # The convergence check trains a second budget when its first judgment fails; a bug
    # that moves the fixed point fails again, and the rebuild line trains twice.
    result = run_check(MUTANT_FACTORIES[bug], "convergence", level="quick", seed=3)
    assert result.failed, result
    assert "after a second budget of 6000 episodes (the first 6000 failed too)" in (
        result.message)
    assert result.rebuild.count("tdkit.train(") == 2, result.rebuild
    assert result.where == "after 12000 episodes", result.where


def test_the_unmutated_parents_pass_the_same_checks():
    # Control for the test above: the parents with the same factory settings pass
    # the checks their mutants fail (so those failures come from the bugs).
    for cls, checks in [
        (QLearning, ["terminal", "truncation", "both_flags", "tie_breaking", "masks",
                     "discounted_returns", "state_encoding", "step_size", "convergence"]),
        (Sarsa, ["next_action"]),
        (NStepSarsa, ["discounted_returns", "episode_boundaries"]),
        (SarsaLambda, ["episode_boundaries"]),
    ]:
        kwargs = {"n": 2} if cls is NStepSarsa else {}
        report = verify_agent(_factory(cls, **kwargs), level="quick", seed=0)
        for name in checks:
            assert report[name].passed, report


def test_first_index_tie_breaking_failure_reports_the_counts():
    report = verify_agent(_factory(FirstIndexTies), level="quick", seed=0)
    message = report["tie_breaking"].message
    assert "[200, 0, 0, 0]" in message and "lowest index" in message


def test_encoder_collision_is_reported_with_the_state_and_its_values():
    report = verify_agent(_colliding, level="quick", seed=0)
    assert "state" in report["state_encoding"].message.lower() or "Q(" in (
        report["state_encoding"].message
    )


# ---------------------------------------------------------------- compare_updates
# Every stream below runs on 3 states and 2 actions with gamma = 0.9 and step
# size 0.5, from all-zero tables. Reference and mutant share the seed. The
# comment under each transition gives the reference's update; "same" means
# the mutant computes the same value, so the first divergence is where the
# comments say "differs".


def _pair(mutant, reference=QLearning, **kwargs):
    args = dict(gamma=0.9, step_size=0.5, exploration=0.0, seed=3, **kwargs)
    return reference(3, 2, **args), mutant(3, 2, **args)


def test_compare_updates_finds_bootstrap_past_terminal_at_its_first_effect():
    stream = [
        (0, 0, 1.0, 1, False, False),  # Q(0,0) = 0.5
        (1, 0, 1.0, 2, True, False),   # terminated into an all-zero row: same
        (1, 1, 0.0, 0, True, False),   # terminated into row 0 (max 0.5): differs
    ]
    found = compare_updates(*_pair(BootstrapsPastTerminal), stream)
    assert found is not None and found.kind == "value"
    assert (found.step, found.state, found.action) == (2, 1, 1)
    # Reference: Q(1,1) = 0.5 * 0 = 0; mutant: 0.5 * (0 + 0.9 * 0.5) = 0.225.
    assert found.expected == 0.0 and found.seen == pytest.approx(0.225)


def test_compare_updates_finds_truncation_treated_as_termination():
    stream = [
        (0, 0, 1.0, 1, False, True),   # truncated into an all-zero row: same (Q(0,0) = 0.5)
        (1, 0, 1.0, 0, False, False),  # Q(1,0) = 0.5 (1 + 0.9 * 0.5) = 0.725: same
        (0, 1, 0.0, 1, False, True),   # truncated into row 1 (max 0.725): differs
    ]
    found = compare_updates(*_pair(TruncationAsTerminal), stream)
    assert (found.step, found.state, found.action) == (2, 0, 1)
    assert found.expected == pytest.approx(0.5 * 0.9 * 0.725) and found.seen == 0.0


def test_compare_updates_finds_a_masked_action_in_the_target():
    stream = [
        (0, 0, 1.0, 1, False, False),                          # Q(0,0) = 0.5
        (1, 0, 0.0, 0, False, False, np.array([True, False])),  # allowed max is the max: same
        (1, 1, 0.0, 0, False, False, np.array([False, True])),  # masked 0.5 enters: differs
    ]
    found = compare_updates(*_pair(IgnoresMaskInTargets), stream)
    assert (found.step, found.state, found.action) == (2, 1, 1)
    assert found.expected == 0.0 and found.seen == pytest.approx(0.5 * 0.9 * 0.5)


@pytest.mark.parametrize("mutant", [MissingGamma, WrongSignGamma])
def test_compare_updates_finds_a_wrong_discount(mutant):
    stream = [
        (0, 0, 1.0, 1, False, False),  # bootstrap from an all-zero row: same (Q(0,0) = 0.5)
        (1, 0, 1.0, 0, False, False),  # bootstraps on Q(0,0) = 0.5: differs
    ]
    found = compare_updates(*_pair(mutant), stream)
    assert (found.step, found.state, found.action) == (1, 1, 0)
    assert found.expected == pytest.approx(0.5 * (1 + 0.9 * 0.5))


def test_compare_updates_finds_the_off_by_one_n_step_return():
    # n = 2, exploration 0: the bootstrap action is the greedy one (untied below).
    stream = [
        (0, 0, 1.0, 1, False, False),  # buffered
        (1, 0, 1.0, 2, False, False),  # tau=0: G = 1 + 0.9 + gamma^2 Q(2, .) = 1.9: same
        (2, 0, 1.0, 0, False, False),  # tau=1: bootstraps on Q(0,0) = 0.95: differs
    ]
    ref, bug = _pair(OffByOneNStepSarsa, reference=NStepSarsa, n=2)
    found = compare_updates(ref, bug, stream)
    assert (found.step, found.state, found.action) == (2, 1, 0)
    assert found.expected == pytest.approx(0.5 * (1.9 + 0.81 * 0.95))
    assert found.seen == pytest.approx(0.5 * (1.9 + 0.9 * 0.95))


def test_compare_updates_finds_where_sarsa_takes_another_action():
    # A stream recorded from a reference SARSA (seed 11, exploration 0.3) on the
    # 4x4 gridworld of Sutton & Barto (2018), Example 4.1.
    env = tdkit.envs.problems.gridworld_4x4().to_env(30)

    def make(cls):
        return cls(16, 4, gamma=1.0, step_size=0.5, exploration=0.3, seed=11)

    stream = record_transitions(make(Sarsa), env, episodes=20, seed=5)
    assert compare_updates(make(Sarsa), make(Sarsa), stream, act=True) is None

    # Independent oracle: replay reference and mutant side by side, comparing the
    # action each takes and the whole tables after each step.
    ref, bug = make(Sarsa), make(SarsaTakesAnotherAction)
    expected = None
    for i, t in enumerate(stream):
        if ref.act(t.obs, mask=t.mask) != bug.act(t.obs, mask=t.mask):
            expected = (i, "action")
            break
        for agent in (ref, bug):
            agent.observe(*t[:6], next_mask=t.next_mask)
            agent.update()
        if not np.array_equal(ref.table, bug.table):
            expected = (i, "value")
            break
    assert expected is not None
    found = compare_updates(make(Sarsa), make(SarsaTakesAnotherAction), stream, act=True)
    assert (found.step, found.kind) == expected

"""Average-reward learners: DifferentialQLearning, DifferentialSarsa, DifferentialTD.

Sources: the update equations of Wan, Y., Naik, A. & Sutton, R. S. (2021),
"Learning and planning in average-reward Markov decision processes", ICML
(Differential Q-learning and Differential TD-learning), re-implemented here
independently of tdkit; exact gains from tdkit.relative_value_iteration, which
tests/unit/test_average_dp.py checks against scipy's linear programming.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import tdkit
from tdkit import (
    DifferentialQLearning,
    DifferentialSarsa,
    DifferentialTD,
    FiniteMDP,
    InvalidParameterError,
    relative_value_iteration,
)
from tdkit.schedules import Exponential
from tdkit.verify._average_checks import check_average_reward

ALPHA, ETA = 0.3, 0.5


def _make(cls, n_states, n_actions, seed=0, **kwargs):
    if cls is DifferentialTD:
        kwargs.setdefault("policy", np.full((n_states, n_actions), 1.0 / n_actions))
    else:
        kwargs.setdefault("exploration", 0.3)
    return cls(n_states, n_actions, step_size=ALPHA, reward_step_size=ETA, seed=seed, **kwargs)


# ---------------------------------------------------------------- the equations, step by step
class Reference:
    """Wan, Naik & Sutton (2021), written out plainly, with the restart reading of
    ``terminated`` (the held transition bootstraps from the next episode's start)."""

    def __init__(self, kind, n_states, n_actions):
        self.kind = kind
        self.q = np.zeros((n_states, 1 if kind == "td" else n_actions))
        self.rbar = 0.0
        self.held = None

    def value(self, s, a):
        if self.kind == "q":
            return self.q[s].max()
        return self.q[s, 0 if self.kind == "td" else a]

    def _apply(self, s, col, target):
        delta = target - self.q[s, col]
        self.q[s, col] += ALPHA * delta
        self.rbar += ETA * ALPHA * delta
        return delta

    def step(self, s, a, r, s2, a2, terminated, observed):
        """Errors of one transition; ``a2`` is None when SARSA drew an uncommitted
        bootstrap action itself (a time limit): any action may have been drawn, so the
        one whose error matches the learner's is used."""
        errors = []
        col = 0 if self.kind == "td" else a
        if self.held is not None:
            hs, hcol, hr = self.held
            self.held = None
            errors.append(self._apply(hs, hcol, hr - self.rbar + self.value(s, a)))
        if terminated:
            self.held = (s, col, r)
            return errors
        if self.kind == "sarsa" and a2 is None:
            last = observed[-1]
            a2 = int(np.argmin([abs(r - self.rbar + self.q[s2, b] - self.q[s, col] - last)
                                for b in range(self.q.shape[1])]))
        errors.append(self._apply(s, col, r - self.rbar + self.value(s2, a2)))
        return errors


@pytest.mark.parametrize(
    ("cls", "kind"), [(DifferentialQLearning, "q"), (DifferentialSarsa, "sarsa"),
                      (DifferentialTD, "td")]
)
@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n_states=st.integers(1, 4), n_actions=st.integers(1, 3))
def test_updates_follow_the_published_equations(cls, kind, seed, n_states, n_actions):
    # Random rewards, successors and episode ends (15% terminated, 15% truncated);
    # actions come from the agent, act before update, so SARSA's A_{t+1} is the
    # action really taken next.
    rng = np.random.default_rng(seed)
    agent = _make(cls, n_states, n_actions, seed=seed)
    ref = Reference(kind, n_states, n_actions)
    s = int(rng.integers(n_states))
    a = agent.act(s)
    for _ in range(60):
        r = float(rng.normal())
        s2 = int(rng.integers(n_states))
        u = rng.random()
        terminated, truncated = u < 0.15, 0.15 <= u < 0.3
        agent.observe(s, a, r, s2, terminated, truncated)
        if terminated or truncated:
            errors = agent.update()
            expected = ref.step(s, a, r, s2, None, terminated, errors)
            s = int(rng.integers(n_states))  # the next episode starts anywhere
            a = agent.act(s)
        else:
            a2 = agent.act(s2)
            errors = agent.update()
            expected = ref.step(s, a, r, s2, a2, False, errors)
            s, a = s2, a2
        assert len(errors) == len(expected)
        np.testing.assert_allclose(errors, expected, rtol=1e-10, atol=1e-10)
        table = agent.values_table[:, None] if kind == "td" else agent.table
        np.testing.assert_allclose(table, ref.q, atol=1e-10)
        assert agent.average_reward == pytest.approx(ref.rbar, abs=1e-10)


# ---------------------------------------------------------------- terminated and truncated
@pytest.mark.parametrize("cls", [DifferentialQLearning, DifferentialSarsa, DifferentialTD])
def test_terminated_waits_for_the_next_start_state_and_truncated_bootstraps(cls):
    agent = _make(cls, 3, 1)
    agent.observe(1, 0, 4.0, 2, False, False)
    (d1,) = agent.update()  # Q(1) = 0.3 * 4 = 1.2, rbar = 0.5 * 1.2 = 0.6
    assert d1 == 4.0
    # terminated: nothing is applied yet (the start of the next episode is unknown)
    agent.observe(0, 0, 2.0, 2, True, False)
    assert agent.update() == ()
    before = agent.average_reward
    # the next episode starts in state 1: the held update bootstraps from V(1) = 1.2
    agent.act(1)
    agent.observe(1, 0, 0.0, 1, False, True)  # and this one is cut by a time limit
    held, cut = agent.update()
    assert held == pytest.approx(2.0 - before + 1.2 - 0.0)
    rbar = before + ETA * ALPHA * held
    # truncated: bootstraps from next_obs (state 1, whose value is still 1.2)
    assert cut == pytest.approx(0.0 - rbar + 1.2 - 1.2)


@pytest.mark.parametrize("cls", [DifferentialQLearning, DifferentialSarsa, DifferentialTD])
def test_both_flags_mean_terminated(cls):
    agent = _make(cls, 2, 1)
    agent.observe(0, 0, 1.0, 1, True, True)
    assert agent.update() == ()


def test_the_restart_max_respects_the_mask_act_saw():
    agent = DifferentialQLearning(2, 2, step_size=1.0, reward_step_size=ETA, seed=0,
                                  initial_value=0.0, exploration=0.0)
    agent._q[1] = [10.0, 0.0]  # action 0 of state 1 looks best but is forbidden there
    agent.observe(0, 0, 0.0, 1, True, False)
    assert agent.update() == ()
    mask = np.array([False, True])
    assert agent.act(1, mask=mask) == 1
    agent.observe(1, 1, 0.0, 0, False, False)
    held, _ = agent.update()
    assert held == pytest.approx(0.0 - 0.0 + 0.0 - 0.0)  # max over allowed = Q(1, 1) = 0


def test_sarsa_bootstraps_from_the_action_taken_and_commits_it():
    agent = DifferentialSarsa(2, 3, step_size=1.0, reward_step_size=ETA, exploration=1.0,
                              seed=3)
    agent._q[1] = [10.0, 20.0, 30.0]
    agent.observe(0, 0, 0.0, 1, False, False)
    (delta,) = agent.update()
    # delta = 0 - 0 + Q(1, a') - 0 with the committed a'; act(1) returns that a'
    assert agent.act(1) == round(delta / 10.0) - 1


def _deterministic_restart_model():
    # 0 -> 1 (reward 1) -> terminal 2 (reward 3), then the task restarts in 0.
    # The terminal state takes no step: gain (1 + 3) / 2 = 2. Reading it as "no
    # bootstrap" gives 7 eta / (1 + 3 eta) (= 1.4 at eta = 0.5) from the fixed point
    # R = eta (Q0 + Q1), Q1 = 3 - R, Q0 = 1 - R + Q1; reading it as a state that
    # takes a step with reward 0 gives 4/3.
    P = np.zeros((3, 2, 3))
    P[0, :, 1] = P[1, :, 2] = 1.0
    R = np.array([[1.0, 1.0], [3.0, 3.0], [0.0, 0.0]])
    return FiniteMDP(P, R, gamma=0.5, terminal=[False, False, True], initial=[1.0, 0, 0])


@pytest.mark.parametrize("cls", [DifferentialQLearning, DifferentialSarsa, DifferentialTD])
def test_terminal_states_restart_the_task_like_the_exact_solver(cls):
    mdp = _deterministic_restart_model()
    exact = relative_value_iteration(mdp).gain
    assert exact == pytest.approx(2.0)
    env = mdp.to_env()
    kwargs = {"policy": np.full((3, 2), 0.5)} if cls is DifferentialTD else {}
    agent = cls.for_env(env, step_size=0.3, reward_step_size=0.5, seed=0, **kwargs)
    tdkit.train(agent, env, episodes=3000, seed=0)
    # Deterministic rewards and moves, both actions alike: the updates are a fixed
    # linear recursion converging geometrically to the fixed point (no noise), so
    # after 6000 updates the error is far below 1e-6.
    assert agent.average_reward == pytest.approx(exact, abs=1e-6)


# ---------------------------------------------------------------- convergence (verifier check)
def _factory(cls):
    def make(env, seed):
        if cls is DifferentialTD:
            n, m = env.observation_space.n, env.action_space.n
            return cls.for_env(env, policy=np.full((n, m), 1.0 / m), seed=seed)
        if cls is DifferentialSarsa:  # on-policy: exploration decays (GLIE)
            return cls.for_env(env, exploration=Exponential(0.2, 0.999, 0.01), seed=seed)
        return cls.for_env(env, seed=seed)

    return make


@pytest.mark.parametrize("cls", [DifferentialQLearning, DifferentialSarsa, DifferentialTD])
def test_learners_pass_the_average_reward_check(cls):
    # The check's margin is derived for 1e-5 false alarms per run; the calibration over
    # 300 seeds is benchmarks/calibrate_average_check.py.
    passed, message = check_average_reward(_factory(cls), seed=1)
    assert passed, message


class _TimeLimitIsTerminal(DifferentialQLearning):
    """A classic bug: the time limit is treated as the end of the task."""

    def observe(self, obs, action, reward, next_obs, terminated, truncated, *, next_mask=None):
        super().observe(obs, action, reward, next_obs, terminated or truncated, False,
                        next_mask=next_mask)


class _AverageOfRewards(tdkit.DifferentialQLearning):
    """Bug: the average follows the rewards seen (the behaviour's gain), not the TD error."""

    def _differential_step(self, s, a, target):
        return self._td_step(self._q, self._visits, s, a, target)

    def observe(self, obs, action, reward, *args, **kwargs):
        super().observe(obs, action, reward, *args, **kwargs)
        self.average_reward += 0.01 * (reward - self.average_reward)


class _NoAverage(DifferentialQLearning):
    """And another: the average is never learned."""

    def _differential_step(self, s, a, target):
        return self._td_step(self._q, self._visits, s, a, target)


@pytest.mark.parametrize("bug", [_TimeLimitIsTerminal, _AverageOfRewards, _NoAverage])
def test_the_check_catches_classic_bugs(bug):
    passed, message = check_average_reward(
        lambda env, seed: bug.for_env(env, exploration=0.3, seed=seed), seed=0
    )
    assert not passed, message


def test_the_check_reports_an_agent_without_average_reward():
    passed, message = check_average_reward(
        lambda env, seed: tdkit.QLearning.for_env(env, seed=seed), seed=0
    )
    assert not passed
    assert "average_reward" in message


# ---------------------------------------------------------------- construction
@pytest.mark.parametrize("cls", [DifferentialQLearning, DifferentialSarsa, DifferentialTD])
@pytest.mark.parametrize(
    ("kwargs", "name"),
    [
        ({"reward_step_size": 0.0}, "reward_step_size"),
        ({"reward_step_size": -1.0}, "reward_step_size"),
        ({"reward_step_size": math.nan}, "reward_step_size"),
        ({"reward_step_size": "0.1"}, "reward_step_size"),
        ({"initial_average_reward": math.inf}, "initial_average_reward"),
        ({"step_size": 1.5}, "step_size"),
        ({"seed": -3}, "seed"),
    ],
)
def test_hyper_parameters_are_validated(cls, kwargs, name):
    extra = {"policy": np.full((3, 2), 0.5)} if cls is DifferentialTD else {}
    with pytest.raises(InvalidParameterError, match=name):
        cls(3, 2, **extra, **kwargs)


@pytest.mark.parametrize("cls", [DifferentialQLearning, DifferentialSarsa, DifferentialTD])
def test_there_is_no_discount(cls):
    extra = {"policy": np.full((3, 2), 0.5)} if cls is DifferentialTD else {}
    with pytest.raises(TypeError, match="gamma"):
        cls(3, 2, gamma=0.9, **extra)
    env = _deterministic_restart_model().to_env()  # env.unwrapped.gamma = 0.5: not read
    agent = cls.for_env(env, **{k: np.full((3, 2), 0.5) for k in extra})
    assert agent.gamma == 1.0
    assert "gamma" not in agent.get_params()
    with pytest.raises(InvalidParameterError, match="gamma"):
        cls.for_env(env, gamma=0.9, **extra)


# ---------------------------------------------------------------- persistence
@pytest.mark.parametrize("cls", [DifferentialQLearning, DifferentialSarsa, DifferentialTD])
def test_save_load_and_resume_keep_the_average_and_a_held_restart(cls, tmp_path):
    # Episodes end by terminal states here, so a checkpoint taken between episodes
    # holds a terminating transition waiting for the next start state.
    mdp = _deterministic_restart_model()
    env = mdp.to_env()
    kwargs = {"policy": np.full((3, 2), 0.5)} if cls is DifferentialTD else {}

    def fresh():
        return cls.for_env(env, step_size=0.2, reward_step_size=0.3, seed=5, **kwargs)

    whole = fresh()
    h_whole = tdkit.train(whole, env, episodes=40, seed=11)
    assert whole._restart is not None
    ckpt = tmp_path / "run.npz"
    tdkit.train(fresh(), env, episodes=20, seed=11, checkpoint=ckpt)
    resumed = fresh()
    h_resumed = tdkit.train(resumed, env, episodes=40, seed=11, resume=ckpt)
    np.testing.assert_array_equal(h_resumed.returns, h_whole.returns)
    assert resumed.average_reward == whole.average_reward
    again = tdkit.load(tdkit.save(whole, tmp_path / "agent.npz"))
    assert again.average_reward == whole.average_reward
    assert again._restart == whole._restart
    assert again.get_params().keys() == whole.get_params().keys()
    tdkit.train(whole, env, episodes=5, seed=3)
    tdkit.train(again, env, episodes=5, seed=3)
    assert again.average_reward == whole.average_reward


def test_a_held_restart_outside_the_value_table_is_refused_on_load(tmp_path):
    # DifferentialTD learns V(s) in one column, so a saved held restart (state, action,
    # reward) names action 0; an edited file naming another action once loaded and then
    # failed with a bare IndexError at the next update (found by the store's edit fuzzing).
    from tdkit.runs._store_files import digest

    env = _deterministic_restart_model().to_env()
    agent = DifferentialTD.for_env(env, policy=np.full((3, 2), 0.5), seed=5)
    tdkit.train(agent, env, episodes=3, seed=1)
    assert agent._restart is not None and agent._restart[1] == 0
    path = tdkit.save(agent, tmp_path / "agent.npz")
    with np.load(path) as saved:
        arrays = {k: saved[k] for k in saved.files}
    meta = json.loads(arrays.pop("meta").tobytes())
    meta["scalars"]["_restart"][1] = 1
    meta["digests"] = {k: digest(v) for k, v in arrays.items()}
    np.savez(path, meta=np.frombuffer(json.dumps(meta).encode(), dtype=np.uint8), **arrays)
    with pytest.raises(tdkit.StoreError, match="_restart"):
        tdkit.load(path)


def test_a_step_budget_that_cuts_the_one_episode_leaves_nothing_pending():
    from tdkit.envs.access_control import access_control_env

    env = access_control_env()
    agent = DifferentialQLearning.for_env(env, seed=0)
    history = tdkit.train(agent, env, steps=500, seed=0)
    assert history.total_steps == 500
    assert agent._pending == []
    end_episode = getattr(agent, "end_episode", None)
    if end_episode is not None:  # the driver's hook: settled as a time limit, a no-op here
        table, rbar = agent.table.copy(), agent.average_reward
        end_episode()
        np.testing.assert_array_equal(agent.table, table)
        assert agent.average_reward == rbar


def test_the_check_constants_and_probe_are_what_its_docstring_derives():
    from scipy import stats

    from tdkit.verify import _average_checks as checks

    # Two-sided AVERAGE_FALSE_ALARM quantile of Student's t with N_BATCHES - 1 degrees of
    # freedom; batches of 500 steps each over the second half of training.
    assert checks.AVERAGE_FALSE_ALARM == 1e-5
    assert checks.T_QUANTILE == pytest.approx(
        stats.t.isf(checks.AVERAGE_FALSE_ALARM / 2, checks.N_BATCHES - 1), rel=1e-6)
    assert checks.PROBE_EPISODES * checks.PROBE_TIME_LIMIT / 2 / checks.N_BATCHES == 500
    # Gains by hand from the stationary distributions (1/3, 0, 2/3, 0) and
    # (4/9, 1/9, 4/9, 0): 2/3 * 3 = 2 and 4/9 * 1/2 + 4/9 * 3 = 14/9.
    probe = checks.average_probe()
    assert relative_value_iteration(probe).gain == pytest.approx(2.0, abs=1e-8)
    assert tdkit.policy_gain(probe, [0, 0, 0, 0]) == pytest.approx(2 / 3)
    one_action = checks.average_probe(prediction=True)
    assert relative_value_iteration(one_action).gain == pytest.approx(14 / 9, abs=1e-8)

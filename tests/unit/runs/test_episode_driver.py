"""The one episode driver: both flags, cut episodes, strict inputs, and what train reports.

Every value here is computed by hand from the update rules (Sutton & Barto 2018,
*Reinforcement Learning: An Introduction*, 2nd ed., Eq. 7.2 for n-step returns,
Section 12.7 for Sarsa(λ)), not read off a run.
"""

from __future__ import annotations

import warnings

import gymnasium as gym
import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

import tdkit
from tdkit.envs import adapt
from tdkit.runs import (
    EndlessEpisodeWarning,
    MaskReader,
    episode_seed,
    info_mask,
    root_sequence,
    run_episode,
)
from tdkit.runs import episode as episode_module
from tdkit.runs import training as loop


class Chain(gym.Env):
    """States 0..length; the only action moves right with reward 1; ``length`` terminates."""

    def __init__(self, length: int = 6, fail_at: int | None = None) -> None:
        self.length = length
        self.fail_at = fail_at
        self.observation_space = gym.spaces.Discrete(length + 1)
        self.action_space = gym.spaces.Discrete(1)

    def reset(self, *, seed=None, options=None):
        super().reset(seed=seed)
        self.pos = 0
        return 0, {}

    def step(self, action):
        if self.fail_at is not None and self.pos + 1 == self.fail_at:
            raise RuntimeError("simulator crashed")
        self.pos += 1
        return self.pos, 1.0, self.pos == self.length, False, {}


class Recorder:
    """A minimal protocol agent that records what it is told."""

    def __init__(self) -> None:
        self.seen: list[tuple] = []
        self.ended = 0

    def act(self, obs, *, mask=None, explore=True):
        return 0

    def observe(self, obs, action, reward, next_obs, terminated, truncated, *, next_mask=None):
        self.seen.append((obs, action, reward, next_obs, terminated, truncated))

    def update(self):
        return ()

    def end_episode(self):
        self.ended += 1
        return ()


MULTI_STEP = [
    lambda: tdkit.NStepSarsa(7, 1, n=3, gamma=1.0, step_size=1.0, seed=0),
    lambda: tdkit.TreeBackup(7, 1, n=3, gamma=1.0, step_size=1.0, seed=0),
]
TRACES = [
    lambda: tdkit.SarsaLambda(7, 1, lam=1.0, gamma=1.0, step_size=0.5, seed=0),
    lambda: tdkit.WatkinsQLambda(7, 1, lam=1.0, gamma=1.0, step_size=0.5, seed=0),
]


def test_both_flags_reach_the_agent_when_an_episode_terminates_at_its_time_limit():
    agent = Recorder()
    tdkit.train(agent, Chain(3), episodes=1, max_episode_steps=3)
    assert agent.seen[-1][4:] == (True, True)
    assert [t[4:] for t in agent.seen[:-1]] == [(False, False), (False, False)]
    assert agent.ended == 0  # the episode ended by its flags: nothing to settle


def test_time_limit_before_the_end_truncates_without_terminating():
    agent = Recorder()
    hist = tdkit.train(agent, Chain(5), episodes=1, max_episode_steps=2)
    assert agent.seen[-1][4:] == (False, True)
    assert hist.to_records()[0]["end"] == "truncated"


@pytest.mark.parametrize("make", MULTI_STEP)
def test_a_step_budget_settles_the_cut_episode_with_a_bootstrap(make):
    # Two steps of the chain, then the budget runs out. Settled as a truncation
    # at S_2 with Q = 0 and n = 3, gamma = alpha = 1: G_0 = 1 + 1 + Q(2) = 2 and
    # G_1 = 1 + Q(2) = 1 (Eq. 7.2). The old loop left both in the buffer.
    agent = make()
    hist = tdkit.train(agent, Chain(), steps=2, seed=0)
    assert hist.to_records()[0]["end"] == "unfinished"
    assert agent.table[:3, 0].tolist() == [2.0, 1.0, 0.0]
    assert agent.end_episode() == ()  # nothing of the episode is left open


@pytest.mark.parametrize("make", MULTI_STEP + TRACES)
def test_a_cut_run_continued_equals_one_ended_by_hand(make):
    env = Chain()
    cut = make()
    tdkit.train(cut, env, steps=4, seed=1)
    tdkit.train(cut, env, episodes=3, seed=2)

    by_hand = make()
    root = root_sequence(1)
    obs, _ = env.reset(seed=episode_seed(root, 0))
    for _ in range(4):
        action = by_hand.act(obs)
        next_obs, reward, terminated, truncated, _ = env.step(action)
        by_hand.observe(obs, action, reward, next_obs, terminated, truncated)
        by_hand.update()
        obs = next_obs
    by_hand.end_episode()
    tdkit.train(by_hand, env, episodes=3, seed=2)
    np.testing.assert_array_equal(cut.table, by_hand.table)


@pytest.mark.parametrize("make", MULTI_STEP + TRACES)
def test_an_exception_from_the_environment_leaves_a_time_limit_truncation(make):
    crashed = make()
    with pytest.raises(RuntimeError, match="simulator crashed") as info:
        tdkit.train(crashed, Chain(fail_at=3), episodes=2, seed=0)
    assert len(info.value.history) == 0  # the History so far travels with the exception

    truncated = make()  # the same two transitions, the second cut by a time limit
    truncated.observe(0, 0, 1.0, 1, False, False)
    truncated.update()
    truncated.observe(1, 0, 1.0, 2, False, True)
    truncated.update()
    np.testing.assert_array_equal(crashed.table, truncated.table)


def test_the_leak_of_a_cut_episode_into_the_next_call_is_gone():
    # A 3-step chain: after a cut, the next train call must start a clean
    # episode. Reference: the same learner whose first call ended by hand.
    def make():
        return tdkit.NStepSarsa(4, 1, n=4, gamma=1.0, step_size=0.5, seed=0)

    leaky_order = make()
    tdkit.train(leaky_order, Chain(3), steps=32 + 1, seed=0)  # ends mid-episode
    tdkit.train(leaky_order, Chain(3), episodes=1, seed=5)
    clean = make()
    tdkit.train(clean, Chain(3), steps=33, seed=0)
    clean.end_episode()
    tdkit.train(clean, Chain(3), episodes=1, seed=5)
    np.testing.assert_array_equal(leaky_order.table, clean.table)


def test_end_episode_is_a_no_op_for_one_step_learners_after_a_flagged_end():
    agent = tdkit.QLearning(3, 2, seed=0)
    agent.observe(0, 1, 1.0, 1, True, False)
    agent.update()
    before = agent.table.copy()
    assert agent.end_episode() == ()
    np.testing.assert_array_equal(agent.table, before)
    assert agent.episodes_ == 1


def test_end_episode_applies_a_pending_transition_as_truncated():
    agent = tdkit.QLearning(3, 1, gamma=0.5, step_size=1.0, initial_value=2.0, seed=0)
    agent.observe(0, 0, 1.0, 1, False, False)   # not yet updated
    assert agent.end_episode() == (1.0 + 0.5 * 2.0 - 2.0,)  # bootstraps from Q(1) = 2
    assert agent.episodes_ == 1


def test_evaluate_refuses_a_nan_reward_as_train_does():
    class NanReward(Chain):
        def step(self, action):
            obs, _, terminated, truncated, info = super().step(action)
            return obs, float("nan"), terminated, truncated, info

    agent = tdkit.QLearning(7, 1, seed=0)
    for run in (tdkit.train, tdkit.evaluate):
        with pytest.raises((TypeError, ValueError), match="reward"):
            run(agent, NanReward(), episodes=1)


def test_an_endless_episode_warns_once_and_names_the_fix(monkeypatch):
    class Long(Chain):
        """Ends only after 120 steps, far past the (patched) warning threshold of 50."""

        def step(self, action):
            self.pos += 1
            return 0, 0.0, self.pos == 120, False, {}

    monkeypatch.setattr(loop, "_ENDLESS_STEPS", 50)
    agent = tdkit.QLearning(7, 1, seed=0)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        tdkit.train(agent, Long(), episodes=3)
    endless = [w for w in caught if issubclass(w.category, EndlessEpisodeWarning)]
    assert len(endless) == 1  # once per run, not once per episode
    assert "episode 0 has run for 50 steps" in str(endless[0].message)
    assert "max_episode_steps=" in str(endless[0].message)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        tdkit.train(agent, Long(), steps=500)  # a step budget never warns
        tdkit.train(agent, Long(), episodes=1, max_episode_steps=100)  # nor a time limit
    assert not [w for w in caught if issubclass(w.category, EndlessEpisodeWarning)]


def test_sizes_are_checked_before_the_first_step():
    with pytest.raises(ValueError, match=r"6 actions .* Discrete\(4\)"):
        tdkit.train(tdkit.QLearning(16, 6), gym.make("FrozenLake-v1"), episodes=1)
    big = tdkit.QLearning.for_env(gym.make("CliffWalking-v1"))
    with pytest.raises(ValueError, match=r"48 states .* Discrete\(16\)"):
        tdkit.train(big, gym.make("FrozenLake-v1"), episodes=1)
    with pytest.raises(ValueError, match=r"4 states .* Discrete\(16\)"):
        tdkit.evaluate(tdkit.QLearning(4, 4), gym.make("FrozenLake-v1"), episodes=1)


def test_seeds_are_checked_and_a_generator_is_accepted():
    agent = tdkit.QLearning(7, 1, seed=0)
    with pytest.raises(ValueError, match="non-negative"):
        tdkit.train(agent, Chain(), episodes=1, seed=-1)
    a = tdkit.train(tdkit.QLearning(7, 1, seed=0), Chain(), episodes=2,
                    seed=np.random.default_rng(3))
    b = tdkit.train(tdkit.QLearning(7, 1, seed=0), Chain(), episodes=2,
                    seed=np.random.default_rng(3))
    np.testing.assert_array_equal(a.returns, b.returns)


def test_a_checkpoint_in_a_missing_folder_fails_before_training(tmp_path):
    agent = tdkit.QLearning(7, 1, seed=0)
    with pytest.raises(ValueError, match="does not exist"):
        tdkit.train(agent, Chain(), episodes=5, checkpoint=tmp_path / "nope" / "run.npz")
    assert agent.steps_ == 0


def test_run_episode_greedy_mode_never_learns():
    agent = tdkit.QLearning(7, 1, seed=0)
    result = run_episode(agent, adapt(Chain()), env_seed=0, learn=False)
    assert (result.total_reward, result.length, result.end) == (6.0, 6, "terminated")
    assert agent.steps_ == 0


def test_only_the_driver_steps_environments():
    """One episode driver: no other module of tdkit calls an environment's step."""
    import pathlib
    import re

    root = pathlib.Path(tdkit.__file__).parent
    offenders = []
    for path in root.rglob("*.py"):
        rel = path.relative_to(root).as_posix()
        if rel.startswith("envs/") or rel in ("runs/episode.py", "batch.py", "verify/_probes.py"):
            continue  # adapters, models and probe wrappers implement step; batch uses arrays
        if re.search(r"\benv\.step\(|\bstep_env\(", path.read_text()):
            offenders.append(rel)
    assert offenders == []


def test_the_history_records_each_episodes_measured_wall_clock_time():
    hist = tdkit.train(tdkit.QLearning(7, 1, seed=0), Chain(), episodes=3, seed=0)
    assert hist.seconds.shape == (3,)
    assert np.all(hist.seconds > 0) and np.all(np.isfinite(hist.seconds))
    assert [r["seconds"] for r in hist.to_records()] == hist.seconds.tolist()


def test_update_results_are_validated_and_the_old_name_warns():
    from tdkit.runs import AgentFault, check_update_result, require_update_result

    assert require_update_result([1, np.float32(0.5)]) == (1.0, 0.5)
    with pytest.raises(AgentFault, match="non-float"):
        require_update_result((0.1, "x"))
    with pytest.warns(FutureWarning, match=r"0\.3\.0.*require_update_result"):
        assert check_update_result(np.array([2.0])) == (2.0,)


# ------------------------------------------------------------------ masks read once per run
_mask_values = st.lists(st.integers(0, 1), min_size=1, max_size=6)
_mask_dtypes = st.sampled_from(["int8", "uint8", "int16", "int64", "bool", "float64"])


@given(st.lists(st.tuples(_mask_values, _mask_dtypes, st.booleans()), max_size=30),
       st.integers(1, 4))
def test_the_mask_reader_gives_what_info_mask_gives(masks, limit):
    # Same values and dtype as info_mask for every mask of a run (repeats, other dtypes with
    # the same bytes, non-arrays, a cache emptied when full); kept masks are read-only.
    read = MaskReader(limit=limit)
    for values, dtype, as_list in masks:
        mask = values if as_list else np.array(values, dtype=dtype)
        info = {"action_mask": mask}
        got, want = read(info), info_mask(info)
        assert type(got) is type(want)
        np.testing.assert_array_equal(got, want)
        assert got.dtype == want.dtype
        if not as_list and dtype.startswith(("int", "uint")):
            # kept for later steps: nobody may change what they will receive
            assert not got.flags.writeable
    assert read({}) is None and read(None) is None and read({"other": 1}) is None


def test_the_mask_reader_converts_each_distinct_mask_once():
    read = MaskReader()
    first = read({"action_mask": np.array([1, 0, 1], dtype=np.int8)})
    assert read({"action_mask": np.array([1, 0, 1], dtype=np.int8)}) is first
    # the same bytes under another dtype are another mask
    other = read({"action_mask": np.array([1, 0, 1], dtype=np.uint8)})
    assert other is not first and other.tolist() == first.tolist()
    boolean = np.array([True, False, True])
    assert read({"action_mask": boolean}) is boolean  # passed on as the environment gave it


def test_train_with_taxi_masks_equals_train_reading_each_mask_anew(monkeypatch):
    # The reader changes how often a mask is converted, not what the agent sees.
    def run():
        env = gym.make("Taxi-v4" if "Taxi-v4" in gym.registry else "Taxi-v3")
        agent = tdkit.QLearning.for_env(env, seed=3)
        tdkit.train(agent, env, steps=3_000, seed=3)
        return agent.table.copy()

    cached = run()
    monkeypatch.setattr(episode_module.MaskReader, "__call__",
                        lambda self, info: info_mask(info))
    np.testing.assert_array_equal(cached, run())

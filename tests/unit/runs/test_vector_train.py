"""``train`` on a gymnasium vector environment equals K scalar runs, bit for bit.

The reference is gymnasium's own toy-text environments (FrozenLake-v1, a
stochastic slippery lake, and Taxi-v3 with its action masks), run one agent per
sub-environment through ``gymnasium.vector.SyncVectorEnv`` / ``AsyncVectorEnv``
in both autoreset modes, against the same agents trained one by one.
"""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest
from gymnasium.vector import AsyncVectorEnv, AutoresetMode, SyncVectorEnv

import tdkit
from tdkit.runs import agent_roots

K = 3


def _taxi_id() -> str:
    return "Taxi-v4" if "Taxi-v4" in gym.registry else "Taxi-v3"


def _make(env_id: str, limit: int | None):
    return lambda: gym.make(env_id, max_episode_steps=limit) if limit else gym.make(env_id)


def _agents(make_agent, env):
    return [make_agent(env, k) for k in range(K)]


def _scalar_runs(make_agent, env_id, limit, *, seed, episodes=None, steps=None,
                 max_episode_steps=None):
    env = _make(env_id, limit)()
    agents = _agents(make_agent, env)
    roots = agent_roots(seed, K)
    hists = [
        tdkit.train(a, env, episodes=episodes, steps=steps, seed=r,
                    max_episode_steps=max_episode_steps)
        for a, r in zip(agents, roots, strict=True)
    ]
    return agents, hists


def _vector_run(make_agent, env_id, limit, vector_cls, mode, *, seed, episodes=None,
                steps=None, max_episode_steps=None):
    venv = vector_cls([_make(env_id, limit)] * K, autoreset_mode=mode)
    try:
        agents = _agents(make_agent, _make(env_id, limit)())
        hists = tdkit.train(agents, venv, episodes=episodes, steps=steps, seed=seed,
                            max_episode_steps=max_episode_steps)
    finally:
        venv.close()
    return agents, hists


def _q(env, seed):
    return tdkit.QLearning.for_env(env, step_size=0.5, exploration=0.2, seed=seed)


def _sarsa_lambda(env, seed):
    return tdkit.SarsaLambda.for_env(env, step_size=0.3, lam=0.8, seed=seed)


def _assert_same(scalar, vector):
    (sa, sh), (va, vh) = scalar, vector
    for a, b in zip(sa, va, strict=True):
        np.testing.assert_array_equal(a.table, b.table)
    for a, b in zip(sh, vh, strict=True):
        np.testing.assert_array_equal(a.returns, b.returns)
        np.testing.assert_array_equal(a.lengths, b.lengths)
        assert [r["end"] for r in a.to_records()] == [r["end"] for r in b.to_records()]


@pytest.mark.parametrize("mode", [AutoresetMode.NEXT_STEP, AutoresetMode.SAME_STEP])
@pytest.mark.parametrize("make_agent", [_q, _sarsa_lambda])
def test_sync_vector_equals_scalar_runs_on_a_time_limited_lake(mode, make_agent):
    # FrozenLake with a 6-step limit ends many episodes by truncation, so the
    # final observation of a truncated episode decides the bootstrap.
    args = dict(seed=11, episodes=40)
    scalar = _scalar_runs(make_agent, "FrozenLake-v1", 6, **args)
    vector = _vector_run(make_agent, "FrozenLake-v1", 6, SyncVectorEnv, mode, **args)
    _assert_same(scalar, vector)
    truncations = sum(r["end"] == "truncated" for h in vector[1] for r in h.to_records())
    assert truncations > 0


@pytest.mark.parametrize("mode", [AutoresetMode.NEXT_STEP, AutoresetMode.SAME_STEP])
def test_masks_time_limits_and_step_budgets_match_on_taxi(mode):
    # Taxi's -1 per step makes every value nonzero, so bootstrapping from the
    # wrong state (the reset one instead of the final one) changes the table.
    # The environment's own limit (40) truncates, and tdkit's (60) never binds.
    args = dict(seed=[5, 6, 7], steps=700, max_episode_steps=60)
    scalar = _scalar_runs(_q, _taxi_id(), 40, **args)
    vector = _vector_run(_q, _taxi_id(), 40, SyncVectorEnv, mode, **args)
    _assert_same(scalar, vector)
    assert any(r["end"] == "truncated" for h in vector[1] for r in h.to_records())
    assert vector[1][0].to_records()[-1]["end"] == "unfinished"  # the step budget cut it


def test_async_vector_equals_scalar_runs():
    args = dict(seed=3, episodes=25)
    scalar = _scalar_runs(_q, "FrozenLake-v1", 8, **args)
    vector = _vector_run(_q, "FrozenLake-v1", 8, AsyncVectorEnv, AutoresetMode.NEXT_STEP, **args)
    _assert_same(scalar, vector)


def test_vector_training_refuses_what_it_cannot_honour():
    venv = SyncVectorEnv([_make("FrozenLake-v1", None)] * 2)
    agents = _agents(_q, gym.make("FrozenLake-v1"))[:2]
    with pytest.raises(ValueError, match="checkpoint"):
        tdkit.train(agents, venv, episodes=1, checkpoint="x.npz")
    with pytest.raises(ValueError, match="2 sub-environments but 3 agents"):
        tdkit.train(_agents(_q, gym.make("FrozenLake-v1")), venv, episodes=1)
    venv.close()


def test_a_nan_reward_in_a_sub_environment_is_refused_as_in_scalar_training():
    class NanLake(gym.Wrapper):
        def step(self, action):
            obs, _, terminated, truncated, info = self.env.step(action)
            return obs, float("nan"), terminated, truncated, info

    venv = SyncVectorEnv([lambda: NanLake(gym.make("FrozenLake-v1"))] * 2)
    agents = _agents(_q, gym.make("FrozenLake-v1"))[:2]
    with pytest.raises(tdkit.EnvironmentProtocolError, match="reward nan at step 1"):
        tdkit.train(agents, venv, episodes=1)
    venv.close()

"""The protocol boundary is strict: ``observe`` refuses what would otherwise be silently misread."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

import tdkit


@pytest.fixture
def agent():
    return tdkit.QLearning(4, 2, seed=0)


@pytest.mark.parametrize("reward", ["1", None, True, np.bool_(False), [1.0]])
def test_a_reward_that_is_not_a_real_number_is_refused(agent, reward):
    with pytest.raises(ValueError, match="reward must be a real number"):
        agent.observe(0, 0, reward, 1, False, False)
    assert agent.steps_ == 0 and agent.update() == ()  # nothing was recorded


@pytest.mark.parametrize("flag", ["no", "", 0, 1, None, 0.0])
def test_a_flag_that_is_not_a_bool_is_refused(agent, flag):
    # "no" is truthy: read as a bool it would silently end the episode.
    with pytest.raises(ValueError, match="terminated must be True or False"):
        agent.observe(0, 0, 1.0, 1, flag, False)
    with pytest.raises(ValueError, match="truncated must be True or False"):
        agent.observe(0, 0, 1.0, 1, False, flag)
    assert agent.steps_ == 0


def test_numpy_numbers_and_bools_are_accepted(agent):
    agent.observe(np.int64(0), np.int64(1), np.float32(2.0), np.int64(1), np.bool_(True),
                  np.bool_(False))
    assert agent.update() == (2.0,)


@pytest.mark.parametrize("state", [True, np.bool_(False)])
def test_a_bool_is_not_a_state(agent, state):
    with pytest.raises(ValueError, match="bool"):
        agent.observe(state, 0, 1.0, 1, False, False)
    with pytest.raises(ValueError, match="bool"):
        agent.act(state)


def test_observations_piling_up_without_update_warn_once(agent, monkeypatch):
    monkeypatch.setattr(type(agent), "_pile_up_limit", 50)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        for _ in range(200):
            agent.observe(0, 0, 1.0, 1, False, False)
    piled = [w for w in caught if "without an update()" in str(w.message)]
    assert len(piled) == 1 and "50 transitions" in str(piled[0].message)
    assert len(agent.update()) == 200  # nothing was lost


def test_train_never_piles_up(monkeypatch):
    import gymnasium as gym

    monkeypatch.setattr(tdkit.QLearning, "_pile_up_limit", 2)
    learner = tdkit.QLearning.for_env(gym.make("FrozenLake-v1"), seed=0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        tdkit.train(learner, gym.make("FrozenLake-v1"), episodes=20, seed=0)

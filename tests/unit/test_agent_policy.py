"""``tdkit.agent_policy`` and action masks from gymnasium's Taxi to the exact solvers."""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest

import tdkit
from tdkit._errors import EnvironmentProtocolError, InvalidParameterError
from tdkit.envs.finite import FiniteMDP
from tdkit.envs.problems import gridworld_4x4


def _taxi():
    """gymnasium's Taxi (Dietterich 2000, "Hierarchical reinforcement learning
    with the MAXQ value function decomposition", JAIR 13), newest version."""
    for env_id in ("Taxi-v4", "Taxi-v3"):
        try:
            return gym.make(env_id)
        except gym.error.Error:
            continue
    pytest.skip("gymnasium has no Taxi environment")


class _Recorder:
    """A duck-typed agent that records what it was asked and picks the last allowed action."""

    def __init__(self):
        self.calls = []

    def act(self, obs, *, mask=None, explore=True):
        self.calls.append((obs, None if mask is None else mask.tolist(), explore))
        return 0 if mask is None else int(np.flatnonzero(mask)[-1])


def test_taxi_masks_match_gymnasium_action_mask_and_info():
    env = _taxi()
    mdp = FiniteMDP.from_gymnasium(env, gamma=0.99)
    base = env.unwrapped
    assert mdp.n_states == 501 and mdp.terminal[500] and mdp.masks[500].all()
    for s in range(500):
        np.testing.assert_array_equal(mdp.masks[s], base.action_mask(s).astype(bool))
    obs, info = env.reset(seed=3)
    np.testing.assert_array_equal(mdp.masks[obs], info["action_mask"].astype(bool))
    # The model's own env reports the same row.
    model_env = mdp.to_env()
    obs, info = model_env.reset(seed=3)
    np.testing.assert_array_equal(info["action_mask"], mdp.masks[obs])
    obs, _, _, _, info = model_env.step(int(np.flatnonzero(info["action_mask"])[0]))
    np.testing.assert_array_equal(info["action_mask"], mdp.masks[obs])


def test_agent_policy_asks_every_live_state_with_its_mask_and_never_the_sink():
    mdp = FiniteMDP.from_gymnasium(_taxi(), gamma=0.99)
    agent = _Recorder()
    policy = tdkit.agent_policy(agent, mdp)
    asked = [obs for obs, _, _ in agent.calls]
    assert asked == list(range(500))  # not the sink, state 500
    assert all(explore is False for _, _, explore in agent.calls)
    assert all(mask == mdp.masks[obs].tolist() for obs, mask, _ in agent.calls)
    assert policy.dtype.kind == "i" and policy.shape == (501,)
    assert mdp.masks[np.arange(501), policy].all()
    tdkit.evaluate_policy(mdp, policy)  # accepted: no masked action


def test_agent_policy_without_masks_and_terminal_states():
    mdp = gridworld_4x4()  # terminal corners 0 and 15 (Sutton & Barto 2018, Example 4.1)
    agent = _Recorder()
    policy = tdkit.agent_policy(agent, mdp)
    assert [obs for obs, _, _ in agent.calls] == list(range(1, 15))
    assert all(mask is None for _, mask, _ in agent.calls)
    assert policy[0] == policy[15] == 0


def test_agent_policy_rejects_bad_agents_and_models():
    mdp = FiniteMDP.from_gymnasium(_taxi(), gamma=0.99)

    class Masked:
        def act(self, obs, *, mask=None, explore=True):
            return int(np.flatnonzero(~mask)[0]) if (~mask).any() else 0

    class OutOfRange:
        def act(self, obs, *, mask=None, explore=True):
            return 6

    with pytest.raises(EnvironmentProtocolError, match="mask forbids"):
        tdkit.agent_policy(Masked(), mdp)
    with pytest.raises(EnvironmentProtocolError, match=r"returned 6; expected an action index"):
        tdkit.agent_policy(OutOfRange(), mdp)
    with pytest.raises(EnvironmentProtocolError, match="must have a method act"):
        tdkit.agent_policy(object(), mdp)
    with pytest.raises(InvalidParameterError, match=r"must be a tdkit\.FiniteMDP"):
        tdkit.agent_policy(_Recorder(), "Taxi")


def test_masks_are_validated():
    P = np.zeros((2, 2, 2))
    P[:, :, 1] = 1.0
    R = np.zeros((2, 2))
    with pytest.raises(InvalidParameterError, match=r"masks\[0, :\] allows no action"):
        FiniteMDP(P, R, gamma=0.9, masks=[[False, False], [True, True]])
    with pytest.raises(InvalidParameterError, match=r"shape \(S, A\) = \(2, 2\)"):
        FiniteMDP(P, R, gamma=0.9, masks=[True, True])
    with pytest.raises(InvalidParameterError, match="booleans"):
        FiniteMDP(P, R, gamma=0.9, masks=[[2, 1], [1, 1]])
    # Terminal rows are all allowed; the caller's array is copied.
    given = np.array([[True, False], [False, True]])
    mdp = FiniteMDP(P, R, gamma=0.9, terminal=[False, True], masks=given)
    given[0, 0] = False
    assert mdp.masks.tolist() == [[True, False], [True, True]]
    for other in (mdp.to_sparse(), mdp.to_sparse().to_dense(), mdp.with_gamma(0.5)):
        assert other.masks.tolist() == mdp.masks.tolist()


def test_to_env_max_steps_is_deprecated_with_the_removal_version():
    mdp = gridworld_4x4()
    with pytest.warns(FutureWarning, match=r"max_steps.*0\.3\.0.*max_episode_steps"):
        env = mdp.to_env(max_steps=3)
    assert env.unwrapped.max_episode_steps == 3
    assert mdp.to_env(3).unwrapped.max_episode_steps == 3  # positional still works
    with pytest.raises(InvalidParameterError, match="both"):
        mdp.to_env(max_episode_steps=3, max_steps=3)


def test_q_learning_on_taxi_reaches_the_exact_optimum_through_agent_policy():
    """Q-learning (Watkins & Dayan 1992) on gymnasium's Taxi with its action masks.

    Taxi is deterministic, so with step size 1 every update sets Q(s, a) to
    r + gamma max_a' Q(s', a') exactly: Q-learning is then asynchronous value
    iteration on the pairs it visits, and with uniformly random behaviour
    (exploration 1.0; Q-learning is off-policy) it visits every allowed pair
    reachable from the start states. Once the values along the optimal paths
    have converged, the greedy policy is exactly optimal from every start
    state, so we assert the start-distribution value equals the optimum up to
    rounding (1e-9), not within a tuned margin. Budget: 150,000 steps. On
    seeds 0-7 (checked while writing this test) the gap was below 3e-15 after
    100,000 steps on every seed; four of them still had a gap (up to 2.4)
    after 50,000, so 150,000 leaves 1.5x over the slowest seed seen.
    """
    env = _taxi()
    mdp = FiniteMDP.from_gymnasium(env, gamma=0.99)
    optimum = tdkit.value_iteration(mdp, tol=1e-10)
    agent = tdkit.QLearning.for_env(env, gamma=0.99, step_size=1.0, exploration=1.0, seed=0)
    tdkit.train(agent, env, steps=150_000, seed=0)
    policy = tdkit.agent_policy(agent, mdp)
    learned = tdkit.evaluate_policy(mdp, policy)
    assert mdp.initial @ learned == pytest.approx(mdp.initial @ optimum.v, abs=1e-9)
    # The old pattern, asking without masks, can pick a masked action: refused
    # rather than scored (issue: it scored -256.8 against an optimum of 6.33).
    unmasked = np.zeros(mdp.n_states, dtype=int)
    unmasked[:500] = [agent.act(s, explore=False) for s in range(500)]
    if not mdp.masks[np.arange(501), unmasked].all():
        with pytest.raises(InvalidParameterError, match="masks that action"):
            tdkit.evaluate_policy(mdp, unmasked)

"""Q-learning against the exact optimum computed by dynamic programming.

(a) On small Garnet MDPs (Archibald, McKinnon & Thomas 1995), Q-learning with
visit-count step sizes and uniform exploration ends within a derived bound of
Q* in sup norm, for several seeds.
(b) On gymnasium's own FrozenLake-v1 (slippery 4x4), the greedy policy of the
learned table has an exact value (``evaluate_policy`` on the imported model)
within a stated margin of v* from the start state.

Q-learning: Watkins, C. J. C. H. & Dayan, P. (1992). Q-learning. Machine
Learning 8, 279-292 (convergence with sum alpha = inf, sum alpha^2 < inf and
every pair visited infinitely often).
"""

from __future__ import annotations

import math

import gymnasium as gym
import numpy as np
import pytest

from tdkit.dp import evaluate_policy, greedy_policy, value_iteration
from tdkit.envs.finite import FiniteMDP
from tdkit.envs.problems import garnet
from tdkit.learners.one_step import QLearning
from tdkit.loop import train
from tdkit.schedules import VisitCount


class _PairCounter(gym.Wrapper):
    """Counts the updates Q-learning makes: one per (state, action) step taken."""

    def __init__(self, env: gym.Env, shape: tuple[int, int]) -> None:
        super().__init__(env)
        self.counts = np.zeros(shape, dtype=np.int64)
        self._obs = 0

    def reset(self, **kwargs):
        self._obs, info = self.env.reset(**kwargs)
        return self._obs, info

    def step(self, action):
        self.counts[self._obs, action] += 1
        self._obs, *rest = self.env.step(action)
        return (self._obs, *rest)


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_q_learning_converges_to_q_star_on_garnet(seed):
    r"""Sup-norm error of Q-learning (alpha = 1 / n(s, a)) after 150,000 steps.

    Setting: Garnet with 6 states, 2 actions, 3 successors, gamma = 0.25,
    rewards in [0, 1); behaviour uniformly random (epsilon = 1, so visits do
    not depend on what is learned); episodes cut every 30 steps (truncation
    bootstraps, so the continuing task is learned); Q starts at 0.

    Bound (derived; the amplification step is a heuristic): with
    alpha = 1/n, Q_n(s, a) is the average of its n targets
    r + gamma V_t(s'). Writing each target as Q*(s, a) + noise + lag:
    * noise = gamma (V*(s') - E V*(s')), a martingale difference with values
      in an interval of length L = gamma (max V* - min V*); by Azuma-Hoeffding
      its average is below eps = L sqrt(ln(2 m / delta) / (2 n)) for all
      m = 12 pairs at once with probability >= 1 - delta, delta = 1e-3;
    * lag = gamma (V_t(s') - V*(s')), at most gamma times the past sup
      errors. If the error decays like c / sqrt(t), the average of past
      errors is about twice the current one, so error <= eps + 2 gamma error,
      i.e. error <= eps / (1 - 2 gamma) = 2 eps at gamma = 1/4 (a heuristic
      reading of Szepesvari 1997, "The asymptotic convergence-rate of
      Q-learning", NIPS 10, where 1/n steps converge like n^-(1-gamma)).
    n is the smallest observed visit count of a pair.
    """
    gamma = 0.25
    mdp = garnet(6, 2, 3, gamma=gamma, seed=seed)
    q_star = value_iteration(mdp, tol=1e-12).q
    env = _PairCounter(mdp.to_env(), (6, 2))
    agent = QLearning(
        6, 2, gamma=gamma, step_size=VisitCount(power=1.0), exploration=1.0,
        initial_value=0.0, seed=seed,
    )
    train(agent, env, steps=150_000, seed=seed, max_episode_steps=30)

    v_star = q_star.max(axis=1)
    spread = gamma * (v_star.max() - v_star.min())
    n_min = int(env.counts.min())
    eps = spread * math.sqrt(math.log(2 * 12 / 1e-3) / (2 * n_min))
    bound = eps / (1 - 2 * gamma)
    error = float(np.max(np.abs(agent.table - q_star)))
    assert n_min > 1000  # every pair is visited often (uniform behaviour)
    assert error < bound, (error, bound, n_min)


@pytest.mark.parametrize("seed", [0])
def test_q_learning_on_gymnasium_frozen_lake_reaches_near_optimal_policy(seed):
    """Train on gymnasium's FrozenLake-v1 (slippery 4x4), judge by exact DP.

    v* comes from value iteration on ``FiniteMDP.from_gymnasium`` of the same
    env (gamma = 0.99); the greedy policy of the learned table is evaluated
    exactly with ``evaluate_policy``. Stated margin (common practice, not a
    theorem: a near-optimal policy loses at most 10% of the optimal success
    value): v_greedy(start) >= 0.9 v*(start). With v*(start) = 0.542 a policy
    that walks into holes, or the random policy (v = 0.0045), fails it.

    Training: 300,000 steps with uniformly random behaviour (epsilon = 1;
    Q-learning is off-policy) and alpha = 1 / n(s, a)^0.6 (VisitCount,
    Even-Dar & Mansour 2003: polynomial step sizes with exponent in (1/2, 1)
    converge faster than 1/n when gamma is close to 1).
    """
    env = gym.make("FrozenLake-v1", map_name="4x4", is_slippery=True)
    mdp = FiniteMDP.from_gymnasium(env, gamma=0.99)
    v_star = value_iteration(mdp, tol=1e-10).v
    agent = QLearning(
        16, 4, gamma=0.99, step_size=VisitCount(power=0.6), exploration=1.0,
        initial_value=0.0, seed=seed,
    )
    train(agent, env, steps=300_000, seed=seed)
    policy = greedy_policy(agent.table).policy
    v_greedy = evaluate_policy(mdp, policy)
    assert v_star[0] == pytest.approx(0.542, abs=1e-3)  # exact DP, see test_finite_mdp
    assert v_greedy[0] >= 0.9 * v_star[0], (v_greedy[0], v_star[0])

"""On-policy fixed points: Expected SARSA with constant exploration converges to the
epsilon-greedy fixed point (tdkit.value_iteration(..., exploration=eps)), not to Q*.

Sources: van Seijen, van Hasselt, Whiteson & Wiering (2009), "A theoretical and
empirical analysis of Expected Sarsa", ADPRL (Expected SARSA's fixed point under a
fixed exploring policy); Archibald, McKinnon & Thomas (1995) for the Garnet model;
Polyak & Juditsky (1992) for averaging the iterates of a constant step size.
"""

from __future__ import annotations

import numpy as np

import tdkit
from tdkit.dp import value_iteration
from tdkit.envs.problems import garnet
from tdkit.stats import student_t_isf

EPSILON = 0.4
READS = 30


def test_expected_sarsa_with_constant_epsilon_converges_to_the_epsilon_greedy_fixed_point():
    mdp = garnet(6, 2, 3, gamma=0.8, seed=1)
    env = mdp.to_env()
    agent = tdkit.ExpectedSarsa.for_env(env, step_size=0.1, exploration=EPSILON, seed=1)
    # Burn-in: 100 episodes x 50 steps = 5000 updates, about 400 per pair; the error of a
    # constant step size 0.1 shrinks like 0.9^k per pair (and gamma = 0.8 per bootstrap).
    tdkit.train(agent, env, episodes=100, seed=0, max_episode_steps=50)
    reads = []
    for k in range(READS):
        # 10 episodes (500 updates, ~40 per pair, i.e. 4 times the 1/alpha = 10 updates over
        # which a constant step size forgets) between reads: the reads are close to
        # independent draws of the stationary fluctuation, so their mean's standard error
        # is std / sqrt(READS).
        tdkit.train(agent, env, episodes=10, seed=np.random.SeedSequence(1, spawn_key=(k,)),
                    max_episode_steps=50)
        reads.append(agent.table.copy())
    reads = np.array(reads)
    mean = reads.mean(axis=0)
    se = reads.std(axis=0, ddof=1) / np.sqrt(READS)
    # Margin: Student-t quantile for a two-sided error of 1e-4 over the 12 entries
    # (Bonferroni), times each entry's standard error. Time-limit truncations bootstrap,
    # so max_episode_steps does not move the fixed point.
    t = student_t_isf(1e-4 / mean.size / 2, READS - 1)  # two-sided 1e-4 / m
    margin = t * se
    q_eps = value_iteration(mdp, exploration=EPSILON, tol=1e-12).q
    q_star = value_iteration(mdp, tol=1e-12).q
    assert np.all(np.abs(mean - q_eps) <= margin), (mean, q_eps, margin)
    # ... and not to Q*: every entry of Q* differs from the fixed point by more than the
    # margin (the smallest gap on this model is 0.23, computed by value iteration).
    assert np.all(np.abs(q_star - q_eps) > 2 * margin)
    assert np.all(np.abs(mean - q_star) > margin)

"""Throughput of :func:`tdkit.batch.train_batch` against K independent scalar learners.

For K = 1, 16 and 256 Q-learners on one Garnet model (Archibald, McKinnon &
Thomas 1995; 100 states, 4 actions, 3 successors, gamma 0.9, episodes cut
every 100 steps; alpha 0.1, epsilon 0.1), the same total number of learner
steps is run twice, side by side in each round:

* **batch**: one ``train_batch(mdp, "q_learning", n_learners=K, ...)`` call;
* **scalar**: K separate :class:`tdkit.QLearning` learners, each trained by
  :func:`tdkit.train` on its own ``mdp.to_env()``.

The table shows learner-steps per second (median over rounds; the two
columns alternate in each round so machine noise hits both alike) and the
speed-up batch / scalar. Both paths are pure numpy/Python: the batch has no
compiled kernel, and one batch step costs a few dozen numpy calls whatever K
is, so it pays off from a handful of learners on and loses for K = 1.

Run: ``python benchmarks/bench_batch.py [--total 65536] [--rounds 3]``
(the defaults take about half a minute).
"""

from __future__ import annotations

import argparse
import statistics
import time

import tdkit
from tdkit.batch import train_batch
from tdkit.envs.problems import garnet

SIZES = (1, 16, 256)
HORIZON = 100


def batch_rate(mdp: tdkit.FiniteMDP, k: int, steps: int, seed: int) -> float:
    """Learner-steps per second of one train_batch call."""
    start = time.perf_counter()
    train_batch(mdp, "q_learning", n_learners=k, steps=steps, step_size=0.1, exploration=0.1,
                seed=seed, max_episode_steps=HORIZON)
    return k * steps / (time.perf_counter() - start)


def scalar_rate(mdp: tdkit.FiniteMDP, k: int, steps: int, seed: int) -> float:
    """Learner-steps per second of k scalar QLearning learners trained one after another."""
    start = time.perf_counter()
    for i in range(k):
        agent = tdkit.QLearning(mdp.n_states, mdp.n_actions, gamma=mdp.gamma, step_size=0.1,
                                exploration=0.1, seed=seed * 1000 + i)
        tdkit.train(agent, mdp.to_env(), steps=steps, seed=seed * 1000 + i,
                    max_episode_steps=HORIZON)
    return k * steps / (time.perf_counter() - start)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--total", type=int, default=65_536,
                        help="learner-steps per configuration (split over the K learners)")
    parser.add_argument("--rounds", type=int, default=3)
    args = parser.parse_args()
    mdp = garnet(100, 4, 3, gamma=0.9, seed=0)
    print(f"model: {mdp}; Q-learning, alpha 0.1, epsilon 0.1, episodes of <= {HORIZON} steps")
    print(f"{args.total} learner-steps per configuration, median of {args.rounds} rounds\n")
    header = (f"{'K':>5} {'steps each':>11} {'batch steps/s':>15} {'scalar steps/s':>15} "
              f"{'batch/scalar':>13}")
    print(header)
    print("-" * len(header))
    for k in SIZES:
        steps = max(1, args.total // k)
        batch, scalar = [], []
        for r in range(args.rounds):
            if r % 2 == 0:
                batch.append(batch_rate(mdp, k, steps, r))
                scalar.append(scalar_rate(mdp, k, steps, r))
            else:
                scalar.append(scalar_rate(mdp, k, steps, r))
                batch.append(batch_rate(mdp, k, steps, r))
        b, s = statistics.median(batch), statistics.median(scalar)
        print(f"{k:>5} {steps:>11} {b:>15,.0f} {s:>15,.0f} {b / s:>12.2f}x")


if __name__ == "__main__":
    main()

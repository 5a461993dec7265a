"""Throughput of :func:`tdkit.batch.train_batch`, compiled and numpy, against K scalar learners.

For K = 1, 16 and 256 Q-learners (alpha 0.1, epsilon 0.1, episodes cut every
100 steps) on two models,

* a Garnet (Archibald, McKinnon & Thomas 1995; 100 states, 4 actions,
  3 successors, gamma 0.9), and
* the model of gymnasium's Taxi (``FiniteMDP.from_gymnasium``; 500 states
  plus the sink state, 6 actions, deterministic, with Taxi's action masks,
  which the batch and the scalar learners both respect),

three paths run side by side in each round (their order rotates so machine
noise hits all alike):

* **compiled**: ``train_batch(..., backend="compiled")`` (numba);
* **numpy**: ``train_batch(..., backend="numpy")``;
* **scalar**: K separate :class:`tdkit.QLearning` learners, each trained by
  :func:`tdkit.train` on its own ``mdp.to_env()``.

Each path runs its own number of learner-steps (the compiled path many more,
so its timer sees more than call overhead); the table shows learner-steps per
wall-clock second (median over rounds), the compiled rate per CPU-second of
this process in its best round (the "per core" rate: on a shared machine wall
time also counts other processes, and interference only adds CPU time, so the
best round is the least disturbed one), and the speed-ups compiled / numpy
and compiled / scalar (wall-clock medians of the same rounds).
Compilation happens once before the timed rounds and is reported apart.

Run: ``python benchmarks/bench_batch.py [--rounds 5] [--smoke]`` (a few
minutes; ``--smoke`` takes seconds and checks only that everything runs).
"""

from __future__ import annotations

import argparse
import statistics
import time
from collections.abc import Callable

import gymnasium as gym

import tdkit
from tdkit.batch import train_batch

HORIZON = 100


def taxi_model() -> tdkit.FiniteMDP:
    """The model of gymnasium's Taxi (whichever of v4 / v3 this gymnasium has)."""
    for version in ("Taxi-v4", "Taxi-v3"):
        try:
            env = gym.make(version)
        except gym.error.Error:
            continue
        return tdkit.FiniteMDP.from_gymnasium(env, gamma=0.99)
    raise RuntimeError("gymnasium has no Taxi environment")


def timed(run: Callable[[], object], learner_steps: int) -> tuple[float, float]:
    """(learner-steps per wall second, per CPU second of this process)."""
    wall, cpu = time.perf_counter(), time.process_time()
    run()
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    return learner_steps / wall, learner_steps / max(cpu, 1e-9)


def batch_run(mdp: tdkit.FiniteMDP, k: int, steps: int, seed: int, backend: str):
    return lambda: train_batch(mdp, "q_learning", n_learners=k, steps=steps, step_size=0.1,
                               exploration=0.1, seed=seed, max_episode_steps=HORIZON,
                               backend=backend)


def scalar_run(mdp: tdkit.FiniteMDP, k: int, steps: int, seed: int):
    def run() -> None:
        for i in range(k):
            agent = tdkit.QLearning(mdp.n_states, mdp.n_actions, gamma=mdp.gamma,
                                    step_size=0.1, exploration=0.1, seed=seed * 1000 + i)
            tdkit.train(agent, mdp.to_env(), steps=steps, seed=seed * 1000 + i,
                        max_episode_steps=HORIZON)
    return run


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--compiled-steps", type=int, default=1 << 23,
                        help="learner-steps per compiled run")
    parser.add_argument("--numpy-steps", type=int, default=1 << 14,
                        help="learner-steps per numpy run")
    parser.add_argument("--scalar-steps", type=int, default=1 << 14,
                        help="learner-steps per scalar run (split over the K learners)")
    parser.add_argument("--smoke", action="store_true", help="tiny sizes, one round")
    args = parser.parse_args()
    sizes = (1, 16, 256)
    if args.smoke:
        args.rounds, sizes = 1, (1, 4)
        args.compiled_steps, args.numpy_steps, args.scalar_steps = 2048, 512, 256

    models = {
        "garnet": tdkit.envs.problems.garnet(100, 4, 3, gamma=0.9, seed=0),
        "taxi": taxi_model(),
    }
    start = time.perf_counter()
    batch_run(models["garnet"], 1, 10, 0, "compiled")()
    print(f"compile (or load from numba's cache): {time.perf_counter() - start:.1f} s")
    print(f"Q-learning, alpha 0.1, epsilon 0.1, episodes of <= {HORIZON} steps; "
          f"{args.rounds} rounds; learner-steps per second (wall: median; CPU: best round)\n")
    header = (f"{'model':>7} {'K':>4} {'compiled':>12} {'per CPU-s':>11} {'numpy':>11} "
              f"{'scalar':>10} {'comp/numpy':>11} {'comp/scalar':>12}")
    print(header)
    print("-" * len(header))
    for name, mdp in models.items():
        for k in sizes:
            runs = {
                "compiled": (batch_run(mdp, k, max(1, args.compiled_steps // k), 0, "compiled"),
                             k * max(1, args.compiled_steps // k)),
                "numpy": (batch_run(mdp, k, max(1, args.numpy_steps // k), 0, "numpy"),
                          k * max(1, args.numpy_steps // k)),
                "scalar": (scalar_run(mdp, k, max(1, args.scalar_steps // k), 0),
                           k * max(1, args.scalar_steps // k)),
            }
            rates: dict[str, list[tuple[float, float]]] = {key: [] for key in runs}
            order = list(runs)
            for r in range(args.rounds):
                for key in order[r % 3:] + order[:r % 3]:
                    rates[key].append(timed(*runs[key]))
            wall = {key: statistics.median(x[0] for x in v) for key, v in rates.items()}
            per_cpu = max(x[1] for x in rates["compiled"])
            print(f"{name:>7} {k:>4} {wall['compiled'] / 1e6:>10.2f} M {per_cpu / 1e6:>9.2f} M "
                  f"{wall['numpy'] / 1e6:>9.3f} M {wall['scalar'] / 1e6:>8.3f} M "
                  f"{wall['compiled'] / wall['numpy']:>10.0f}x "
                  f"{wall['compiled'] / wall['scalar']:>11.0f}x")


if __name__ == "__main__":
    main()

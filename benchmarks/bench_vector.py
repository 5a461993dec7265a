"""Speed-up of ``AsyncVectorEnv`` over ``SyncVectorEnv`` for a slow simulator.

``tdkit.train(agents, vector_env)`` trains one Q-learning agent per
sub-environment. When the simulator's ``step`` is expensive (here a CPU-bound
stand-in that spends ``--work`` microseconds per step), the async vector env
steps sub-environments in parallel processes. Sync and async runs alternate in
rounds so machine noise hits both alike; prints the median time of each and the
ratio sync / async (ideal: min(K, cores)). Both give the same tables (checked).

Run: ``python benchmarks/bench_vector.py [--envs 2] [--steps 2000] [--work 300] [--rounds 3]``
``--smoke`` runs a tiny configuration.
"""

from __future__ import annotations

import argparse
import statistics
import time

import gymnasium as gym
import numpy as np
from gymnasium.vector import AsyncVectorEnv, SyncVectorEnv

import tdkit


class SlowCorridor(gym.Env):
    """A 10-cell corridor whose step burns ``work_us`` microseconds of CPU."""

    def __init__(self, work_us: float = 300.0) -> None:
        self.work_us = work_us
        self.observation_space = gym.spaces.Discrete(10)
        self.action_space = gym.spaces.Discrete(2)

    def reset(self, *, seed=None, options=None):
        super().reset(seed=seed)
        self.pos = 0
        return 0, {}

    def step(self, action):
        end = time.perf_counter() + self.work_us * 1e-6
        while time.perf_counter() < end:  # a CPU-bound simulator, not a sleep
            pass
        slip = self.np_random.random() < 0.1
        self.pos = max(0, min(9, self.pos + (1 if (action == 1) != slip else -1)))
        return self.pos, -1.0, self.pos == 9, False, {}


def run(vector_cls, n_envs: int, steps: int, work: float, seed: int) -> tuple[float, list]:
    venv = vector_cls([lambda: SlowCorridor(work)] * n_envs)
    agents = [tdkit.QLearning(10, 2, step_size=0.2, seed=k) for k in range(n_envs)]
    start = time.perf_counter()
    tdkit.train(agents, venv, steps=steps, seed=seed)
    elapsed = time.perf_counter() - start
    venv.close()
    return elapsed, [a.table.copy() for a in agents]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--envs", type=int, default=2)
    parser.add_argument("--steps", type=int, default=2000, help="steps per agent")
    parser.add_argument("--work", type=float, default=300.0, help="µs of CPU per env step")
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--smoke", action="store_true", help="tiny sizes, for CI")
    args = parser.parse_args()
    if args.smoke:
        args.steps, args.rounds, args.work = 50, 1, 20.0
    sync_times, async_times = [], []
    for r in range(args.rounds):
        t_sync, q_sync = run(SyncVectorEnv, args.envs, args.steps, args.work, r)
        t_async, q_async = run(AsyncVectorEnv, args.envs, args.steps, args.work, r)
        for a, b in zip(q_sync, q_async, strict=True):
            np.testing.assert_array_equal(a, b)
        sync_times.append(t_sync)
        async_times.append(t_async)
    s, a = statistics.median(sync_times), statistics.median(async_times)
    print(f"K={args.envs} agents x {args.steps} steps, simulator {args.work:g} µs/step, "
          f"{args.rounds} round(s)")
    print(f"{'vector env':<16}{'median s':>10}{'µs/agent-step':>16}")
    for name, t in (("SyncVectorEnv", s), ("AsyncVectorEnv", a)):
        print(f"{name:<16}{t:>10.3f}{t / (args.envs * args.steps) * 1e6:>16.1f}")
    print(f"speed-up async / sync: {s / a:.2f}x (same tables: yes)")


if __name__ == "__main__":
    main()

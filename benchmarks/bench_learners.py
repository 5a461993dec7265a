"""Cost and sample efficiency of every tdkit learner.

1. Per-step cost on gymnasium's Taxi (``Taxi-v4``, or ``Taxi-v3`` where v4
   is not registered) through :func:`tdkit.train`, relative to
   :class:`~tdkit.QLearning` timed in the same round. Learners are timed in a
   shuffled order each round and the table shows the median over rounds, so
   machine noise hits all of them alike.
2. Environment steps each control learner needs on the Dyna maze (Sutton &
   Barto 2018, Example 8.1) until its greedy policy is worth at least 99% of
   :math:`v^*` from the start state, evaluated exactly with
   :func:`tdkit.dp.evaluate_policy` every ``--check-every`` steps (greedy ties
   are split evenly). Median over seeds; runs that do not get there within
   ``--max-steps`` count as that cap (and are reported).

Settings: gamma 0.99 on Taxi and 0.95 on the maze, alpha 0.1, epsilon 0.1,
n = 4, lambda = 0.9, 5 planning steps. On Taxi Q = 0 initially; on the maze
Q = 1 initially, an optimistic start (the largest possible return; Sutton &
Barto 2018, Section 2.6) so that every learner explores the whole maze: with
Q = 0 most runs of most learners never found the 14-step path within 20,000
steps at epsilon 0.1, which measures luck in exploration rather than the
update rules.

Run: ``python benchmarks/bench_learners.py [--steps 10000] [--rounds 5] [--seeds 5]``
(the defaults take about two minutes); ``--smoke`` runs tiny sizes (for CI).
"""

from __future__ import annotations

import argparse
import statistics
import time
from collections.abc import Callable
from typing import Any

import gymnasium as gym
import numpy as np

import tdkit
from tdkit.dp import evaluate_policy, value_iteration
from tdkit.envs.problems import dyna_maze
from tdkit.learners import (
    TD0,
    DoubleQLearning,
    DynaQ,
    DynaQPlus,
    ExpectedSarsa,
    NStepSarsa,
    PrioritizedSweeping,
    QLearning,
    Sarsa,
    SarsaLambda,
    TDLambda,
    TreeBackup,
    WatkinsQLambda,
)

#: make(n_states, n_actions, gamma, seed, initial_value) -> agent
Maker = Callable[[int, int, float, int, float], Any]


def _control(cls: type, **extra: Any) -> Maker:
    def make(n_states: int, n_actions: int, gamma: float, seed: int, initial: float) -> Any:
        return cls(n_states, n_actions, gamma=gamma, step_size=0.1, exploration=0.1, seed=seed,
                   initial_value=initial, **extra)

    return make


def _prediction(cls: type, **extra: Any) -> Maker:
    def make(n_states: int, n_actions: int, gamma: float, seed: int, initial: float) -> Any:
        policy = np.full((n_states, n_actions), 1.0 / n_actions)
        return cls(n_states, n_actions, policy=policy, gamma=gamma, step_size=0.1, seed=seed,
                   initial_value=initial, **extra)

    return make


CONTROL: dict[str, Maker] = {
    "QLearning": _control(QLearning),
    "Sarsa": _control(Sarsa),
    "ExpectedSarsa": _control(ExpectedSarsa),
    "DoubleQLearning": _control(DoubleQLearning),
    "NStepSarsa(n=4)": _control(NStepSarsa, n=4),
    "NStepSarsa(n=4, off-policy)": _control(NStepSarsa, n=4, off_policy=True),
    "TreeBackup(n=4)": _control(TreeBackup, n=4),
    "SarsaLambda(0.9, accumulating)": _control(SarsaLambda, lam=0.9),
    "SarsaLambda(0.9, dutch)": _control(SarsaLambda, lam=0.9, trace="dutch"),
    "WatkinsQLambda(0.9)": _control(WatkinsQLambda, lam=0.9),
    "DynaQ(5)": _control(DynaQ, planning_steps=5),
    "DynaQPlus(5)": _control(DynaQPlus, planning_steps=5, kappa=1e-3),
    "PrioritizedSweeping(5)": _control(PrioritizedSweeping, planning_steps=5),
}
PREDICTION: dict[str, Maker] = {
    "TD0 (uniform policy)": _prediction(TD0),
    "TDLambda(0.9) (uniform policy)": _prediction(TDLambda, lam=0.9),
}


def taxi() -> gym.Env:
    return gym.make("Taxi-v4" if "Taxi-v4" in gym.registry else "Taxi-v3")


def seconds_per_step(make: Maker, steps: int, seed: int) -> float:
    env = taxi()
    agent = make(500, 6, 0.99, seed, 0.0)
    start = time.perf_counter()
    history = tdkit.train(agent, env, steps=steps, seed=seed)
    return (time.perf_counter() - start) / history.total_steps


def cost_table(steps: int, rounds: int) -> dict[str, list[float]]:
    """Per-step seconds of every learner, ``rounds`` times, shuffled order each round."""
    makers = {**CONTROL, **PREDICTION}
    names = list(makers)
    times: dict[str, list[float]] = {name: [] for name in names}
    order_rng = np.random.default_rng(0)
    for k in range(rounds):
        for i in order_rng.permutation(len(names)):
            name = names[i]
            times[name].append(seconds_per_step(makers[name], steps, k))
    return times


def _greedy_probabilities(table: np.ndarray) -> np.ndarray:
    best = table == table.max(axis=1, keepdims=True)
    return best / best.sum(axis=1, keepdims=True)


def steps_to_near_optimal(
    make: Maker, seed: int, max_steps: int, check_every: int, fraction: float = 0.99
) -> int:
    """Environment steps until the greedy policy is worth >= fraction * v*(start)."""
    mdp = dyna_maze()
    start = int(np.flatnonzero(mdp.initial)[0])
    target = fraction * value_iteration(mdp).v[start]
    env = mdp.to_env()
    agent = make(mdp.n_states, mdp.n_actions, mdp.gamma, seed, 1.0)
    steps = episode = 0
    while steps < max_steps:
        obs, _ = env.reset(seed=10_000 * seed + episode)
        episode += 1
        while True:
            action = agent.act(obs)
            nxt, reward, terminated, truncated, _ = env.step(action)
            agent.observe(obs, action, reward, nxt, terminated, truncated)
            agent.update()
            steps += 1
            if steps % check_every == 0:
                value = evaluate_policy(mdp, _greedy_probabilities(agent.table))[start]
                if value >= target:
                    return steps
            obs = nxt
            if terminated or truncated or steps >= max_steps:
                break
    return max_steps


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=10_000, help="Taxi steps per timing")
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--seeds", type=int, default=5)
    parser.add_argument("--max-steps", type=int, default=20_000)
    parser.add_argument("--check-every", type=int, default=10)
    parser.add_argument("--smoke", action="store_true", help="tiny sizes, for CI")
    args = parser.parse_args()
    if args.smoke:
        args.steps, args.rounds, args.seeds, args.max_steps = 200, 1, 1, 500

    times = cost_table(args.steps, args.rounds)
    base = statistics.median(times["QLearning"])
    print(f"Per-step cost on {taxi().spec.id} ({args.steps} steps x {args.rounds} rounds), "
          "tdkit.train:")
    print(f"  {'learner':<34} {'us/step':>8} {'x QLearning':>12}")
    for name, values in times.items():
        median = statistics.median(values)
        print(f"  {name:<34} {median * 1e6:8.1f} {median / base:12.2f}")

    print(f"\nEnv steps until the greedy policy is within 1% of v* on the Dyna maze "
          f"(median over {args.seeds} seeds; cap {args.max_steps}):")
    print(f"  {'learner':<34} {'median':>8}  per seed")
    for name, make in CONTROL.items():
        runs = [steps_to_near_optimal(make, seed, args.max_steps, args.check_every)
                for seed in range(args.seeds)]
        shown = ", ".join(str(r) if r < args.max_steps else "cap" for r in runs)
        print(f"  {name:<34} {statistics.median(runs):8.0f}  {shown}")


if __name__ == "__main__":
    main()

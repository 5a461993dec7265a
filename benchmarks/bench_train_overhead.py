"""Per-step cost of ``tdkit.train`` with Q-learning against a hand-written loop.

Both run the same algorithm (ε-greedy Q-learning with random tie-breaking,
α = 0.1, γ = 0.99, ε = 0.1) on the same gymnasium Taxi environment, in
alternating rounds of one run, so machine noise hits both alike. A third
column times the environment alone (random actions, no learning): the floor
any loop pays. Prints the per-step times and the ratios, and what Taxi's
``info["action_mask"]`` costs per step in ``train`` (the same run with and
without ``use_action_masks``).

Run: ``python benchmarks/bench_train_overhead.py [--steps 200000] [--rounds 5]``;
``--smoke`` runs a tiny size (for CI).
"""

from __future__ import annotations

import argparse
import statistics
import time

import gymnasium as gym
import numpy as np

import tdkit


def taxi() -> gym.Env:
    return gym.make("Taxi-v4" if "Taxi-v4" in gym.registry else "Taxi-v3")


def hand_written(steps: int, seed: int) -> float:
    """The textbook loop, written directly against numpy and gymnasium."""
    env = taxi()
    rng = np.random.default_rng(seed)
    q = np.zeros((500, 6))
    alpha, gamma, eps = 0.1, 0.99, 0.1
    start = time.perf_counter()
    done_steps = 0
    episode = 0
    while done_steps < steps:
        s, _ = env.reset(seed=seed + episode)
        episode += 1
        while True:
            if rng.random() < eps:
                a = int(rng.integers(6))
            else:
                row = q[s]
                ties = np.flatnonzero(row == row.max())
                a = int(ties[rng.integers(len(ties))]) if len(ties) > 1 else int(ties[0])
            s2, r, terminated, truncated, _ = env.step(a)
            target = r if terminated else r + gamma * q[s2].max()
            q[s, a] += alpha * (target - q[s, a])
            s = s2
            done_steps += 1
            if terminated or truncated or done_steps >= steps:
                break
    return (time.perf_counter() - start) / done_steps


def with_tdkit(steps: int, seed: int, use_action_masks: bool = False) -> float:
    """tdkit's loop; Taxi's info["action_mask"] is ignored unless asked for."""
    env = taxi()
    agent = tdkit.QLearning(500, 6, gamma=0.99, step_size=0.1, exploration=0.1, seed=seed)
    start = time.perf_counter()
    history = tdkit.train(agent, env, steps=steps, seed=seed, use_action_masks=use_action_masks)
    return (time.perf_counter() - start) / history.total_steps


def env_only(steps: int, seed: int) -> float:
    env = taxi()
    rng = np.random.default_rng(seed)
    start = time.perf_counter()
    env.reset(seed=seed)
    for _ in range(steps):
        _, _, terminated, truncated, _ = env.step(int(rng.integers(6)))
        if terminated or truncated:
            env.reset()
    return (time.perf_counter() - start) / steps


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=200_000)
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--smoke", action="store_true", help="tiny sizes, for CI")
    args = parser.parse_args()
    if args.smoke:
        args.steps, args.rounds = 1_000, 1
    rows: dict[str, list[float]] = {
        "hand-written loop": [],
        "tdkit.train": [],
        "tdkit.train, masks": [],
        "environment alone": [],
    }
    ratios, mask_ratios, mask_costs = [], [], []
    for k in range(args.rounds):
        hw = hand_written(args.steps, k)
        td = with_tdkit(args.steps, k)
        td_masked = with_tdkit(args.steps, k, use_action_masks=True)
        rows["hand-written loop"].append(hw)
        rows["tdkit.train"].append(td)
        rows["tdkit.train, masks"].append(td_masked)
        rows["environment alone"].append(env_only(args.steps, k))
        ratios.append(td / hw)
        mask_ratios.append(td_masked / hw)
        mask_costs.append(td_masked - td)
    print(f"Q-learning on Taxi, {args.steps} steps per run, {args.rounds} alternating rounds")
    for name, values in rows.items():
        print(f"  {name:<20} median {statistics.median(values) * 1e6:7.2f} us/step")
    print(f"  ratio tdkit.train / hand-written: median {statistics.median(ratios):.2f} "
          f"(min {min(ratios):.2f}, max {max(ratios):.2f})")
    print(f"  ratio with Taxi's info masks applied: median {statistics.median(mask_ratios):.2f} "
          "(masking does extra work per step the hand-written loop skips)")
    print(f"  masks, per step: median {statistics.median(mask_costs) * 1e6:.2f} us "
          f"(tdkit.train with Taxi's masks minus without, same round; target <= 1 us; the "
          "masked agent takes other actions, so its episodes differ too)")


if __name__ == "__main__":
    main()

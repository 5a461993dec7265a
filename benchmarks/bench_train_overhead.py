"""Per-step cost of ``tdkit.train`` with Q-learning against a hand-written loop.

Both run the same algorithm (ε-greedy Q-learning with random tie-breaking,
α = 0.1, γ = 0.99, ε = 0.1) on the same gymnasium Taxi environment, in
alternating rounds of one run, so machine noise hits both alike. A third
column times the environment alone (random actions, no learning): the floor
any loop pays. Prints the per-step CPU times and the ratios, and what Taxi's
``info["action_mask"]`` costs per step in ``train`` (the same run with and
without ``use_action_masks``).

That last difference also holds a different run: a masked agent takes other
actions and finishes more, shorter episodes, and the environment's own time
(20-30 µs a step on a busy machine, ±30% from one run to the next) buries a
cost of about 1 µs. So the script also measures the masks' cost on one
recorded run: ``--replay-steps`` steps of Taxi under random actions, each
with the int8 ``info["action_mask"]`` Taxi made for it, replayed through
``train`` with and without ``use_action_masks`` in ``--replay-rounds``
alternating pairs (the order flips every round). Replaying costs next to
nothing, so the difference is the masks' work alone: reading them from
``info``, looking up their allowed sets in ``act`` and ``observe``, and the
masked max of the target. It is also printed in units of one step of the
environment alone, which makes machines of different speed comparable: the
target of 1 µs was set where a Taxi step took 8.2 µs, 0.12 of a step.
Times are CPU times (``time.process_time``).

Run: ``python benchmarks/bench_train_overhead.py [--steps 200000] [--rounds 5]
[--replay-steps 20000] [--replay-rounds 40]``;
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
    start = time.process_time()
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
    return (time.process_time() - start) / done_steps


def with_tdkit(steps: int, seed: int, use_action_masks: bool = False) -> float:
    """tdkit's loop; Taxi's info["action_mask"] is ignored unless asked for."""
    env = taxi()
    agent = tdkit.QLearning(500, 6, gamma=0.99, step_size=0.1, exploration=0.1, seed=seed)
    start = time.process_time()
    history = tdkit.train(agent, env, steps=steps, seed=seed, use_action_masks=use_action_masks)
    return (time.process_time() - start) / history.total_steps


class Replay(gym.Env):
    """Taxi's recorded steps, handed out again in order (the agent's actions are ignored).

    Every step gives a new ``info`` dict holding its own int8 ``action_mask``
    array, made when the run was recorded, as Taxi makes one every step.
    Replaying costs next to nothing, so what ``train`` itself does per step
    stands out of the environment's noise.
    """

    def __init__(self, starts: list, steps: list) -> None:
        self.observation_space = gym.spaces.Discrete(500)
        self.action_space = gym.spaces.Discrete(6)
        self._starts, self._steps = starts, steps
        self._episode = self._step = 0

    def reset(self, *, seed=None, options=None):
        start = self._starts[self._episode % len(self._starts)]
        self._episode += 1
        return start

    def step(self, action):
        step = self._steps[self._step]
        self._step += 1
        return step


def record_taxi(steps: int, seed: int) -> tuple[list, list]:
    """``steps`` steps of Taxi under uniformly random actions, cut into episodes."""
    env = taxi()
    rng = np.random.default_rng(seed)
    starts, recorded = [env.reset(seed=seed)], []
    while len(recorded) < steps:
        obs, reward, terminated, truncated, info = env.step(int(rng.integers(6)))
        recorded.append((obs, reward, terminated, truncated, info))
        if terminated or truncated:
            starts.append(env.reset())
    return starts, recorded


def replayed(record: tuple[list, list], use_action_masks: bool) -> float:
    """CPU time per step of ``train`` on a replayed Taxi run."""
    env = Replay(*record)
    agent = tdkit.QLearning(500, 6, gamma=0.99, step_size=0.1, exploration=0.1, seed=0)
    start = time.process_time()
    history = tdkit.train(agent, env, steps=len(record[1]), seed=0,
                          use_action_masks=use_action_masks)
    return (time.process_time() - start) / history.total_steps


def env_only(steps: int, seed: int) -> float:
    env = taxi()
    rng = np.random.default_rng(seed)
    start = time.process_time()
    env.reset(seed=seed)
    for _ in range(steps):
        _, _, terminated, truncated, _ = env.step(int(rng.integers(6)))
        if terminated or truncated:
            env.reset()
    return (time.process_time() - start) / steps


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=200_000)
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--replay-steps", type=int, default=20_000)
    parser.add_argument("--replay-rounds", type=int, default=40)
    parser.add_argument("--smoke", action="store_true", help="tiny sizes, for CI")
    args = parser.parse_args()
    if args.smoke:
        args.steps, args.rounds, args.replay_steps, args.replay_rounds = 1_000, 1, 1_000, 2
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
    record = record_taxi(args.replay_steps, 0)
    plain_times, replay_costs = [], []
    for k in range(args.replay_rounds):
        order = (False, True) if k % 2 == 0 else (True, False)
        times = {masks: replayed(record, masks) for masks in order}
        plain_times.append(times[False])
        replay_costs.append(times[True] - times[False])
    cost = statistics.median(replay_costs)
    low, _, high = statistics.quantiles(replay_costs, n=4)
    env_step = statistics.median(rows["environment alone"])
    print(f"Replayed Taxi run, {args.replay_steps} steps, {args.replay_rounds} alternating pairs")
    print(f"  tdkit.train without the environment: median "
          f"{statistics.median(plain_times) * 1e6:.2f} us/step")
    print(f"  masks, per step: median {cost * 1e6:.2f} us (quartiles {low * 1e6:.2f} to "
          f"{high * 1e6:.2f}; with use_action_masks minus without, same pair)")
    print(f"  in environment steps: {cost / env_step:.3f} of one (target <= {1 / 8.2:.3f}: "
          f"1 us where a step took 8.2 us); {cost / env_step * 8.2:.2f} us at that speed")


if __name__ == "__main__":
    main()

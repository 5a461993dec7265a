"""Access-control queuing task: exact gains against those differential Q-learning reaches.

Sutton & Barto (2018), Example 10.2 (parameters recalled from memory). Prints
the exact optimal gain (relative value iteration), the gain of accepting
everyone, and over many seeds the learned average reward and the exact gain of
the learned greedy policy, with the setting tests/reference/test_access_control.py uses.
The spread printed here is what the test's margins are derived from.

    python benchmarks/access_control_gains.py               # 100 seeds
    python benchmarks/access_control_gains.py --seeds 300
    python benchmarks/access_control_gains.py --smoke       # 3 seeds
"""

from __future__ import annotations

import argparse
import time

import numpy as np

import tdkit
from tdkit.envs.access_control import ACCEPT, access_control, access_control_env
from tdkit.schedules import VisitCount

STEPS = 40_000
SETTING = {"step_size": VisitCount(0.6), "reward_step_size": 0.1, "exploration": 0.1}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=100)
    parser.add_argument("--first-seed", type=int, default=0)
    parser.add_argument("--steps", type=int, default=STEPS)
    parser.add_argument("--smoke", action="store_true", help="3 seeds")
    args = parser.parse_args()
    seeds = 3 if args.smoke else args.seeds
    mdp = access_control()
    best = tdkit.relative_value_iteration(mdp)
    everyone = tdkit.policy_gain(mdp, np.full(mdp.n_states, ACCEPT))
    print(f"exact optimal gain {best.gain:.4f}; accepting everyone {everyone:.4f}")
    start = time.perf_counter()
    rbar, greedy = [], []
    for seed in range(args.first_seed, args.first_seed + seeds):
        env = access_control_env()
        agent = tdkit.DifferentialQLearning.for_env(env, seed=seed, **SETTING)
        tdkit.train(agent, env, steps=args.steps, seed=seed)
        rbar.append(agent.average_reward)
        table = agent.table  # greedy as act(explore=False) plays it: ties uniform
        ties = table == table.max(axis=1, keepdims=True)
        greedy.append(tdkit.policy_gain(mdp, ties / ties.sum(axis=1, keepdims=True)))
    rbar_err = np.array(rbar) - best.gain
    rel_gap = (best.gain - np.array(greedy)) / (best.gain - everyone)
    print(f"DifferentialQLearning, {args.steps} steps, {SETTING}, seeds {args.first_seed}.."
          f"{args.first_seed + seeds - 1} "
          f"({time.perf_counter() - start:.0f} s):")
    print(f"  learned average_reward - exact: mean {rbar_err.mean():+.4f} sd "
          f"{rbar_err.std(ddof=1) if seeds > 1 else 0.0:.4f} max |.| {np.abs(rbar_err).max():.4f}")
    print(f"  greedy policy gain: mean {np.mean(greedy):.4f} min {np.min(greedy):.4f}")
    print(f"  its gap as a fraction of (optimal - accept everyone): mean {rel_gap.mean():.4f} "
          f"max {rel_gap.max():.4f}; above 0.25 (the test's margin): {int((rel_gap > 0.25).sum())}")


if __name__ == "__main__":
    main()

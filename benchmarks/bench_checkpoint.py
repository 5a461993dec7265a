"""Cost of checkpoints as a run grows: ``train`` with and without ``checkpoint=``.

Issue 10 measured 120k one-step episodes at 1.9 s plain and 13.5 s with
checkpoints, the overhead ratio climbing from 2.7x at 30k episodes to 7x at
120k, because every checkpoint rewrote and re-hashed the whole History. With
the append-only History the ratio should stay flat as the run grows. Plain
and checkpointed runs alternate, side by side in one process, and the script
prints the times and the ratio for each run length.

Run: ``python benchmarks/bench_checkpoint.py [--episodes 30000 120000] [--every 100]``
``--smoke`` runs tiny sizes once (a check that the script works, not a measurement).
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import tdkit


class OneStep:
    """Every episode is one step with reward 1."""

    def reset(self, seed=None):
        return 0, {}

    def step(self, action):
        return 0, 1.0, True, False, {}


def timed(episodes: int, checkpoint: Path | None, every: int) -> float:
    agent = tdkit.QLearning(1, 2, seed=0)
    start = time.perf_counter()
    tdkit.train(agent, OneStep(), episodes=episodes, seed=0, checkpoint=checkpoint,
                checkpoint_every=every)
    return time.perf_counter() - start


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--episodes", type=int, nargs="+", default=[30_000, 120_000])
    parser.add_argument("--every", type=int, default=100)
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--smoke", action="store_true")
    args = parser.parse_args()
    if args.smoke:
        args.episodes, args.rounds = [500, 1000], 1
    folder = Path(tempfile.mkdtemp())
    print(f"{'episodes':>9} {'plain s':>9} {'checkpointed s':>15} {'ratio':>7}")
    for episodes in args.episodes:
        plain, saved = [], []
        for r in range(args.rounds):
            plain.append(timed(episodes, None, args.every))
            saved.append(timed(episodes, folder / f"run{episodes}-{r}.npz", args.every))
        p, s = min(plain), min(saved)
        print(f"{episodes:>9} {p:>9.3f} {s:>15.3f} {s / p:>7.2f}")


if __name__ == "__main__":
    main()

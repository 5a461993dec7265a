"""Where tdkit's per-step time goes: hand-written agents that add tdkit's features one at a time.

``bench_step.py`` compares ``tdkit.QLearning`` with a hand-written pure-Python
agent and with the same agent doing tdkit's checks by hand. This script
walks from the checked agent towards tdkit, one feature at a time, on the
same replayed Taxi transitions (see ``bench_step.py``), so the difference
between two neighbouring lines is the cost of one feature:

1. ``pure Python``: the unchecked agent of ``bench_step.py``;
2. ``+ checks``: refuses bad rewards, flags and indices, counts visits and
   writes each value through to a numpy table (``CheckedPythonQ``);
3. ``+ queue, numpy counts``: ``observe`` appends the transition to a list
   and counts steps, ``update`` pops it (tdkit queues transitions so that
   multi-step learners and batched updates share one ``update``), and visit
   counts are kept in a numpy array through a memory view, as tdkit keeps
   them (schedules and UCB read them as an array);
4. ``+ tdkit's tie rule``: ties go through ``tdkit._greedy.greedy_index``;
5. ``tdkit``: :class:`tdkit.QLearning` itself, whose ``update`` passes through
   the learner's ``_learn`` and the shared TD step, and whose verbs take
   masks, encoders, other exploration rules and schedules.

All of them draw the same random numbers and end with the same table
(checked). CPU time, best and median of shuffled rounds, as in
``bench_step.py``.

Run: ``python benchmarks/bench_step_parts.py [--rounds 15]``; ``--smoke``
runs a tiny size (for CI).
"""

from __future__ import annotations

import statistics
from collections.abc import Callable
from typing import Any

import numpy as np

from bench_step import (
    ALPHA,
    EPSILON,
    GAMMA,
    CheckedPythonQ,
    PurePythonQ,
    replay,
    replay_arguments,
    tdkit_agent,
)
from tdkit._greedy import greedy_index


class QueuedQ(CheckedPythonQ):
    """``CheckedPythonQ`` with tdkit's bookkeeping: a pending list, a step counter, numpy counts.

    Transitions go through a list (``observe`` appends, ``update`` pops) and
    visit counts live in a numpy array read and written through a memory
    view, as tdkit keeps them. Each agent here is written out flat (no calls
    to the parent's verbs), so that no call layer is counted as the cost of
    a feature.
    """

    def __init__(self, n_states: int, n_actions: int, draw: Callable[[], float]) -> None:
        super().__init__(n_states, n_actions, draw)
        self.queue: list[tuple[Any, ...]] = []
        self.steps = 0
        self.counts = np.zeros((n_states, n_actions), dtype=np.int64)
        self.counts_flat = memoryview(self.counts).cast("B").cast("q")

    def observe(self, s: int, a: int, r: float, s2: int, terminated: bool, truncated: bool) -> None:
        if type(r) is not float or r - r != 0.0:
            raise ValueError(f"reward must be a finite float; got {r!r}")
        if terminated is not True and terminated is not False:
            raise ValueError(f"terminated must be a bool; got {terminated!r}")
        if truncated is not True and truncated is not False:
            raise ValueError(f"truncated must be a bool; got {truncated!r}")
        n = self.n_states
        if not (type(s) is int and 0 <= s < n and type(s2) is int and 0 <= s2 < n):
            raise ValueError(f"states must be integers in [0, {n}); got {s!r}, {s2!r}")
        if not (type(a) is int and 0 <= a < self.n_actions):
            raise ValueError(f"action must be an integer in [0, {self.n_actions}); got {a!r}")
        self.queue.append((s, a, r, s2, terminated, truncated, None))
        self.steps += 1

    def update(self) -> None:
        queue = self.queue
        if len(queue) == 1:
            s, a, r, s2, terminated, _truncated, _mask = queue.pop()
            target = r if terminated else r + GAMMA * max(self.q[s2])
            row = self.q[s]
            new = row[a] + ALPHA * (target - row[a])
            if new - new != 0.0:
                raise ValueError("the update overflows")
            row[a] = new
            k = s * self.n_actions + a
            self.flat[k] = new
            self.counts_flat[k] = self.counts_flat[k] + 1


class TieRuleQ(QueuedQ):
    """``QueuedQ`` breaking greedy ties with tdkit's ``greedy_index``."""

    def act(self, s: int) -> int:
        if self.draw() < EPSILON:
            return int(self.draw() * self.n_actions)
        row = self.q[s]
        top = max(row)
        if row.count(top) == 1:
            return row.index(top)
        return greedy_index(row, None, self.draw)


def main(argv: list[str] | None = None) -> None:
    args, data = replay_arguments(__doc__.splitlines()[0], argv, rounds=15)
    makers: dict[str, Callable[[int], Any]] = {
        "pure Python": lambda k: PurePythonQ(500, 6, np.random.default_rng(k).random),
        "+ checks": lambda k: CheckedPythonQ(500, 6, np.random.default_rng(k).random),
        "+ queue, numpy counts": lambda k: QueuedQ(500, 6, np.random.default_rng(k).random),
        "+ tdkit's tie rule": lambda k: TieRuleQ(500, 6, np.random.default_rng(k).random),
        "tdkit": tdkit_agent,
    }
    times: dict[str, list[float]] = {name: [] for name in makers}
    order = np.random.default_rng(1)
    for k in range(args.rounds + 1):  # round 0 warms up and is discarded
        agents = {name: make(k) for name, make in makers.items()}
        for i in order.permutation(len(makers)):
            name = list(makers)[i]
            seconds = replay(agents[name], data)
            if k > 0:
                times[name].append(seconds)
        tables = [a.q if isinstance(a, PurePythonQ) else a.table.tolist() for a in agents.values()]
        if any(t != tables[0] for t in tables):
            raise SystemExit("the agents disagree: not the same work.")
    print(f"Q-learning act + observe + update on {len(data)} replayed Taxi transitions, "
          f"{args.rounds} round(s); CPU microseconds per step (all end with the same table)")
    previous = None
    for name, values in times.items():
        best = min(values)
        step = "" if previous is None else f"   {(best - previous) * 1e6:+.2f} us"
        print(f"  {name:<24} best {best * 1e6:6.2f}   median "
              f"{statistics.median(values) * 1e6:6.2f}{step}")
        previous = best


if __name__ == "__main__":
    main()

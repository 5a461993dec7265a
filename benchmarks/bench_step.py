"""Per-step cost of a learner's act + observe + update, on replayed Taxi transitions.

A random-action run of gymnasium's Taxi (``Taxi-v4``, or ``Taxi-v3`` where v4
is not registered) is recorded once: states, actions, rewards, next states,
episode ends and ``info["action_mask"]``. Every agent below then replays the
same transitions: for each one it is asked ``act(state)`` (its choice is
computed but the recorded action is observed, so all agents see identical
data), then ``observe(...)`` and ``update()``. The environment is not in the
timed loop, so the numbers are the agent's own cost.

Agents, all ε-greedy Q-learning (α = 0.1, γ = 0.99, ε = 0.1) with greedy ties
broken uniformly at random:

* ``tdkit``: :class:`tdkit.QLearning`.
* ``pure Python``: a hand-written agent holding Q as a list of lists. It draws
  its uniforms one at a time from a ``numpy.random.Generator`` with the same
  seed, in the same order as tdkit, so both end with the *same* table (checked
  below): the two do exactly the same work.
* ``pure Python, checked``: the pure-Python agent doing what tdkit does
  beyond the update rule on every step: it refuses a reward that is not a
  finite real number, flags that are not booleans and state or action
  indices out of range, counts visits, and writes each new value through to
  a numpy table as well (so a numpy table is always current). Same random
  numbers, same table. It shows what those guarantees cost when written by
  hand, so the part of tdkit's time that is structure can be told from the
  part that is checking.
* ``textbook numpy``: the usual hand-written agent on a numpy table
  (``row.max()``, ``np.flatnonzero`` for ties, ``rng.integers``).
* ``pure Python, stdlib random``: the pure-Python agent drawing from the
  standard library's ``random`` module instead (other random numbers, so its
  table differs; shown for reference, it is not the comparison the targets use).

Masks: tdkit with Taxi's int8 ``action_mask`` passed as ``mask=`` to act and
``next_mask=`` to observe, against tdkit without masks; the difference per
step is the cost of masks.

Split: where the difference lies. A tdkit and a pure-Python agent first
replay the data once untimed (so both hold the same learned table and their
generators are in the same state); then ``act`` alone is timed over the data,
and ``observe`` + ``update`` alone over the data again. Both agents still do
identical work (the same draws, the same updates).

Each round runs every agent once, in a shuffled order, so machine noise hits
all of them alike (a first warm-up round is discarded). Times are CPU time of
this process (``time.process_time``), so other programs on a shared machine
inflate them less than wall-clock time would. The ratios use each agent's best
round (interference only ever adds time, so the best round is the least
disturbed one); the medians of the per-round ratios are printed beside them.

Targets (issue 11): tdkit ≤ 1.25 × pure Python, ≥ 3 × faster than textbook
numpy, masks ≤ 1 µs per step.

Run: ``python benchmarks/bench_step.py [--steps 20000] [--rounds 25]``;
``--smoke`` runs a tiny size (for CI).
"""

from __future__ import annotations

import argparse
import random
import statistics
import time
from collections.abc import Callable
from typing import Any

import gymnasium as gym
import numpy as np

import tdkit

ALPHA, GAMMA, EPSILON = 0.1, 0.99, 0.1

#: One recorded transition: (s, a, r, s2, terminated, truncated, mask of s, mask of s2)
Replay = list[tuple[int, int, float, int, bool, bool, Any, Any]]


def record(steps: int, seed: int) -> Replay:
    """Random-action Taxi transitions with their action masks (Python scalars)."""
    env = gym.make("Taxi-v4" if "Taxi-v4" in gym.registry else "Taxi-v3")
    rng = np.random.default_rng(seed)
    out: Replay = []
    s, info = env.reset(seed=seed)
    mask = info["action_mask"]
    while len(out) < steps:
        a = int(rng.integers(6))
        s2, r, terminated, truncated, info2 = env.step(a)
        mask2 = info2["action_mask"]
        out.append((int(s), a, float(r), int(s2), bool(terminated), bool(truncated), mask, mask2))
        if terminated or truncated:
            s, info = env.reset()
            mask = info["action_mask"]
        else:
            s, mask = s2, mask2
    return out


class PurePythonQ:
    """Q-learning written directly in Python lists; ``draw`` gives uniforms in [0, 1)."""

    def __init__(self, n_states: int, n_actions: int, draw: Callable[[], float]) -> None:
        self.q = [[0.0] * n_actions for _ in range(n_states)]
        self.n_actions = n_actions
        self.draw = draw
        self.pending: tuple[int, int, float, int, bool] | None = None

    def act(self, s: int) -> int:
        if self.draw() < EPSILON:
            return int(self.draw() * self.n_actions)
        row = self.q[s]
        top = max(row)
        if row.count(top) == 1:
            return row.index(top)
        ties = [a for a, v in enumerate(row) if v == top]
        return ties[int(self.draw() * len(ties))]

    def observe(self, s: int, a: int, r: float, s2: int, terminated: bool, truncated: bool) -> None:
        self.pending = (s, a, r, s2, terminated)

    def update(self) -> None:
        s, a, r, s2, terminated = self.pending  # type: ignore[misc]
        self.pending = None
        target = r if terminated else r + GAMMA * max(self.q[s2])
        row = self.q[s]
        row[a] += ALPHA * (target - row[a])


class CheckedPythonQ(PurePythonQ):
    """:class:`PurePythonQ` with tdkit's per-step checks, visit counts and a numpy copy."""

    def __init__(self, n_states: int, n_actions: int, draw: Callable[[], float]) -> None:
        super().__init__(n_states, n_actions, draw)
        self.n_states = n_states
        self.visits = [[0] * n_actions for _ in range(n_states)]
        self.table = np.zeros((n_states, n_actions))
        self.flat = memoryview(self.table).cast("B").cast("d")

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
        self.pending = (s, a, r, s2, terminated)

    def update(self) -> None:
        s, a, r, s2, terminated = self.pending  # type: ignore[misc]
        self.pending = None
        target = r if terminated else r + GAMMA * max(self.q[s2])
        row = self.q[s]
        new = row[a] + ALPHA * (target - row[a])
        if new - new != 0.0:
            raise ValueError("the update overflows")
        row[a] = new
        self.flat[s * self.n_actions + a] = new
        self.visits[s][a] += 1


class NumpyQ:
    """The textbook agent: a numpy table, ``max`` and ``flatnonzero`` for greedy ties."""

    def __init__(self, n_states: int, n_actions: int, seed: int) -> None:
        self.q = np.zeros((n_states, n_actions))
        self.n_actions = n_actions
        self.rng = np.random.default_rng(seed)
        self.pending: tuple[int, int, float, int, bool] | None = None

    def act(self, s: int) -> int:
        if self.rng.random() < EPSILON:
            return int(self.rng.integers(self.n_actions))
        row = self.q[s]
        ties = np.flatnonzero(row == row.max())
        return int(ties[self.rng.integers(len(ties))])

    def observe(self, s: int, a: int, r: float, s2: int, terminated: bool, truncated: bool) -> None:
        self.pending = (s, a, r, s2, terminated)

    def update(self) -> None:
        s, a, r, s2, terminated = self.pending  # type: ignore[misc]
        self.pending = None
        target = r if terminated else r + GAMMA * self.q[s2].max()
        self.q[s, a] += ALPHA * (target - self.q[s, a])


def tdkit_agent(seed: int) -> tdkit.QLearning:
    return tdkit.QLearning(500, 6, gamma=GAMMA, step_size=ALPHA, exploration=EPSILON, seed=seed)


def replay(agent: Any, data: Replay) -> float:
    """Seconds per transition of act + observe + update over ``data``."""
    act, observe, update = agent.act, agent.observe, agent.update
    start = time.process_time()
    for s, a, r, s2, terminated, truncated, _m, _m2 in data:
        act(s)
        observe(s, a, r, s2, terminated, truncated)
        update()
    return (time.process_time() - start) / len(data)


def replay_masked(agent: Any, data: Replay) -> float:
    """As :func:`replay`, passing Taxi's action masks to act and observe."""
    act, observe, update = agent.act, agent.observe, agent.update
    start = time.process_time()
    for s, a, r, s2, terminated, truncated, m, m2 in data:
        act(s, mask=m)
        observe(s, a, r, s2, terminated, truncated, next_mask=m2)
        update()
    return (time.process_time() - start) / len(data)


def replay_act(agent: Any, data: Replay) -> float:
    """Seconds per transition of ``act`` alone (the agent is not taught)."""
    act = agent.act
    start = time.process_time()
    for s, _a, _r, _s2, _terminated, _truncated, _m, _m2 in data:
        act(s)
    return (time.process_time() - start) / len(data)


def replay_learn(agent: Any, data: Replay) -> float:
    """Seconds per transition of ``observe`` + ``update`` alone."""
    observe, update = agent.observe, agent.update
    start = time.process_time()
    for s, a, r, s2, terminated, truncated, _m, _m2 in data:
        observe(s, a, r, s2, terminated, truncated)
        update()
    return (time.process_time() - start) / len(data)


def split_pair(seed: int, data: Replay) -> tuple[tdkit.QLearning, PurePythonQ]:
    """A tdkit and a pure-Python agent after one untimed replay: same table, same generator."""
    pair = (tdkit_agent(seed), PurePythonQ(500, 6, np.random.default_rng(seed).random))
    for agent in pair:
        replay(agent, data)
    return pair


def replay_arguments(
    description: str, argv: list[str] | None, rounds: int
) -> tuple[argparse.Namespace, Replay]:
    """Parse ``--steps``, ``--rounds`` and ``--smoke``; record the transitions to replay."""
    parser = argparse.ArgumentParser(description=description)
    parser.add_argument("--steps", type=int, default=20_000)
    parser.add_argument("--rounds", type=int, default=rounds)
    parser.add_argument("--smoke", action="store_true", help="tiny sizes, for CI")
    args = parser.parse_args(argv)
    if args.smoke:
        args.steps, args.rounds = 2_000, 1
    return args, record(args.steps, seed=0)


def main(argv: list[str] | None = None) -> None:
    args, data = replay_arguments(__doc__.splitlines()[0], argv, rounds=25)

    names = ["tdkit", "pure Python", "pure Python, checked", "textbook numpy",
             "pure Python, stdlib random", "tdkit, masks", "tdkit act", "pure Python act",
             "tdkit observe+update", "pure Python observe+update"]
    times: dict[str, list[float]] = {name: [] for name in names}
    order = np.random.default_rng(0)
    for k in range(args.rounds + 1):  # round 0 warms up and is discarded
        tdkit_run = tdkit_agent(k)
        python_run = PurePythonQ(500, 6, np.random.default_rng(k).random)
        checked_run = CheckedPythonQ(500, 6, np.random.default_rng(k).random)
        split_tdkit, split_python = split_pair(k, data)
        agents: dict[str, tuple[Any, Callable[[Any, Replay], float]]] = {
            "tdkit": (tdkit_run, replay),
            "pure Python": (python_run, replay),
            "pure Python, checked": (checked_run, replay),
            "textbook numpy": (NumpyQ(500, 6, k), replay),
            "pure Python, stdlib random": (PurePythonQ(500, 6, random.Random(k).random), replay),
            "tdkit, masks": (tdkit_agent(k), replay_masked),
            "tdkit act": (split_tdkit, replay_act),
            "pure Python act": (split_python, replay_act),
            "tdkit observe+update": (split_tdkit, replay_learn),
            "pure Python observe+update": (split_python, replay_learn),
        }
        measured = {}
        # The split agents run act before observe+update (the learned table must not
        # change before act is timed); the rest run in a shuffled order.
        for i in sorted(order.permutation(len(names)), key=lambda i: "update" in names[i]):
            agent, run = agents[names[i]]
            measured[names[i]] = run(agent, data)
        if (tdkit_run.table.tolist() != python_run.q or checked_run.table.tolist() != python_run.q
                or split_tdkit.table.tolist() != split_python.q):
            raise SystemExit("tdkit and the pure-Python agent disagree: not the same work.")
        if k > 0:
            for name in names:
                times[name].append(measured[name])
    vs_python = [t / p for t, p in zip(times["tdkit"], times["pure Python"], strict=True)]
    vs_numpy = [n / t for t, n in zip(times["tdkit"], times["textbook numpy"], strict=True)]
    mask_cost = [m - t for t, m in zip(times["tdkit"], times["tdkit, masks"], strict=True)]

    best = {name: min(values) for name, values in times.items()}
    print(f"Q-learning act + observe + update on {len(data)} replayed Taxi transitions, "
          f"{args.rounds} round(s); CPU microseconds per step, best and median of rounds")
    for name in names:
        print(f"  {name:<30} best {best[name] * 1e6:6.2f}   median "
              f"{statistics.median(times[name]) * 1e6:6.2f}")
    print("  (tdkit and pure Python draw the same random numbers and end with the same table)")
    print(f"  tdkit / pure Python        {best['tdkit'] / best['pure Python']:5.2f}x, bests "
          f"(per-round median {statistics.median(vs_python):.2f})   target <= 1.25x")
    vs_checked = [t / c for t, c in zip(times["tdkit"], times["pure Python, checked"], strict=True)]
    print(f"  tdkit / pure Python, checked {best['tdkit'] / best['pure Python, checked']:5.2f}x,"
          f" bests (per-round median {statistics.median(vs_checked):.2f})   (what structure costs)")
    print(f"  textbook numpy / tdkit     {best['textbook numpy'] / best['tdkit']:5.2f}x, bests "
          f"(per-round median {statistics.median(vs_numpy):.2f})   target >= 3x")
    print(f"  masks, per step            {(best['tdkit, masks'] - best['tdkit']) * 1e6:5.2f} us "
          f"between the bests (per-round median {statistics.median(mask_cost) * 1e6:.2f})   "
          "target <= 1 us")
    for part in ("act", "observe+update"):
        print(f"  split, {part:<15}    tdkit / pure Python "
              f"{best[f'tdkit {part}'] / best[f'pure Python {part}']:5.2f}x, bests "
              f"({(best[f'tdkit {part}'] - best[f'pure Python {part}']) * 1e6:.2f} us more)")


if __name__ == "__main__":
    main()

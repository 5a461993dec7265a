"""Value iteration on a large sparse Garnet MDP against a memory-bandwidth floor.

Builds ``garnet(100_000, 4, 8, gamma=0.99)`` (Archibald, McKinnon & Thomas
1995) in the sparse successor form, runs ``tdkit.dp.value_iteration`` to
``tol=1e-6`` and reports:

* the whole run: sweeps and seconds per sweep;
* one sweep of the optimality operator alone (median of ``--repeats``);
* the floor: ``np.copyto`` of a buffer as large as the bytes one sweep must
  read (successor indices, probabilities, rewards and the value vector),
  measured in the same run on the same machine;
* the ratio sweep / floor. A sweep also gathers ``v`` at random successors
  and reduces over them, so a ratio of a few is the expected range.

Run: ``python benchmarks/bench_value_iteration.py [--states 100000] [--repeats 20]``;
``--smoke`` runs a tiny size (for CI).
(``benchmarks/bench_dp.py`` compares the faster methods of ``tdkit.solve``.)
"""

from __future__ import annotations

import argparse
import statistics
import time
from collections.abc import Callable

import numpy as np

from tdkit.dp import bellman_optimality_operator, value_iteration
from tdkit.envs.problems import garnet


def _median_seconds(work: Callable[[], object], repeats: int) -> float:
    work()  # warm caches and allocator
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        work()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--states", type=int, default=100_000)
    parser.add_argument("--actions", type=int, default=4)
    parser.add_argument("--branching", type=int, default=8)
    parser.add_argument("--gamma", type=float, default=0.99)
    parser.add_argument("--tol", type=float, default=1e-6)
    parser.add_argument("--repeats", type=int, default=20)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--smoke", action="store_true", help="tiny sizes, for CI")
    args = parser.parse_args()
    if args.smoke:
        args.states, args.repeats = 500, 2

    start = time.perf_counter()
    mdp = garnet(args.states, args.actions, args.branching, gamma=args.gamma, seed=args.seed)
    built = time.perf_counter() - start
    next_states, probs, _ = mdp.successors
    n_bytes = next_states.nbytes + probs.nbytes + mdp.R.nbytes + 8 * mdp.n_states

    start = time.perf_counter()
    sol = value_iteration(mdp, tol=args.tol)
    run = time.perf_counter() - start
    # value_iteration applies `iterations` sweeps, plus one for the returned q.
    per_sweep_run = run / (sol.iterations + 1)

    v = np.asarray(sol.v)
    sweep = _median_seconds(lambda: bellman_optimality_operator(mdp, v), args.repeats)
    source = np.ones(n_bytes // 8)
    target = np.empty_like(source)
    floor = _median_seconds(lambda: np.copyto(target, source), args.repeats)

    print(
        f"Garnet: S={mdp.n_states:,}, A={mdp.n_actions}, K={args.branching}, "
        f"gamma={mdp.gamma} (built in {built:.2f} s)"
    )
    print(
        f"value_iteration(tol={args.tol:g}): {sol.iterations} sweeps in {run:.2f} s, "
        f"{per_sweep_run * 1e3:.2f} ms per sweep, residual {sol.residual:.2e}"
    )
    print(f"one optimality sweep (median of {args.repeats}): {sweep * 1e3:.2f} ms")
    print(
        f"memory-copy floor for the {n_bytes / 1e6:.1f} MB a sweep reads: {floor * 1e3:.2f} ms "
        f"({n_bytes / floor / 1e9:.1f} GB/s)"
    )
    print(f"ratio sweep / copy floor: {sweep / floor:.2f}")


if __name__ == "__main__":
    main()

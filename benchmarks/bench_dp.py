"""Exact solvers on a large sparse Garnet model: per-sweep cost and time to a solution.

Builds ``garnet(S, A, K, gamma)`` (Archibald, McKinnon & Thomas 1995) in the
sparse successor form and prints, side by side in one run on one machine:

1. **ms per sweep vs the memory-copy floor**: one application of the
   optimality operator (median of ``--repeats``) against ``np.copyto`` of a
   buffer as large as the bytes a sweep must read (successor indices,
   probabilities, rewards, values). A sweep also gathers values at random
   successors and reduces over them, so a ratio of a few is expected.
2. **time to a solution within tol** of every method of ``tdkit.solve``
   against plain ``tdkit.value_iteration`` (the sup-norm stopping rule of
   Puterman 1994, Theorem 6.3.1), with the certified error bound of each and
   the largest difference of its values from plain value iteration's.

Run: ``python benchmarks/bench_dp.py`` (100,000 x 4 x 8, gamma 0.99, tol 1e-6),
``python benchmarks/bench_dp.py --states 1000000 --skip value_iteration,gauss_seidel``
for the million-state model, ``python benchmarks/bench_dp.py --smoke`` for a
tiny check that the script runs.
"""

from __future__ import annotations

import argparse
import resource
import statistics
import time
from collections.abc import Callable

import numpy as np

from tdkit.dp import bellman_optimality_operator, value_iteration
from tdkit.dp_solve import solve
from tdkit.envs.problems import garnet

_METHODS = ("value_iteration", "modified_policy_iteration", "gauss_seidel", "policy_iteration")


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
    parser.add_argument("--repeats", type=int, default=10)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument(
        "--skip", default="policy_iteration",
        help="comma-separated methods to leave out (default: policy_iteration, "
        "whose sparse solves are slow at this size)",
    )
    parser.add_argument("--smoke", action="store_true", help="tiny sizes, to check the script")
    args = parser.parse_args()
    if args.smoke:
        args.states, args.repeats, args.skip = 500, 2, ""
    skip = {name for name in args.skip.split(",") if name}

    start = time.perf_counter()
    mdp = garnet(args.states, args.actions, args.branching, gamma=args.gamma, seed=args.seed)
    built = time.perf_counter() - start
    next_states, probs = mdp._successor_arrays()
    n_bytes = next_states.nbytes + probs.nbytes + mdp.R.nbytes + 8 * mdp.n_states
    print(
        f"Garnet: S={mdp.n_states:,}, A={mdp.n_actions}, K={args.branching}, "
        f"gamma={mdp.gamma}, tol={args.tol:g} (built in {built:.2f} s)"
    )

    v = np.zeros(mdp.n_states)
    sweep = _median_seconds(lambda: bellman_optimality_operator(mdp, v), args.repeats)
    source = np.ones(n_bytes // 8)
    target = np.empty_like(source)
    floor = _median_seconds(lambda: np.copyto(target, source), args.repeats)

    print(
        f"one optimality sweep: {sweep * 1e3:.2f} ms; memory-copy floor for the "
        f"{n_bytes / 1e6:.1f} MB it reads: {floor * 1e3:.2f} ms; ratio {sweep / floor:.2f}"
    )

    rows = []
    reference = None
    for method in _METHODS:
        if method in skip:
            continue
        start = time.perf_counter()
        if method == "value_iteration":
            sol = value_iteration(mdp, tol=args.tol)
        else:
            sol = solve(mdp, method=method, tol=args.tol)
        seconds = time.perf_counter() - start
        if method == "value_iteration":
            reference = (sol, seconds)
        rows.append((method, sol, seconds))

    print()
    header = f"{'method':<28}{'iterations':>11}{'seconds':>10}{'speed-up':>10}"
    header += f"{'error bound':>13}{'max |v - v_VI|':>16}"
    print(header)
    for method, sol, seconds in rows:
        speed = "" if reference is None else f"{reference[1] / seconds:.1f}x"
        gap = "" if reference is None else f"{np.max(np.abs(sol.v - reference[0].v)):.2e}"
        print(
            f"{method:<28}{sol.iterations:>11}{seconds:>10.2f}{speed:>10}"
            f"{sol.error_bound:>13.2e}{gap:>16}"
        )
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e6  # kB on Linux
    print(f"\npeak resident memory: {peak:.2f} GB")


if __name__ == "__main__":
    main()

"""Speed-up of a sweep on 2 workers over 1 worker, with a process pool and with Dask.

One sweep (Q-learning on the cliff-walking grid of Sutton & Barto 2018, Example 6.6,
64 seeds) runs on: this process alone (``max_workers=1``), a process pool of 1 and of
2 workers, and -- when the ``dist`` extra is installed -- a Dask ``LocalCluster`` of 1 and
of 2 worker processes. The configurations alternate in rounds so machine noise hits them
alike; the best time of each is kept. Every configuration must give the same runs (the
script checks it), and the speed-up of 2 workers over 1 is printed for each executor.
Dask workers are spawned processes: each imports tdkit before the clock starts, as
forked pool workers inherit it, so the sweep is timed and not a first import.

The speed-up can only approach 2 on a machine with 2 idle cores: the script prints the
CPUs this process may use and the load average, so a low ratio on a busy machine can be
told apart from overhead in tdkit.

Run: ``python benchmarks/bench_sweep.py [--seeds 64] [--episodes 150] [--rounds 3]
[--no-dask]``; ``--smoke`` runs a tiny size once (for CI).
"""

from __future__ import annotations

import argparse
import concurrent.futures
import contextlib
import functools
import importlib
import logging
import os
import time
import warnings
from collections.abc import Callable, Iterator
from typing import Any

import tdkit
from tdkit.envs.problems import cliff_walking
from tdkit.sweep import SweepResult, run_sweep
from tdkit.verify import agent_factory


def _sweep(seeds: int, episodes: int, **executor: Any) -> SweepResult:
    make_env = functools.partial(cliff_walking().to_env, 200)
    make_agent = agent_factory(tdkit.QLearning, step_size=0.5, exploration=0.1)
    return run_sweep(make_agent, make_env, seeds=range(seeds), episodes=episodes, **executor)


def _fingerprint(result: SweepResult) -> list:
    return [(run.seed, run.agent_seed, run.returns.tolist()) for run in result]


@contextlib.contextmanager
def _process_pool(workers: int) -> Iterator[dict[str, Any]]:
    with concurrent.futures.ProcessPoolExecutor(workers) as pool:
        pool.submit(int).result()  # start a worker before the clock starts
        yield {"executor": pool}


@contextlib.contextmanager
def _dask(workers: int) -> Iterator[dict[str, Any]]:
    import distributed

    # Workers that lose the scheduler at shutdown log heartbeat errors; not ours to show.
    logging.getLogger("distributed").setLevel(logging.CRITICAL)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cluster = distributed.LocalCluster(n_workers=workers, threads_per_worker=1,
                                           processes=True, dashboard_address=None,
                                           host="127.0.0.1")
        client = distributed.Client(cluster)
    try:
        # Every worker imports tdkit before the clock starts, as forked pool workers
        # inherit it: the sweep is timed, not the first import in a spawned process.
        client.run(importlib.import_module, "tdkit.runs._one_run")
        yield {"executor": client.get_executor()}
    finally:
        client.close()
        cluster.close()


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=64)
    parser.add_argument("--episodes", type=int, default=150)
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--no-dask", action="store_true", help="skip the Dask cluster")
    parser.add_argument("--smoke", action="store_true", help="tiny sizes, one round")
    args = parser.parse_args(argv)
    if args.smoke:
        args.seeds, args.episodes, args.rounds = 4, 3, 1
    configs: dict[str, Callable[[], contextlib.AbstractContextManager]] = {
        "this process": lambda: contextlib.nullcontext({"max_workers": 1}),
        "process pool, 1 worker": lambda: _process_pool(1),
        "process pool, 2 workers": lambda: _process_pool(2),
    }
    try:
        import distributed  # noqa: F401
        dask = not args.no_dask
    except ImportError:
        dask = False
    if dask:
        configs["dask, 1 worker"] = lambda: _dask(1)
        configs["dask, 2 workers"] = lambda: _dask(2)
    cpus = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    print(f"sweep: {args.seeds} seeds x {args.episodes} episodes of Q-learning on cliff "
          f"walking; {cpus} CPUs usable; load average {os.getloadavg()[0]:.1f} at start")
    best = dict.fromkeys(configs, float("inf"))
    reference = None
    for _ in range(args.rounds):
        for name, make in configs.items():
            with make() as executor:
                start = time.perf_counter()
                result = _sweep(args.seeds, args.episodes, **executor)
                best[name] = min(best[name], time.perf_counter() - start)
            fingerprint = _fingerprint(result)
            if reference is None:
                reference = fingerprint
            elif fingerprint != reference:
                raise SystemExit(f"{name} gave different runs from the first configuration")
    print(f"{'configuration':<26}{'best s':>9}")
    for name, seconds in best.items():
        print(f"{name:<26}{seconds:>9.3f}")
    print("speed-up of 2 workers over 1 (target >= 1.7 on 2 idle cores):")
    pool = best["process pool, 1 worker"] / best["process pool, 2 workers"]
    print(f"  process pool: {pool:.2f}x   (vs this process: "
          f"{best['this process'] / best['process pool, 2 workers']:.2f}x)")
    if dask:
        print(f"  dask:         {best['dask, 1 worker'] / best['dask, 2 workers']:.2f}x")
    print(f"load average {os.getloadavg()[0]:.1f} at the end; every configuration gave the "
          "same runs")


if __name__ == "__main__":
    main()

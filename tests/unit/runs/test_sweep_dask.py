"""tdkit.sweep on a real Dask distributed cluster: 2 local worker processes (the ``dist`` extra).

The cluster listens on loopback only, has no dashboard, and is shut down at the end of the
module. Workers are spawned processes, so everything the runs need comes from tdkit itself
(module-level factories that pickle).
"""

from __future__ import annotations

import concurrent.futures
import functools
import warnings

import numpy as np
import pytest

distributed = pytest.importorskip("distributed")

import tdkit  # noqa: E402
from tdkit.envs.problems import gridworld_4x4  # noqa: E402
from tdkit.sweep import SweepRunError, run_sweep  # noqa: E402
from tdkit.verify import agent_factory, compare_performance  # noqa: E402

# Sutton & Barto (2018), Example 4.1: the 4x4 gridworld, two terminal corners.
MAKE_ENV = functools.partial(gridworld_4x4().to_env, 100)
MAKE_Q = agent_factory(tdkit.QLearning, exploration=0.1)
SMALL = {"seeds": range(3), "settings": {"step_size": [0.1, 0.5]}, "episodes": 20,
         "eval_episodes": 3}


@pytest.fixture(scope="module")
def client():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # dask's own start-up notices are not ours to test
        cluster = distributed.LocalCluster(
            n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
            host="127.0.0.1", protocol="tcp",
        )
        dask_client = distributed.Client(cluster)
    try:
        yield dask_client
    finally:
        dask_client.close()
        cluster.close()


def _as_comparable(result) -> list:
    return [
        (run.setting_index, run.seed, run.agent_seed, run.returns.tolist(),
         run.history.lengths.tolist(),
         None if run.eval_returns is None else run.eval_returns.tolist(), run.error)
        for run in result
    ]


def test_the_cluster_has_two_worker_processes(client):
    workers = client.scheduler_info()["workers"]
    assert len(workers) == 2
    assert all(info["nthreads"] == 1 for info in workers.values())
    # Two distinct processes, neither of them this one.
    pids = set(client.run(lambda: __import__("os").getpid()).values())
    assert len(pids) == 2 and __import__("os").getpid() not in pids


def test_a_dask_sweep_equals_a_process_pool_sweep_for_the_same_seeds(client):
    on_dask = run_sweep(MAKE_Q, MAKE_ENV, executor=client.get_executor(), **SMALL)
    with concurrent.futures.ProcessPoolExecutor(2) as pool:
        on_pool = run_sweep(MAKE_Q, MAKE_ENV, executor=pool, **SMALL)
    assert _as_comparable(on_dask) == _as_comparable(on_pool)
    assert len(on_dask) == 6 and np.isfinite(on_dask.scores()).all()


def test_a_dask_sweep_of_many_runs_sends_them_in_chunks_with_the_same_results(client):
    # 40 runs on 2 workers go as 5 calls per task (4 tasks per worker); each run keeps its
    # own record, failures included, in the order of a serial sweep.
    from tdkit.runs._dispatch import _chunk_size

    executor = client.get_executor()
    assert _chunk_size(executor, 0, 40) == 5
    kwargs = {"seeds": range(20), "settings": [{"step_size": 0.5}, {"step_size": 1.5}],
              "episodes": 4, "on_error": "record"}
    on_dask = run_sweep(MAKE_Q, MAKE_ENV, executor=executor, **kwargs)
    serial = run_sweep(MAKE_Q, MAKE_ENV, max_workers=1, **kwargs)
    assert _as_comparable(on_dask) == _as_comparable(serial)
    assert [(r.setting_index, r.seed) for r in on_dask.failures] == [(1, s) for s in range(20)]


def test_failures_on_dask_are_records_or_a_partial_result(client):
    kwargs = {"seeds": [0, 1], "settings": [{"step_size": 0.5}, {"step_size": 1.5}],
              "episodes": 5}
    recorded = run_sweep(MAKE_Q, MAKE_ENV, executor=client.get_executor(), on_error="record",
                         **kwargs)
    assert [(r.setting_index, r.seed) for r in recorded.failures] == [(1, 0), (1, 1)]
    assert recorded.failures[0].error.startswith("InvalidParameterError: QLearning: step_size")
    serial = run_sweep(MAKE_Q, MAKE_ENV, max_workers=1, on_error="record", **kwargs)
    assert _as_comparable(recorded) == _as_comparable(serial)
    with pytest.raises(SweepRunError) as info:
        run_sweep(MAKE_Q, MAKE_ENV, executor=client.get_executor(), **kwargs)
    assert (info.value.setting_index, info.value.seed) == (1, 0)
    assert isinstance(info.value.__cause__, tdkit.InvalidParameterError)
    finished = [(r.setting_index, r.seed) for r in info.value.partial]
    assert set(finished) <= {(0, 0), (0, 1)}  # only good runs; all of them when they finished
    assert not info.value.partial.failures


def test_compare_performance_on_dask_equals_the_serial_comparison(client):
    good = agent_factory(tdkit.QLearning, step_size=0.5)
    slow = agent_factory(tdkit.QLearning, step_size=0.01)
    serial = compare_performance(good, slow, MAKE_ENV, range(3), episodes=20, eval_episodes=2)
    on_dask = compare_performance(good, slow, MAKE_ENV, range(3), episodes=20, eval_episodes=2,
                                  executor=client.get_executor())
    assert on_dask == serial

"""tdkit.sweep when runs fail: errors as records, partial results, dead workers, warnings,
endless episodes (issue: "sweeps lose work")."""

from __future__ import annotations

import concurrent.futures
import functools
import os
import pickle
import signal
import warnings

import numpy as np
import pytest

import tdkit
from tdkit import InvalidParameterError
from tdkit.envs.problems import gridworld_4x4
from tdkit.runs._one_run import seeded_run
from tdkit.sweep import SweepResult, SweepRunError, run_sweep
from tdkit.verify import agent_factory

# Sutton & Barto (2018), Example 4.1: the 4x4 gridworld, two terminal corners.
GRID = gridworld_4x4()
MAKE_ENV = functools.partial(GRID.to_env, 100)
MAKE_Q = agent_factory(tdkit.QLearning, exploration=0.1)
# QLearning refuses step_size=1.5 (outside (0, 1]) at construction, inside the run.
BAD = {"step_size": 1.5}


class TwoArgumentError(Exception):
    """An exception that pickles but cannot be unpickled (its __init__ needs two arguments,
    pickle passes one): the kind a worker used to report as "terminated abruptly"."""

    def __init__(self, code: int, text: str) -> None:
        super().__init__(f"code {code}: {text}")


def failing_agent(env, seed, *, mode="ok", **setting):
    """A factory whose setting picks how the run ends (module level, so workers can pickle it)."""
    if mode == "unpicklable":
        raise TwoArgumentError(7, "the simulator licence expired")
    if mode == "kill":
        os.kill(os.getpid(), signal.SIGKILL)
    if mode == "exit":
        os._exit(3)
    if mode == "warn":
        warnings.warn("the table is larger than it needs to be", UserWarning, stacklevel=1)
    if mode.startswith("kill-once:"):  # killed from outside the first time only
        marker = mode.split(":", 1)[1]
        if not os.path.exists(marker):
            with open(marker, "w"):
                pass
            os.kill(os.getpid(), signal.SIGKILL)
    return tdkit.QLearning.for_env(env, seed=seed, **setting)


def _comparable(runs) -> list:
    return [
        (run.setting_index, run.seed, run.agent_seed, run.returns.tolist(), run.error)
        for run in runs
    ]


def _expected(setting_index, setting, seed, episodes):
    """The run (setting_index, seed) computed directly through the one seed path."""
    agent_seed, history, _ = seeded_run(MAKE_Q, MAKE_ENV, seed, setting_index, episodes, None,
                                        None, 0, setting)
    return agent_seed, history.returns.tolist()


# ---------------------------------------------------------------- on_error="record"
@pytest.mark.parametrize("workers", [1, 2])
def test_record_keeps_every_other_run_and_names_the_failures(workers):
    settings = [{"step_size": 0.5}, BAD, {"step_size": 0.2}]
    result = run_sweep(MAKE_Q, MAKE_ENV, seeds=[0, 1], settings=settings, episodes=5,
                       max_workers=workers, on_error="record")
    assert len(result) == 6 and result.missing == ()
    assert [(run.setting_index, run.seed) for run in result.failures] == [(1, 0), (1, 1)]
    for run in result.failures:
        assert run.error.startswith("InvalidParameterError: QLearning: step_size")
        assert "Traceback" in run.error_details and run.failed
        assert len(run.history) == 0 and np.isnan(run.score)
        assert "failed: InvalidParameterError" in repr(run)
    for run in result:
        if not run.failed:  # the finished runs are exactly what they would be alone
            assert (run.agent_seed, run.returns.tolist()) == _expected(
                run.setting_index, settings[run.setting_index], run.seed, 5)
    scores = result.scores()
    assert np.isnan(scores[1]).all() and np.isfinite(scores[[0, 2]]).all()
    summary = result.summary(n_resamples=200)
    assert [row.n_runs for row in summary] == [2, 0, 2]
    assert np.isnan(summary[1].mean.estimate) and summary.best().setting_index in (0, 2)
    records = result.to_records()
    assert [r["error"] is None for r in records] == [True, True, False, False, True, True]
    assert "failed=2" in repr(result)


def test_record_gives_the_same_records_on_every_executor():
    kwargs = {"seeds": [0, 1], "settings": [{"step_size": 0.5}, BAD], "episodes": 5,
              "on_error": "record"}
    serial = _comparable(run_sweep(MAKE_Q, MAKE_ENV, max_workers=1, **kwargs))
    with concurrent.futures.ThreadPoolExecutor(2) as pool:
        assert _comparable(run_sweep(MAKE_Q, MAKE_ENV, executor=pool, **kwargs)) == serial
    with concurrent.futures.ProcessPoolExecutor(2) as pool:
        assert _comparable(run_sweep(MAKE_Q, MAKE_ENV, executor=pool, **kwargs)) == serial


def test_on_error_is_checked():
    with pytest.raises(InvalidParameterError, match="on_error must be 'raise' or 'record'"):
        run_sweep(MAKE_Q, MAKE_ENV, seeds=[0], episodes=1, on_error="ignore")


# ---------------------------------------------------------------- on_error="raise"
@pytest.mark.parametrize("workers", [1, 2])
def test_raise_carries_the_finished_runs_as_partial(workers):
    settings = [{"step_size": 0.5}, BAD]
    with pytest.raises(SweepRunError) as info:
        run_sweep(MAKE_Q, MAKE_ENV, seeds=[0, 1, 2], settings=settings, episodes=5,
                  max_workers=workers)
    error = info.value
    assert (error.setting_index, error.seed) == (1, 0)
    partial = error.partial
    assert isinstance(partial, SweepResult) and not partial.failures
    # Setting 0 runs first (setting-major order), so all three of its runs finished.
    assert [(r.setting_index, r.seed) for r in partial] == [(0, 0), (0, 1), (0, 2)]
    assert set(partial.missing) == {(1, 0), (1, 1), (1, 2)}
    for run in partial:
        assert (run.agent_seed, run.returns.tolist()) == _expected(0, settings[0], run.seed, 5)
    assert np.isnan(partial.scores()[1]).all()
    assert "3 finished runs are in .partial" in str(error)
    copy = pickle.loads(pickle.dumps(error))
    assert _comparable(copy.partial) == _comparable(partial) and copy.seed == 0


@pytest.mark.parametrize("workers", [1, 2])
def test_an_exception_that_cannot_be_unpickled_is_reported_as_itself(workers):
    with pytest.raises(SweepRunError) as info:
        run_sweep(failing_agent, MAKE_ENV, seeds=[0], settings={"mode": ["ok", "unpicklable"]},
                  episodes=3, max_workers=workers)
    message = str(info.value)
    assert "TwoArgumentError: code 7: the simulator licence expired" in message
    assert "terminated abruptly" not in message and "died" not in message
    cause = info.value.__cause__
    # In this process the exception itself is chained; from a worker, its traceback as text.
    assert isinstance(cause, TwoArgumentError) or "TwoArgumentError" in str(cause)
    result = run_sweep(failing_agent, MAKE_ENV, seeds=[0], episodes=3, max_workers=workers,
                       settings={"mode": ["ok", "unpicklable"]}, on_error="record")
    assert [run.error for run in result] == [
        None, "TwoArgumentError: code 7: the simulator licence expired"]


# ---------------------------------------------------------------- dead workers
@pytest.mark.parametrize(("mode", "how"), [("kill", "killed by SIGKILL"),
                                           ("exit", "exited with code 3")])
def test_a_dead_worker_is_blamed_on_the_run_that_killed_it(mode, how):
    # Two workers: the healthy run (setting 0) and the deadly one (setting 1) are in flight
    # together; the healthy one must not be blamed, and its result must be kept.
    settings = {"mode": ["ok", mode]}
    with pytest.raises(SweepRunError) as info:
        run_sweep(failing_agent, MAKE_ENV, seeds=[0], settings=settings, episodes=3,
                  max_workers=2)
    error = info.value
    assert (error.setting, error.seed) == ({"mode": mode}, 0)
    assert how in str(error) and "max_workers=1" in str(error)
    assert [(r.setting_index, r.seed) for r in error.partial] == [(0, 0)]
    result = run_sweep(failing_agent, MAKE_ENV, seeds=[0, 1], settings=settings, episodes=3,
                       max_workers=2, on_error="record")
    assert [(r.setting_index, r.seed) for r in result.failures] == [(1, 0), (1, 1)]
    assert all(how in run.error for run in result.failures)
    healthy = [run for run in result if not run.failed]
    assert [(r.setting_index, r.seed) for r in healthy] == [(0, 0), (0, 1)]
    alone = run_sweep(failing_agent, MAKE_ENV, seeds=[0, 1], settings={"mode": ["ok"]},
                      episodes=3, max_workers=1)
    assert _comparable(healthy) == _comparable(alone)


class KilledWorker(Exception):
    """Stands in for dask distributed's exception of the same name (matched by name)."""


class _ClusterThatLosesWorkers(concurrent.futures.Executor):
    """Runs calls inline, except that a run with setting mode='kill' fails as Dask reports a
    task that killed every worker it was tried on."""

    def submit(self, fn, /, *args, **kwargs):
        future = concurrent.futures.Future()
        if args[1][3].get("mode") == "kill":  # (make_agent, make_env, index, setting, ...)
            future.set_exception(KilledWorker("Attempted to run task run-1 on 4 different "
                                              "workers, but all those workers died"))
        else:
            future.set_result(fn(*args, **kwargs))
        return future


def test_a_task_that_killed_its_dask_workers_is_named_without_a_re_run():
    result = run_sweep(failing_agent, MAKE_ENV, seeds=[0, 1], settings={"mode": ["ok", "kill"]},
                       episodes=3, executor=_ClusterThatLosesWorkers(), on_error="record")
    assert [(r.setting_index, r.seed) for r in result.failures] == [(1, 0), (1, 1)]
    assert "killed its worker processes" in result.failures[0].error
    with pytest.raises(SweepRunError, match=r"mode='kill'.*seed 0: it killed its worker"):
        run_sweep(failing_agent, MAKE_ENV, seeds=[0, 1], settings={"mode": ["ok", "kill"]},
                  episodes=3, executor=_ClusterThatLosesWorkers())


def test_a_worker_killed_from_outside_loses_no_run(tmp_path):
    # The first attempt of the run dies (as if the machine killed the worker); re-run alone
    # it finishes, so nothing is blamed, every result is kept, and a warning says why.
    settings = {"mode": ["ok", f"kill-once:{tmp_path / 'killed'}"]}
    with pytest.warns(RuntimeWarning, match="each finished when re-run alone"):
        result = run_sweep(failing_agent, MAKE_ENV, seeds=[0, 1], settings=settings,
                           episodes=3, max_workers=2)
    assert len(result) == 4 and not result.failures and result.missing == ()
    alone = run_sweep(failing_agent, MAKE_ENV, seeds=[0, 1], settings=settings, episodes=3,
                      max_workers=1)
    assert _comparable(result) == _comparable(alone)


def test_a_broken_user_pool_is_replaced_and_the_remaining_runs_complete():
    settings = {"mode": ["kill", "ok"]}
    with concurrent.futures.ProcessPoolExecutor(2) as pool:
        result = run_sweep(failing_agent, MAKE_ENV, seeds=[0, 1, 2], settings=settings,
                           episodes=3, executor=pool, on_error="record")
    assert [(r.setting_index, r.seed) for r in result.failures] == [(0, 0), (0, 1), (0, 2)]
    assert [len(r.history) for r in result if not r.failed] == [3, 3, 3]


# ---------------------------------------------------------------- warnings and endless episodes
def test_warnings_raised_in_worker_processes_reach_the_caller():
    with concurrent.futures.ProcessPoolExecutor(1) as pool, pytest.warns(
        UserWarning, match=r"run with setting mode='warn', seed 0: the table"
    ):
        result = run_sweep(failing_agent, MAKE_ENV, seeds=[0], settings={"mode": ["warn"]},
                           episodes=2, executor=pool)
    assert len(result) == 1 and not result.failures


def _endless_chain() -> tdkit.FiniteMDP:
    # Two states, no terminal state: every episode goes on until a time limit stops it.
    p = np.zeros((2, 2, 2))
    p[:, 0, 0] = 1.0
    p[:, 1, 1] = 1.0
    return tdkit.FiniteMDP(p, np.array([[0.0, 1.0], [0.0, 1.0]]), gamma=0.9)


@pytest.mark.parametrize("workers", [1, 2])
def test_an_endless_simulator_finishes_under_a_time_limit_or_a_step_budget(workers):
    make_env = _endless_chain().to_env
    timed = run_sweep(MAKE_Q, make_env, seeds=[0, 1], episodes=3, max_episode_steps=25,
                      eval_episodes=2, max_workers=workers)
    for run in timed:
        assert run.history.lengths.tolist() == [25, 25, 25]
        assert run.history.ends.tolist() == [1, 1, 1]  # truncated by the time limit
    budget = run_sweep(MAKE_Q, make_env, seeds=[0, 1], steps=60, max_workers=workers)
    assert [run.history.total_steps for run in budget] == [60, 60]


def _long_chain(n: int) -> tdkit.FiniteMDP:
    # n + 1 states in a row; every action moves one state right; the last one is terminal,
    # so every episode from state 0 lasts exactly n steps.
    p = np.zeros((n + 1, 2, n + 1))
    for s in range(n):
        p[s, :, s + 1] = 1.0
    p[n, :, n] = 1.0
    terminal = np.zeros(n + 1, dtype=bool)
    terminal[n] = True
    initial = np.zeros(n + 1)
    initial[0] = 1.0
    return tdkit.FiniteMDP(p, np.zeros((n + 1, 2)), gamma=1.0, terminal=terminal,
                           initial=initial)


@pytest.mark.skipif(
    __import__("multiprocessing").get_start_method() != "fork",
    reason="the lowered threshold reaches the workers through fork",
)
def test_the_endless_episode_warning_of_a_worker_reaches_the_caller(monkeypatch):
    # The driver warns when an episode under episodes= passes a large step count (10^6 by
    # default); lowered to 50 here, an episode of 60 steps stands for one that never ends.
    from tdkit.runs import EndlessEpisodeWarning

    monkeypatch.setattr(tdkit.runs.training, "_ENDLESS_STEPS", 50)
    with pytest.warns(EndlessEpisodeWarning,
                      match=r"run with setting default, seed 0: episode 0 has run for 50 steps"):
        result = run_sweep(MAKE_Q, _long_chain(60).to_env, seeds=[0, 1], episodes=1,
                           max_workers=2)
    assert [run.history.lengths.tolist() for run in result] == [[60], [60]]

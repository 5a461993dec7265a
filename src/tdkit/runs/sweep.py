r"""Seeds × settings: train one agent per (setting, seed) pair over any executor.

:func:`run_sweep` expands a grid (or list) of hyper-parameter settings, runs
one independent training run for every setting and seed, and returns a
:class:`SweepResult` with the per-episode returns of every run, an optional
greedy evaluation, and per-setting summaries from :mod:`tdkit.stats` (mean
and interquartile mean with percentile bootstrap confidence intervals,
Agarwal et al. 2021).

Runs are independent, so they go to any :class:`concurrent.futures.Executor`:
local processes by default, a thread pool, or a Dask distributed client's
``client.get_executor()`` to spread them over several machines (``dist``
extra). The results do not depend on the executor or on the order in which
runs finish: each run's seeds are a pure function of its seed and the index of
its setting (:func:`derive_seeds`), the same seed path as
:func:`tdkit.verify.compare_performance`.

A run that fails does not lose the others: with ``on_error="raise"`` the
:class:`SweepRunError` carries the finished runs (``.partial``), and with
``on_error="record"`` failed runs become records with their error text while
the rest complete. A worker process that dies is named correctly (the runs in
flight are re-run one at a time to find it), and warnings raised in worker
processes (such as the driver's endless-episode warning) are re-issued here.

The result types live in :mod:`tdkit.runs._results` (re-exported here), so code
that only reads results does not import the runner.

References
----------
.. [1] Agarwal, R., Schwarzer, M., Castro, P. S., Courville, A. & Bellemare,
   M. G. (2021). Deep Reinforcement Learning at the Edge of the Statistical
   Precipice. Advances in Neural Information Processing Systems 34.
.. [2] O'Neill, M. E. and the numpy developers: ``numpy.random.SeedSequence``
   (independent streams from an entropy value and a spawn key), numpy
   documentation, "Parallel random number generation" (see :func:`derive_seeds`).
"""

from __future__ import annotations

import itertools
import math
import os
from collections.abc import Callable, Iterable, Mapping, Sequence
from concurrent.futures import Executor, ProcessPoolExecutor
from typing import Any

import numpy as np

from .._errors import InvalidParameterError
from .._progress import progress_bar
from .._validation import require_positive_int
from ._dispatch import RunFailure, RunOutcome, dispatch, reissue_warnings
from ._factories import AgentFactory
from ._one_run import (
    require_callable,
    require_executor,
    require_picklable,
    require_seeds,
    run_seeds,
    seeded_run,
)
from ._results import (
    METRICS,
    RunRecord,
    SettingSummary,
    SweepResult,
    SweepRunError,
    SweepSummary,
    setting_label,
)
from .history import History

__all__ = [
    # running
    "run_sweep",
    "expand_settings",
    "derive_seeds",
    "ON_ERROR",
    # results (defined in tdkit.runs._results)
    "SweepResult",
    "RunRecord",
    "SweepSummary",
    "SettingSummary",
    "METRICS",
    "setting_label",
    # errors
    "SweepRunError",
]

ON_ERROR = ("raise", "record")
"""What :func:`run_sweep` does when a run fails (its ``on_error`` argument)."""

# Setting keys become keyword arguments of make_agent and columns of to_records(), so they
# must differ from make_agent's own arguments and from the other columns.
_RESERVED = frozenset({
    "env", "seed", "setting_index", "agent_seed", "episodes", "steps", "episode", "return",
    "length", "error", *METRICS,
})

_FIX_PICKLE = (
    "Worker processes receive the factories and setting values by pickling: use module-level "
    "functions, tdkit.verify.agent_factory(...) or functools.partial, or run the sweep in this "
    "process with max_workers=1 (or pass executor=ThreadPoolExecutor(...))."
)


# ---------------------------------------------------------------- settings and seeds
def expand_settings(settings: Mapping[str, Any] | Sequence[Mapping[str, Any]] | None,
                    ) -> list[dict[str, Any]]:
    """The list of settings (keyword dicts) that ``settings`` describes.

    Parameters
    ----------
    settings : dict of lists, list of dicts, or None
        A dict maps each keyword to a list of values and stands for the
        cartesian product of the lists, in key order with the last key
        varying fastest. A list of dicts is taken as it is (for settings that
        do not form a grid). None means one empty setting (seeds only).

    Returns
    -------
    list of dict

    Raises
    ------
    InvalidParameterError
        On an empty list, a grid value that is not a list (wrap a single value
        as ``[value]``), or a keyword that is not an identifier or is reserved
        (``seed``, ``env`` and the column names of :meth:`SweepResult.to_records`).

    Examples
    --------
    >>> expand_settings({"step_size": [0.1, 0.5], "exploration": [0.05, 0.2]})
    ... # doctest: +NORMALIZE_WHITESPACE
    [{'step_size': 0.1, 'exploration': 0.05}, {'step_size': 0.1, 'exploration': 0.2},
     {'step_size': 0.5, 'exploration': 0.05}, {'step_size': 0.5, 'exploration': 0.2}]
    >>> expand_settings([{"n": 1}, {"n": 4, "step_size": 0.2}])
    [{'n': 1}, {'n': 4, 'step_size': 0.2}]
    >>> expand_settings(None)
    [{}]
    """
    owner = "expand_settings"
    if settings is None:
        return [{}]
    if isinstance(settings, Mapping):
        keys = list(settings)
        value_lists = []
        for key in keys:
            _require_key(owner, key)
            values = settings[key]
            if isinstance(values, np.ndarray) and values.ndim == 1:
                values = list(values.tolist())
            if isinstance(values, (str, bytes, Mapping)) or not isinstance(values, Sequence):
                raise InvalidParameterError(
                    f"{owner}: settings[{key!r}] must be a list of values to try; got "
                    f"{values!r:.80}. Wrap a single value in a list: {{{key!r}: [{values!r:.40}]}}."
                )
            if len(values) == 0:
                raise InvalidParameterError(
                    f"{owner}: settings[{key!r}] is empty, so the grid has no setting; give at "
                    "least one value or drop the key."
                )
            value_lists.append(list(values))
        return [dict(zip(keys, combo, strict=True)) for combo in itertools.product(*value_lists)]
    if isinstance(settings, (str, bytes)) or not isinstance(settings, Sequence):
        raise InvalidParameterError(
            f"{owner}: settings must be a dict of lists (a grid), a list of dicts or None; got "
            f"{settings!r:.80}."
        )
    if len(settings) == 0:
        raise InvalidParameterError(
            f"{owner}: settings is an empty list; give at least one dict (use [{{}}] or None "
            "for a sweep over seeds only)."
        )
    result = []
    for i, setting in enumerate(settings):
        if not isinstance(setting, Mapping):
            raise InvalidParameterError(
                f"{owner}: settings[{i}] must be a dict of keyword arguments; got "
                f"{setting!r:.80}."
            )
        for key in setting:
            _require_key(owner, key)
        result.append(dict(setting))
    return result


def _require_key(owner: str, key: Any) -> None:
    if not isinstance(key, str) or not key.isidentifier():
        raise InvalidParameterError(
            f"{owner}: setting keys are keyword arguments of make_agent and must be "
            f"identifiers; got {key!r}."
        )
    if key in _RESERVED:
        raise InvalidParameterError(
            f"{owner}: setting key {key!r} is reserved (the sweep passes env and seed itself, "
            f"and records use {', '.join(sorted(_RESERVED - {'env'}))}); rename it in "
            "your factory."
        )


def derive_seeds(seed: int, setting_index: int,
                 ) -> tuple[int, np.random.SeedSequence, np.random.SeedSequence]:
    """The agent seed and environment seed roots of the run (``seed``, ``setting_index``).

    The run's root is ``SeedSequence(seed, spawn_key=(setting_index,))``; its
    three children give the agent seed (an int) and the roots of the training
    and evaluation episode seeds. So every run is reproducible on its own, and
    runs of different settings with one seed draw independent streams. This
    is the one seed path of tdkit's runs: :func:`tdkit.verify.compare_performance`
    runs agent A as stream 0 and B as stream 1, so a sweep of A's factory
    over the same seeds (one setting) repeats A's runs exactly.

    Examples
    --------
    >>> agent_seed, train_root, eval_root = derive_seeds(3, 0)
    >>> agent_seed == derive_seeds(3, 0)[0] != derive_seeds(3, 1)[0]
    True
    """
    return tuple(run_seeds(seed, setting_index))  # type: ignore[return-value]


# ---------------------------------------------------------------- running
def _run_task(
    make_agent: Callable[..., Any],
    make_env: Callable[[], Any],
    setting_index: int,
    setting: dict[str, Any],
    seed: int,
    options: tuple[int | None, int | None, int | None, int],
) -> tuple[int, History, np.ndarray | None]:
    """Run one (setting, seed) pair; module level so process pools can pickle it."""
    episodes, steps, max_episode_steps, eval_episodes = options
    return seeded_run(make_agent, make_env, seed, setting_index, episodes, steps,
                      max_episode_steps, eval_episodes, setting)


def _default_workers() -> int:
    if hasattr(os, "sched_getaffinity"):
        return max(1, len(os.sched_getaffinity(0)))
    return max(1, os.cpu_count() or 1)  # pragma: no cover - platforms without affinity


def run_sweep(
    make_agent: Callable[..., Any],
    make_env: Callable[[], Any],
    *,
    seeds: Iterable[int],
    settings: Mapping[str, Any] | Sequence[Mapping[str, Any]] | None = None,
    episodes: int | None = None,
    steps: int | None = None,
    max_episode_steps: int | None = None,
    eval_episodes: int = 0,
    final_episodes: int = 10,
    executor: Executor | None = None,
    max_workers: int | None = None,
    progress: bool = False,
    on_error: str = "raise",
) -> SweepResult:
    """Train one agent for every (setting, seed) pair and collect the results.

    Each run builds ``env = make_env()`` and
    ``agent = make_agent(env, agent_seed, **setting)``, trains it with
    :func:`tdkit.train` and, when ``eval_episodes > 0``, scores it with
    :func:`tdkit.evaluate`. The agent seed and the environment seeds of
    training and evaluation come from :func:`derive_seeds` ``(seed,
    setting_index)``, so a run's result depends on nothing else: not on the
    executor, the number of workers or the order in which runs finish.

    Parameters
    ----------
    make_agent : callable or learner class
        ``make_agent(env, seed, **setting) -> agent``. A tdkit learner class
        is wrapped as ``tdkit.verify.agent_factory(cls)``, i.e.
        ``cls.for_env(env, seed=seed, **setting)``. Fixed keywords go in the
        factory: ``agent_factory(tdkit.QLearning, gamma=0.9)``.
    make_env : callable
        ``make_env() -> env`` (anything :func:`tdkit.train` accepts), called
        once per run, e.g. ``functools.partial(mdp.to_env, 100)``.
    seeds : iterable of int
        Distinct non-negative seeds; one run per seed and setting.
    settings : dict of lists, list of dicts, or None
        See :func:`expand_settings`: a dict of lists is a grid (cartesian
        product); None runs the factory's defaults only.
    episodes, steps : int, optional
        Training budget of each run, as in :func:`tdkit.train`; at least one
        is required.
    max_episode_steps : int, optional
        Time limit of training and evaluation episodes. Give it (or a
        ``steps`` budget) for a simulator whose episodes may never end: with
        ``episodes`` alone such a run never finishes (the episode driver
        warns, and the warning reaches this process).
    eval_episodes : int, default 0
        Greedy evaluation episodes after training (0: no evaluation).
    final_episodes : int, default 10
        ``final_return`` averages the last this many training episodes (all,
        when a run has fewer).
    executor : concurrent.futures.Executor, optional
        Where runs go (through ``executor.submit``); it is not shut down.
        ``ThreadPoolExecutor`` and ``ProcessPoolExecutor`` work, and so does
        a Dask distributed client's ``client.get_executor()`` (``dist``
        extra), which runs them on the client's cluster. When None, a local
        ``ProcessPoolExecutor`` with ``max_workers`` processes is made for
        the call.
    max_workers : int, optional
        Processes of the default pool; default: the CPUs this process may
        use, at most one per run. With 1 the runs go one by one in this
        process (no pickling, so lambdas work; handy for debugging).
    progress : bool, default False
        Show a progress bar over runs (``progress`` extra, tqdm).
    on_error : {"raise", "record"}, default "raise"
        What a failed run does. ``"raise"``: no new run starts, the runs in
        flight finish, and :class:`SweepRunError` is raised with the finished
        runs as ``.partial``. ``"record"``: the failed run becomes a
        :class:`RunRecord` with ``error`` set (its scores are NaN; summaries
        leave it out) and every other run completes.

    Returns
    -------
    SweepResult
        Runs in setting-major order: every seed of setting 0, then of
        setting 1, and so on.

    Raises
    ------
    InvalidParameterError
        On bad settings, seeds or budgets, or factories that process workers
        cannot receive (the message says how to fix it).
    SweepRunError
        With ``on_error="raise"``, when a run raises or its worker process
        dies: the message names the setting and the seed, the run's own
        exception is chained, and ``.partial`` holds the finished runs. The
        first failing run in setting-major order (among the runs that
        started) is reported. A dead worker is found by re-running the runs
        that were in flight one at a time, each in a fresh process.

    Notes
    -----
    Process workers receive ``make_agent``, ``make_env`` and the setting
    values by pickling: use module-level functions,
    :func:`tdkit.verify.agent_factory` and :func:`functools.partial`, not
    lambdas or functions defined inside other functions. Runs do not share
    learning state, so no run can affect another. Warnings that runs raise in
    other processes are shown there and re-issued here, prefixed with the
    run's setting and seed, when the run ends.

    Examples
    --------
    >>> import functools, tdkit
    >>> from tdkit.envs.problems import gridworld_4x4
    >>> make_env = functools.partial(gridworld_4x4().to_env, 50)
    >>> result = run_sweep(tdkit.QLearning, make_env, seeds=range(3),
    ...                    settings={"step_size": [0.1, 0.5]}, episodes=30, max_workers=1)
    >>> len(result), [run.seed for run in result.runs_for(1)]
    (6, [0, 1, 2])
    >>> result.scores().shape
    (2, 3)
    """
    owner = "run_sweep"
    if isinstance(make_agent, type):
        make_agent = AgentFactory(make_agent)
    require_callable(owner, "make_agent", make_agent)
    require_callable(owner, "make_env", make_env)
    if on_error not in ON_ERROR:
        raise InvalidParameterError(
            f"{owner}: on_error must be 'raise' or 'record'; got {on_error!r}. Use 'record' to "
            "keep going past failed runs and find them in result.failures."
        )
    seed_list = require_seeds(owner, seeds)
    setting_list = expand_settings(settings)
    if episodes is None and steps is None:
        raise InvalidParameterError(
            f"{owner}: give episodes=... or steps=... (the training budget of each run); "
            "got neither."
        )
    if episodes is not None:
        episodes = require_positive_int(owner, "episodes", episodes)
    if steps is not None:
        steps = require_positive_int(owner, "steps", steps)
    if max_episode_steps is not None:
        max_episode_steps = require_positive_int(owner, "max_episode_steps", max_episode_steps)
    eval_episodes = require_positive_int(owner, "eval_episodes", eval_episodes, minimum=0)
    final_episodes = require_positive_int(owner, "final_episodes", final_episodes)
    tasks = [(index, setting, seed) for index, setting in enumerate(setting_list)
             for seed in seed_list]
    if executor is not None:
        require_executor(owner, executor, "submit")
        if max_workers is not None:
            raise InvalidParameterError(
                f"{owner}: max_workers={max_workers!r} sizes the default process pool only; "
                "with executor=... set the workers on your executor."
            )
        workers = 0
    else:
        workers = _default_workers() if max_workers is None else require_positive_int(
            owner, "max_workers", max_workers
        )
        workers = min(workers, len(tasks))
    if workers > 1 or isinstance(executor, ProcessPoolExecutor):
        require_picklable(owner, "make_agent", make_agent, _FIX_PICKLE)
        require_picklable(owner, "make_env", make_env, _FIX_PICKLE)
        for setting in setting_list:
            for key, value in setting.items():
                require_picklable(owner, f"settings value {key}", value, _FIX_PICKLE)
    options = (episodes, steps, max_episode_steps, eval_episodes)
    calls = [(make_agent, make_env, index, setting, seed, options)
             for index, setting, seed in tasks]
    bar = progress_bar(owner, len(tasks), progress, unit="run")

    def on_done(position: int, outcome: RunOutcome) -> None:
        _, setting, seed = tasks[position]
        reissue_warnings(outcome.warnings,
                         f"run with setting {setting_label(setting)}, seed {seed}")
        if bar is not None:
            bar.update(1)

    try:
        outcomes = dispatch(_run_task, calls, executor=executor, workers=workers,
                            stop_on_failure=on_error == "raise", on_done=on_done)
    finally:
        if bar is not None:
            bar.close()
    runs = [
        _record(task, outcome, final_episodes)
        for task, outcome in zip(tasks, outcomes, strict=True) if outcome is not None
    ]
    if on_error == "raise":
        first = next(
            ((task, outcome.failure) for task, outcome in zip(tasks, outcomes, strict=True)
             if outcome is not None and outcome.failure is not None),
            None,
        )
        if first is not None:
            task, failure = first
            partial = SweepResult(setting_list, seed_list,
                                  [run for run in runs if not run.failed],
                                  evaluated=eval_episodes > 0)
            raise _failure(owner, task, failure, partial) from failure.exception()
    return SweepResult(setting_list, seed_list, runs, evaluated=eval_episodes > 0)


def _record(task: tuple[int, dict[str, Any], int], outcome: RunOutcome,
            final_episodes: int) -> RunRecord:
    index, setting, seed = task
    if outcome.failure is None:
        agent_seed, history, eval_returns = outcome.value
        return RunRecord(index, dict(setting), seed, agent_seed, history, eval_returns,
                         _final_return(history, final_episodes))
    failure = outcome.failure
    exc = failure.local
    history = getattr(exc, "history", None)
    if not isinstance(history, History):
        history = History()
    return RunRecord(index, dict(setting), seed, run_seeds(seed, index).agent, history, None,
                     math.nan, failure.error, failure.details)


def _final_return(history: History, final_episodes: int) -> float:
    returns = history.returns
    return float(returns[-final_episodes:].mean()) if returns.size else math.nan


def _failure(owner: str, task: tuple[int, dict[str, Any], int], failure: RunFailure,
             partial: SweepResult) -> SweepRunError:
    index, setting, seed = task
    done = f"{len(partial)} finished run{'s' if len(partial) != 1 else ''} are in .partial"
    if failure.crashed:
        what = failure.error
        fix = ("A run that kills its process (out of memory, a crash in compiled code, "
               "os._exit) cannot be caught: run it with max_workers=1 to see it happen")
    else:
        what = f"failed with {failure.error.rstrip('.')}"
        fix = ("Fix the factory or drop that setting (or pass on_error='record' to keep "
               "going); run with max_workers=1 to debug it in this process")
    return SweepRunError(
        f"{owner}: the run with setting {setting_label(setting)} (setting index {index}) and "
        f"seed {seed}: {what}. {fix}; {done}.",
        dict(setting), index, seed, partial,
    )

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
its setting (:func:`derive_seeds`).

References
----------
.. [1] Agarwal, R., Schwarzer, M., Castro, P. S., Courville, A. & Bellemare,
   M. G. (2021). Deep Reinforcement Learning at the Edge of the Statistical
   Precipice. Advances in Neural Information Processing Systems 34.
.. [2] O'Neill, M. E. and the numpy developers: ``numpy.random.SeedSequence``
   (independent streams from an entropy value and a spawn key), numpy
   documentation, "Parallel random number generation".
"""

from __future__ import annotations

import itertools
import math
import os
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from concurrent.futures import Executor, ProcessPoolExecutor
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._errors import InvalidParameterError, TdkitError
from ._runs import check_callable, check_executor, check_picklable, check_seeds, train_run
from ._validation import require_in_range, require_positive_int
from .history import History
from .stats import ConfidenceInterval, bootstrap_ci
from .verify.factories import AgentFactory

__all__ = [
    # running
    "run_sweep",
    "expand_settings",
    "derive_seeds",
    # results
    "SweepResult",
    "RunRecord",
    "SweepSummary",
    "SettingSummary",
    "METRICS",
    "setting_label",
    # errors
    "SweepRunError",
]

METRICS = ("score", "final_return", "mean_return", "eval_return")
"""Per-run numbers that :meth:`SweepResult.summary` can summarise (see :class:`RunRecord`)."""

# Setting keys become keyword arguments of make_agent and columns of to_records(), so they
# must differ from make_agent's own arguments and from the other columns.
_RESERVED = frozenset({
    "env", "seed", "setting_index", "agent_seed", "episodes", "steps", "episode", "return",
    "length", *METRICS,
})

_FIX_PICKLE = (
    "Worker processes receive the factories and setting values by pickling: use module-level "
    "functions, tdkit.verify.agent_factory(...) or functools.partial, or run the sweep in this "
    "process with max_workers=1 (or pass executor=ThreadPoolExecutor(...))."
)


class SweepRunError(TdkitError, RuntimeError):
    """A run of :func:`run_sweep` raised; the message names its setting and seed.

    The exception the run raised is chained as ``__cause__``.

    Attributes
    ----------
    setting : dict
        The keyword arguments of the failed run.
    setting_index : int
        Index of the setting in :attr:`SweepResult.settings` order.
    seed : int
        The run's seed (one of ``seeds``).
    """

    def __init__(self, message: str, setting: dict[str, Any], setting_index: int,
                 seed: int) -> None:
        super().__init__(message)
        self.setting = setting
        self.setting_index = setting_index
        self.seed = seed

    def __reduce__(self) -> tuple[Any, ...]:
        return type(self), (str(self), self.setting, self.setting_index, self.seed)



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
            _check_key(owner, key)
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
            _check_key(owner, key)
        result.append(dict(setting))
    return result


def _check_key(owner: str, key: Any) -> None:
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
    runs of different settings with one seed draw independent streams.

    Examples
    --------
    >>> agent_seed, train_root, eval_root = derive_seeds(3, 0)
    >>> agent_seed == derive_seeds(3, 0)[0] != derive_seeds(3, 1)[0]
    True
    """
    root = np.random.SeedSequence(seed, spawn_key=(setting_index,))
    agent_child, train_root, eval_root = root.spawn(3)
    agent_seed = int(agent_child.generate_state(1, dtype=np.uint32)[0])
    return agent_seed, train_root, eval_root


def setting_label(setting: Mapping[str, Any]) -> str:
    """A short label such as ``"step_size=0.5, n=4"`` (``"default"`` for an empty setting).

    Examples
    --------
    >>> setting_label({"step_size": 0.5, "trace": "dutch"})
    "step_size=0.5, trace='dutch'"
    """
    if not setting:
        return "default"
    return ", ".join(
        f"{k}={float(v):g}" if isinstance(v, float) else f"{k}={v!r}" for k, v in setting.items()
    )


# ---------------------------------------------------------------- records
@dataclass(frozen=True, eq=False)
class RunRecord:
    """One training run of a sweep.

    Attributes
    ----------
    setting_index : int
        Index of the setting in :attr:`SweepResult.settings`.
    setting : dict
        The keyword arguments given to ``make_agent``.
    seed : int
        The run's seed (one of ``seeds``); :func:`derive_seeds` gives the rest.
    agent_seed : int
        The seed ``make_agent`` received.
    history : History
        Per-episode training statistics.
    eval_returns : numpy.ndarray or None
        Returns of the greedy evaluation episodes (None without evaluation).
    final_return : float
        Mean training return over the last ``final_episodes`` episodes.
    """

    setting_index: int
    setting: dict[str, Any]
    seed: int
    agent_seed: int
    history: History
    eval_returns: np.ndarray | None
    final_return: float

    @property
    def returns(self) -> np.ndarray:
        """Per-episode training returns (a copy)."""
        return self.history.returns

    @property
    def mean_return(self) -> float:
        """Mean training return over all episodes (the area under the learning curve)."""
        return float(self.history.returns.mean())

    @property
    def eval_return(self) -> float:
        """Mean greedy evaluation return (NaN without evaluation)."""
        if self.eval_returns is None:
            return math.nan
        return float(self.eval_returns.mean())

    @property
    def score(self) -> float:
        """``eval_return`` when the sweep evaluated, else ``final_return``."""
        return self.final_return if self.eval_returns is None else self.eval_return

    def __repr__(self) -> str:
        return (
            f"RunRecord({setting_label(self.setting)}; seed={self.seed}, "
            f"episodes={len(self.history)}, score={self.score:.4g})"
        )


# ---------------------------------------------------------------- summaries
@dataclass(frozen=True)
class SettingSummary:
    """Statistics of one setting's run scores.

    ``mean`` and ``iqm`` carry percentile bootstrap intervals over runs; with
    a single run their bounds are NaN. ``std`` is the sample standard
    deviation (``ddof=1``; NaN for one run).
    """

    setting_index: int
    setting: dict[str, Any]
    n_runs: int
    mean: ConfidenceInterval
    iqm: ConfidenceInterval
    std: float


@dataclass(frozen=True)
class SweepSummary:
    """Per-setting statistics of one metric; iterate for :class:`SettingSummary` rows."""

    rows: tuple[SettingSummary, ...]
    metric: str
    confidence: float

    def __iter__(self) -> Iterator[SettingSummary]:
        return iter(self.rows)

    def __len__(self) -> int:
        return len(self.rows)

    def __getitem__(self, index: int) -> SettingSummary:
        return self.rows[index]

    def best(self, by: str = "iqm") -> SettingSummary:
        """The row with the highest ``by`` estimate (``"iqm"`` or ``"mean"``); first on ties."""
        if by not in ("iqm", "mean"):
            raise InvalidParameterError(
                f"SweepSummary.best: by must be 'iqm' or 'mean'; got {by!r}."
            )
        return max(self.rows, key=lambda row: getattr(row, by).estimate)

    def to_records(self) -> list[dict[str, Any]]:
        """One dict per setting: its keywords, runs, mean, IQM and their interval bounds."""
        return [
            {
                "setting_index": row.setting_index,
                **row.setting,
                "runs": row.n_runs,
                "mean": row.mean.estimate,
                "mean_low": row.mean.low,
                "mean_high": row.mean.high,
                "iqm": row.iqm.estimate,
                "iqm_low": row.iqm.low,
                "iqm_high": row.iqm.high,
                "std": row.std,
            }
            for row in self.rows
        ]

    def to_frame(self) -> Any:
        """The records as a pandas DataFrame (needs the ``frame`` extra)."""
        return _frame("SweepSummary.to_frame", self.to_records())

    def __str__(self) -> str:
        labels = [setting_label(row.setting) for row in self.rows]
        width = max(len("setting"), *(len(label) for label in labels))
        ci = f"{self.confidence:.0%} CI"
        lines = [
            f"{self.metric} by setting (mean and IQM over runs, {ci})",
            f"  {'setting':<{width}}  runs  {'mean [' + ci + ']':<30}  IQM [{ci}]",
        ]
        for label, row in zip(labels, self.rows, strict=True):
            mean = f"{row.mean.estimate:.4g} [{row.mean.low:.4g}, {row.mean.high:.4g}]"
            iqm = f"{row.iqm.estimate:.4g} [{row.iqm.low:.4g}, {row.iqm.high:.4g}]"
            lines.append(f"  {label:<{width}}  {row.n_runs:>4}  {mean:<30}  {iqm}")
        return "\n".join(lines)


def _frame(owner: str, records: list[dict[str, Any]]) -> Any:
    try:
        import pandas as pd
    except ImportError as exc:  # pragma: no cover - depends on the environment
        raise ImportError(f"{owner} needs pandas: pip install 'tdkit[frame]'") from exc
    return pd.DataFrame.from_records(records)


# ---------------------------------------------------------------- results
class SweepResult:
    """Every run of a sweep, in setting-major order (all seeds of setting 0 first).

    Iterating yields :class:`RunRecord` objects; ``len`` is the number of runs.

    Attributes
    ----------
    settings : tuple of dict
        The expanded settings, in order.
    seeds : tuple of int
    runs : tuple of RunRecord
    evaluated : bool
        Whether runs carry a greedy evaluation (``eval_episodes > 0``).
    """

    def __init__(self, settings: Sequence[dict[str, Any]], seeds: Sequence[int],
                 runs: Sequence[RunRecord], *, evaluated: bool) -> None:
        self.settings = tuple(settings)
        self.seeds = tuple(seeds)
        self.runs = tuple(runs)
        self.evaluated = evaluated

    def __len__(self) -> int:
        return len(self.runs)

    def __iter__(self) -> Iterator[RunRecord]:
        return iter(self.runs)

    def __getitem__(self, index: int) -> RunRecord:
        return self.runs[index]

    def __repr__(self) -> str:
        return (
            f"SweepResult(settings={len(self.settings)}, seeds={len(self.seeds)}, "
            f"runs={len(self.runs)}, evaluated={self.evaluated})"
        )

    def runs_for(self, setting_index: int) -> tuple[RunRecord, ...]:
        """The runs of one setting, in ``seeds`` order."""
        if isinstance(setting_index, bool) or not isinstance(setting_index, int) or not (
            -len(self.settings) <= setting_index < len(self.settings)
        ):
            raise InvalidParameterError(
                f"SweepResult.runs_for: setting_index must be an int in "
                f"[0, {len(self.settings)}); got {setting_index!r}."
            )
        setting_index %= len(self.settings)
        return tuple(run for run in self.runs if run.setting_index == setting_index)

    def scores(self, metric: str = "score") -> np.ndarray:
        """The metric of every run as an array of shape ``(settings, seeds)``."""
        self._check_metric("SweepResult.scores", metric)
        values = [getattr(run, metric) for run in self.runs]
        return np.asarray(values, dtype=np.float64).reshape(len(self.settings), len(self.seeds))

    def _check_metric(self, owner: str, metric: str) -> None:
        if metric not in METRICS:
            raise InvalidParameterError(
                f"{owner}: metric must be one of {', '.join(map(repr, METRICS))}; got {metric!r}."
            )
        if metric == "eval_return" and not self.evaluated:
            raise InvalidParameterError(
                f"{owner}: metric='eval_return' needs a greedy evaluation; this sweep ran with "
                "eval_episodes=0. Pass eval_episodes=... to run_sweep, or use 'final_return'."
            )

    def summary(
        self,
        metric: str = "score",
        *,
        confidence: float = 0.95,
        n_resamples: int = 2000,
        seed: int = 0,
    ) -> SweepSummary:
        """Mean and IQM of ``metric`` over the runs of each setting, with bootstrap CIs.

        Parameters
        ----------
        metric : {"score", "final_return", "mean_return", "eval_return"}
            The per-run number to summarise (see :class:`RunRecord`);
            ``"score"`` is the evaluation return when the sweep evaluated and
            the final training return otherwise.
        confidence : float, default 0.95
            In (0, 1).
        n_resamples : int, default 2000
            Bootstrap resamples (:func:`tdkit.stats.bootstrap_ci`).
        seed : int, default 0
            Seed of the bootstrap; the summary is reproducible.

        Returns
        -------
        SweepSummary
            One row per setting, in order.
        """
        owner = "SweepResult.summary"
        self._check_metric(owner, metric)
        confidence = require_in_range(owner, "confidence", confidence, 0.0, 1.0,
                                    low_open=True, high_open=True)
        n_resamples = require_positive_int(owner, "n_resamples", n_resamples)
        table = self.scores(metric)
        rows = []
        for index, (setting, scores) in enumerate(zip(self.settings, table, strict=True)):
            if not np.isfinite(scores).all():
                raise InvalidParameterError(
                    f"{owner}: the {metric} of setting {setting_label(setting)} is not finite "
                    f"for some run ({scores!r:.80}); look at those runs' histories."
                )
            if scores.size >= 2:
                cis = [
                    bootstrap_ci(scores, stat, confidence=confidence, n_resamples=n_resamples,
                                 seed=seed)
                    for stat in ("mean", "iqm")
                ]
                std = float(scores.std(ddof=1))
            else:
                value = float(scores[0])
                cis = [ConfidenceInterval(value, math.nan, math.nan, confidence)] * 2
                std = math.nan
            rows.append(SettingSummary(index, dict(setting), int(scores.size), *cis, std))
        return SweepSummary(tuple(rows), metric, confidence)

    def to_records(self, *, per_episode: bool = False) -> list[dict[str, Any]]:
        """Flat dicts, one per run (or per run and episode with ``per_episode=True``).

        Run rows hold ``setting_index``, the setting's keywords, ``seed``,
        ``agent_seed``, ``episodes``, ``steps``, ``final_return``,
        ``mean_return``, ``eval_return`` (NaN without evaluation) and
        ``score``. Episode rows hold ``setting_index``, the keywords, ``seed``,
        ``episode``, ``return`` and ``length``.
        """
        records = []
        for run in self.runs:
            head = {"setting_index": run.setting_index, **run.setting, "seed": run.seed}
            if per_episode:
                returns, lengths = run.history.returns, run.history.lengths
                records.extend(
                    {**head, "episode": i, "return": float(r), "length": int(n)}
                    for i, (r, n) in enumerate(zip(returns, lengths, strict=True))
                )
                continue
            records.append({
                **head,
                "agent_seed": run.agent_seed,
                "episodes": len(run.history),
                "steps": run.history.total_steps,
                "final_return": run.final_return,
                "mean_return": run.mean_return,
                "eval_return": run.eval_return,
                "score": run.score,
            })
        return records

    def to_frame(self, *, per_episode: bool = False) -> Any:
        """:meth:`to_records` as a pandas DataFrame (needs the ``frame`` extra)."""
        return _frame("SweepResult.to_frame", self.to_records(per_episode=per_episode))


# ---------------------------------------------------------------- running
@dataclass(frozen=True)
class _Task:
    setting_index: int
    setting: dict[str, Any]
    seed: int


def _run_task(
    make_agent: Callable[..., Any],
    make_env: Callable[[], Any],
    task: _Task,
    options: tuple[int | None, int | None, int | None, int],
) -> tuple[int, History, np.ndarray | None]:
    """Run one (setting, seed) pair; module level so process pools can pickle it."""
    episodes, steps, max_episode_steps, eval_episodes = options
    agent_seed, train_root, eval_root = derive_seeds(task.seed, task.setting_index)
    history, eval_returns = train_run(
        make_agent, make_env, agent_seed, train_root, eval_root, episodes, steps,
        max_episode_steps, eval_episodes, task.setting,
    )
    return agent_seed, history, eval_returns


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
        Time limit of training and evaluation episodes.
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
        When a run raises: the message names the setting and the seed, and
        the run's own exception is chained. The first failing run in
        setting-major order is reported; runs not yet started are cancelled.

    Notes
    -----
    Process workers receive ``make_agent``, ``make_env`` and the setting
    values by pickling: use module-level functions,
    :func:`tdkit.verify.agent_factory` and :func:`functools.partial`, not
    lambdas or functions defined inside other functions. Runs do not share
    learning state, so no run can affect another.

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
    check_callable(owner, "make_agent", make_agent)
    check_callable(owner, "make_env", make_env)
    seed_list = check_seeds(owner, seeds)
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
    tasks = [
        _Task(index, setting, seed)
        for index, setting in enumerate(setting_list)
        for seed in seed_list
    ]
    if executor is not None:
        check_executor(owner, executor, "submit")
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
        check_picklable(owner, "make_agent", make_agent, _FIX_PICKLE)
        check_picklable(owner, "make_env", make_env, _FIX_PICKLE)
        for setting in setting_list:
            for key, value in setting.items():
                check_picklable(owner, f"settings value {key}", value, _FIX_PICKLE)
    options = (episodes, steps, max_episode_steps, eval_episodes)
    bar = _progress_bar(len(tasks), progress)
    try:
        if workers == 1:
            outputs = [_call(owner, _run_task, make_agent, make_env, task, options, bar)
                       for task in tasks]
        elif executor is not None:
            outputs = _collect(owner, executor, make_agent, make_env, tasks, options, bar)
        else:
            with ProcessPoolExecutor(max_workers=workers) as pool:
                outputs = _collect(owner, pool, make_agent, make_env, tasks, options, bar)
    finally:
        if bar is not None:
            bar.close()
    runs = [
        RunRecord(
            task.setting_index, dict(task.setting), task.seed, agent_seed, history, eval_returns,
            _final_return(history, final_episodes),
        )
        for task, (agent_seed, history, eval_returns) in zip(tasks, outputs, strict=True)
    ]
    return SweepResult(setting_list, seed_list, runs, evaluated=eval_episodes > 0)


def _final_return(history: History, final_episodes: int) -> float:
    returns = history.returns
    return float(returns[-final_episodes:].mean()) if returns.size else math.nan


def _failure(owner: str, task: _Task, exc: BaseException) -> SweepRunError:
    return SweepRunError(
        f"{owner}: the run with setting {setting_label(task.setting)} (setting index "
        f"{task.setting_index}) and seed {task.seed} failed with {type(exc).__name__}: "
        f"{str(exc).rstrip('.')}. "
        "Fix the factory or drop that setting; run with max_workers=1 to debug it in this "
        "process.",
        dict(task.setting), task.setting_index, task.seed,
    )


def _call(owner: str, fn: Callable[..., Any], make_agent: Any, make_env: Any, task: _Task,
          options: tuple, bar: Any) -> Any:
    try:
        output = fn(make_agent, make_env, task, options)
    except Exception as exc:
        raise _failure(owner, task, exc) from exc
    if bar is not None:
        bar.update(1)
    return output


def _collect(owner: str, executor: Any, make_agent: Any, make_env: Any, tasks: list[_Task],
             options: tuple, bar: Any) -> list[Any]:
    futures = [executor.submit(_run_task, make_agent, make_env, task, options) for task in tasks]
    outputs = []
    try:
        for task, future in zip(tasks, futures, strict=True):
            try:
                outputs.append(future.result())
            except Exception as exc:
                raise _failure(owner, task, exc) from exc
            if bar is not None:
                bar.update(1)
    finally:
        for future in futures:
            future.cancel()
    return outputs


def _progress_bar(total: int, enabled: bool) -> Any:
    if not enabled:
        return None
    try:
        from tqdm.auto import tqdm
    except ImportError as exc:  # pragma: no cover - depends on the environment
        raise ImportError("run_sweep(progress=True) needs tqdm: pip install 'tdkit[progress]'"
                          ) from exc
    return tqdm(total=total, unit="run")

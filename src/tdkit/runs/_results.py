r"""The results of a sweep: one record per run, the whole sweep, per-setting summaries.

These types live apart from the runner (:mod:`tdkit.sweep`) so that readers of
results -- :mod:`tdkit.plot`, notebooks, analysis code -- do not import the
machinery that runs them. :mod:`tdkit.sweep` re-exports every public name.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .._errors import InvalidParameterError, TdkitError
from .._validation import require_in_range, require_positive_int
from ..stats import ConfidenceInterval, ScoreSummary, summarize_scores
from .history import History

__all__ = [
    "METRICS",
    "setting_label",
    "RunRecord",
    "SweepResult",
    "SweepSummary",
    "SettingSummary",
    "SweepRunError",
]

METRICS = ("score", "final_return", "mean_return", "eval_return")
"""Per-run numbers that :meth:`SweepResult.summary` can summarise (see :class:`RunRecord`)."""

_REMOVAL = "0.3.0"
"""Version that removes the deprecated ``per_episode=`` flag."""

SettingSummary = ScoreSummary
"""The summary of one setting's runs: :class:`tdkit.stats.ScoreSummary` (former name)."""


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
        Mean training return over the last ``final_episodes`` episodes (NaN
        for a failed run).
    error : str or None
        Why the run failed (``"TypeName: message"``, or how its worker
        process died); None for a run that finished. Failed runs appear only
        in sweeps run with ``on_error="record"``; their ``history`` holds the
        episodes finished before the failure when the error carried them, and
        is empty otherwise.
    error_details : str
        The traceback of the failure, as text ("" for a finished run).
    """

    setting_index: int
    setting: dict[str, Any]
    seed: int
    agent_seed: int
    history: History
    eval_returns: np.ndarray | None
    final_return: float
    error: str | None = None
    error_details: str = ""

    @property
    def failed(self) -> bool:
        """Whether the run failed (see ``error``)."""
        return self.error is not None

    @property
    def returns(self) -> np.ndarray:
        """Per-episode training returns (a copy)."""
        return self.history.returns

    @property
    def mean_return(self) -> float:
        """Mean training return over all episodes (the area under the learning curve)."""
        returns = self.history.returns
        return float(returns.mean()) if returns.size and not self.failed else math.nan

    @property
    def eval_return(self) -> float:
        """Mean greedy evaluation return (NaN without evaluation)."""
        if self.eval_returns is None:
            return math.nan
        return float(self.eval_returns.mean())

    @property
    def score(self) -> float:
        """``eval_return`` when the sweep evaluated, else ``final_return`` (NaN if failed)."""
        return self.final_return if self.eval_returns is None else self.eval_return

    def __repr__(self) -> str:
        if self.failed:
            return (
                f"RunRecord({setting_label(self.setting)}; seed={self.seed}, "
                f"failed: {self.error:.80})"
            )
        return (
            f"RunRecord({setting_label(self.setting)}; seed={self.seed}, "
            f"episodes={len(self.history)}, score={self.score:.4g})"
        )


@dataclass(frozen=True)
class SweepSummary:
    """Per-setting statistics of one metric; iterate for its :class:`~tdkit.stats.ScoreSummary`
    rows (one per setting, over the runs that finished)."""

    rows: tuple[ScoreSummary, ...]
    metric: str
    confidence: float

    def __iter__(self) -> Iterator[ScoreSummary]:
        return iter(self.rows)

    def __len__(self) -> int:
        return len(self.rows)

    def __getitem__(self, index: int) -> ScoreSummary:
        return self.rows[index]

    def best(self, by: str = "iqm") -> ScoreSummary:
        """The row with the highest ``by`` estimate (``"iqm"`` or ``"mean"``); first on ties."""
        if by not in ("iqm", "mean"):
            raise InvalidParameterError(
                f"SweepSummary.best: by must be 'iqm' or 'mean'; got {by!r}."
            )
        scored = [row for row in self.rows if row.n_runs]
        if not scored:
            raise InvalidParameterError(
                "SweepSummary.best: no setting has a finished run; look at the runs' errors."
            )
        return max(scored, key=lambda row: getattr(row, by).estimate)

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
    """The runs of a sweep, in setting-major order (all seeds of setting 0 first).

    Iterating yields :class:`RunRecord` objects; ``len`` is the number of
    runs held. A complete sweep holds one run per setting and seed; the
    ``partial`` result carried by a :class:`SweepRunError` holds only the
    runs that finished (``missing`` lists the others).

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
        failed = len(self.failures)
        missing = len(self.missing)
        return (
            f"SweepResult(settings={len(self.settings)}, seeds={len(self.seeds)}, "
            f"runs={len(self.runs)}, evaluated={self.evaluated}"
            + (f", failed={failed}" if failed else "")
            + (f", missing={missing}" if missing else "") + ")"
        )

    @property
    def failures(self) -> tuple[RunRecord, ...]:
        """The runs that failed (only with ``on_error="record"``), in order."""
        return tuple(run for run in self.runs if run.failed)

    @property
    def missing(self) -> tuple[tuple[int, int], ...]:
        """``(setting_index, seed)`` of every run the result does not hold (a partial result)."""
        held = {(run.setting_index, run.seed) for run in self.runs}
        return tuple(
            (index, seed) for index in range(len(self.settings)) for seed in self.seeds
            if (index, seed) not in held
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
        """The metric of every run as an array of shape ``(settings, seeds)``.

        Failed and missing runs are NaN.
        """
        self._require_metric("SweepResult.scores", metric)
        table = np.full((len(self.settings), len(self.seeds)), np.nan)
        column = {seed: j for j, seed in enumerate(self.seeds)}
        for run in self.runs:
            table[run.setting_index, column[run.seed]] = getattr(run, metric)
        return table

    def _require_metric(self, owner: str, metric: str) -> None:
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

        Only runs that finished count; a setting none of whose runs finished
        gets a row with no runs and NaN estimates.

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
            One :class:`~tdkit.stats.ScoreSummary` row per setting, in order
            (:func:`tdkit.stats.summarize_scores`).
        """
        owner = "SweepResult.summary"
        self._require_metric(owner, metric)
        confidence = require_in_range(owner, "confidence", confidence, 0.0, 1.0,
                                    low_open=True, high_open=True)
        n_resamples = require_positive_int(owner, "n_resamples", n_resamples)
        rows = []
        for index, setting in enumerate(self.settings):
            label = setting_label(setting)
            scores = np.array([getattr(run, metric) for run in self.runs_for(index)
                               if not run.failed])
            if not np.isfinite(scores).all():
                raise InvalidParameterError(
                    f"{owner}: the {metric} of setting {label} is not finite for some run "
                    f"({scores!r:.80}); look at those runs' histories."
                )
            if scores.size:
                rows.append(summarize_scores(
                    scores, label=label, confidence=confidence, n_resamples=n_resamples,
                    seed=seed, setting_index=index, setting=setting,
                ))
            else:
                nothing = ConfidenceInterval(math.nan, math.nan, math.nan, confidence)
                rows.append(ScoreSummary(label, (), nothing, nothing, math.nan, index,
                                         dict(setting)))
        return SweepSummary(tuple(rows), metric, confidence)

    def to_records(self, *, per_episode: bool | None = None) -> list[dict[str, Any]]:
        """Flat dicts, one per run.

        Rows hold ``setting_index``, the setting's keywords, ``seed``,
        ``agent_seed``, ``episodes``, ``steps``, ``final_return``,
        ``mean_return``, ``eval_return`` (NaN without evaluation) and
        ``score``, and ``error`` (None for a run that finished) when the sweep
        has failed runs. One row per run and episode comes from
        :meth:`to_episode_records`.

        Parameters
        ----------
        per_episode : bool, optional
            Deprecated (a ``FutureWarning``; removed in tdkit 0.3.0): ``True``
            returned :meth:`to_episode_records`, a different row layout.
        """
        if per_episode is not None:
            _warn_per_episode("to_records", "to_episode_records")
            if per_episode:
                return self.to_episode_records()
        with_errors = bool(self.failures)
        records = []
        for run in self.runs:
            row = {
                **_run_head(run),
                "agent_seed": run.agent_seed,
                "episodes": len(run.history),
                "steps": run.history.total_steps,
                "final_return": run.final_return,
                "mean_return": run.mean_return,
                "eval_return": run.eval_return,
                "score": run.score,
            }
            if with_errors:
                row["error"] = run.error
            records.append(row)
        return records

    def to_episode_records(self) -> list[dict[str, Any]]:
        """Flat dicts, one per run and training episode (for plotting with other tools).

        Rows hold ``setting_index``, the setting's keywords, ``seed``,
        ``episode``, ``return`` and ``length``; runs in sweep order, episodes
        in the order they ran.
        """
        records = []
        for run in self.runs:
            head = _run_head(run)
            returns, lengths = run.history.returns, run.history.lengths
            records.extend(
                {**head, "episode": i, "return": float(r), "length": int(n)}
                for i, (r, n) in enumerate(zip(returns, lengths, strict=True))
            )
        return records

    def to_frame(self, *, per_episode: bool | None = None) -> Any:
        """:meth:`to_records` as a pandas DataFrame (needs the ``frame`` extra).

        ``per_episode`` is deprecated as in :meth:`to_records`; use
        :meth:`to_episode_frame`.
        """
        if per_episode is not None:
            _warn_per_episode("to_frame", "to_episode_frame")
            if per_episode:
                return self.to_episode_frame()
        return _frame("SweepResult.to_frame", self.to_records())

    def to_episode_frame(self) -> Any:
        """:meth:`to_episode_records` as a pandas DataFrame (needs the ``frame`` extra)."""
        return _frame("SweepResult.to_episode_frame", self.to_episode_records())


def _run_head(run: RunRecord) -> dict[str, Any]:
    """The columns that name a run: ``setting_index``, the setting's keywords, ``seed``."""
    return {"setting_index": run.setting_index, **run.setting, "seed": run.seed}


def _warn_per_episode(method: str, replacement: str) -> None:
    warnings.warn(
        f"SweepResult.{method}(per_episode=...) is deprecated and will be removed in tdkit "
        f"{_REMOVAL}: a flag must not change the row layout. Use "
        f"SweepResult.{replacement}() for one row per run and episode.",
        FutureWarning,
        stacklevel=3,
    )


# ---------------------------------------------------------------- errors
class SweepRunError(TdkitError, RuntimeError):
    """A run of :func:`tdkit.sweep.run_sweep` failed; the message names its setting and seed.

    The exception the run raised is chained as ``__cause__`` (rebuilt from the
    worker when it can be; otherwise its traceback as text). When the run's
    worker process died there is no exception to chain.

    Attributes
    ----------
    setting : dict
        The keyword arguments of the failed run.
    setting_index : int
        Index of the setting in :attr:`SweepResult.settings` order.
    seed : int
        The run's seed (one of ``seeds``).
    partial : SweepResult or None
        The runs that finished (``partial.missing`` lists the rest), so no
        finished work is lost.
    """

    def __init__(self, message: str, setting: dict[str, Any], setting_index: int,
                 seed: int, partial: SweepResult | None = None) -> None:
        super().__init__(message)
        self.setting = setting
        self.setting_index = setting_index
        self.seed = seed
        self.partial = partial

    def __reduce__(self) -> tuple[Any, ...]:
        return type(self), (str(self), self.setting, self.setting_index, self.seed,
                            self.partial)

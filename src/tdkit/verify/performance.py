r"""Statistical comparison of two agents over seeds.

:func:`compare_performance` trains a fresh agent of each kind on a fresh
environment for every seed, scores each run by its mean greedy return after
training, and compares the two samples of run scores:

* point estimates: mean and interquartile mean (IQM) of the run scores, each
  with a percentile bootstrap confidence interval (Agarwal et al. 2021);
* a two-sided Welch's t-test of the means;
* a verdict at the stated confidence ``c``: ``"better"`` or ``"worse"``
  (A compared with B) when the p-value is below ``1 - c``, else
  ``"no different"``.

Runs are independent, so they can run in parallel on any
:class:`concurrent.futures.Executor` (factories must then pickle: use
module-level functions or :func:`tdkit.verify.agent_factory`). They take the
one seed path of tdkit's runs (:func:`tdkit.sweep.derive_seeds`): A's run for
seed ``s`` is stream 0 of ``s`` and B's is stream 1, so A's runs are exactly
those of ``run_sweep(make_a, make_env, seeds=...)`` with the same budget, and
the two samples are independent (Welch's test assumes it). Both samples are
summarised by :func:`tdkit.stats.summarize_scores`, the summary of sweeps.

References
----------
.. [1] Agarwal, R., Schwarzer, M., Castro, P. S., Courville, A. & Bellemare,
   M. G. (2021). Deep Reinforcement Learning at the Edge of the Statistical
   Precipice. NeurIPS 34.
.. [2] Welch, B. L. (1947). Biometrika 34, 28-35.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from concurrent.futures import Executor
from dataclasses import dataclass
from typing import Any

import numpy as np

from .._validation import require_in_range, require_positive_int
from ..runs._dispatch import dispatch
from ..runs._one_run import require_callable, require_executor, require_seeds, seeded_run
from ..runs._results import SweepRunError
from ..stats import ScoreSummary, WelchResult, summarize_scores, welch_test

__all__ = ["AgentScores", "PerformanceComparison", "compare_performance", "run_score"]

AgentScores = ScoreSummary
"""The run scores of one agent: :class:`tdkit.stats.ScoreSummary` (former name)."""


@dataclass(frozen=True)
class PerformanceComparison:
    """Result of :func:`compare_performance`; ``verdict`` describes A relative to B."""

    a: AgentScores
    b: AgentScores
    welch: WelchResult
    confidence: float
    verdict: str
    seeds: tuple[int, ...]

    def __str__(self) -> str:
        lines = [f"performance over {len(self.seeds)} seeds (score: mean greedy return)"]
        for agent in (self.a, self.b):
            lines.append(f"  {agent.label}: mean {agent.mean}   IQM {agent.iqm}")
        w = self.welch
        lines.append(
            f"  Welch t = {w.statistic:.3g}, df = {w.df:.3g}, p = {w.p_value:.3g}; "
            f"A is {self.verdict}"
            + ("" if self.verdict == "no different" else " than B")
            + f" at {self.confidence:.0%} confidence"
        )
        return "\n".join(lines)


def run_score(
    make_agent: Callable[[Any, int], Any],
    make_env: Callable[[], Any],
    seed: int,
    episodes: int,
    eval_episodes: int,
    max_episode_steps: int | None,
    stream: int = 0,
) -> float:
    """Score of one run: train a fresh agent, return its mean greedy return.

    The run is the one of :func:`tdkit.sweep.derive_seeds` ``(seed, stream)``:
    the same as the run of a sweep's setting ``stream`` with that seed. Module
    level, so executors can pickle it.
    """
    _, _, returns = seeded_run(make_agent, make_env, seed, stream, episodes, None,
                               max_episode_steps, eval_episodes)
    return float(np.mean(returns))


def compare_performance(
    make_a: Callable[[Any, int], Any],
    make_b: Callable[[Any, int], Any],
    make_env: Callable[[], Any],
    seeds: Iterable[int] = range(10),
    *,
    episodes: int = 200,
    eval_episodes: int = 20,
    max_episode_steps: int | None = 1000,
    executor: Executor | None = None,
    confidence: float = 0.95,
    n_resamples: int = 2000,
    labels: tuple[str, str] = ("A", "B"),
) -> PerformanceComparison:
    """Compare two agent factories over seeds: means, IQMs, bootstrap CIs, Welch's test.

    For every seed, each factory builds an agent on a fresh ``make_env()``,
    which is trained for ``episodes`` episodes and scored by the mean return
    of ``eval_episodes`` greedy episodes (:func:`tdkit.evaluate`). A's run
    for a seed is stream 0 of the seed and B's stream 1
    (:func:`tdkit.sweep.derive_seeds`): independent samples, and A's runs
    are the runs a sweep of ``make_a`` gives for the same seeds.

    Parameters
    ----------
    make_a, make_b : callable
        ``make(env, seed) -> agent``.
    make_env : callable
        ``make_env() -> env`` (anything :func:`tdkit.train` accepts).
    seeds : iterable of int, default range(10)
        One run per seed and agent; at least 2 seeds.
    episodes : int, default 200
        Training episodes per run.
    eval_episodes : int, default 20
        Greedy evaluation episodes per run.
    max_episode_steps : int or None, default 1000
        Time limit for training (truncation) and evaluation episodes.
    executor : concurrent.futures.Executor, optional
        Runs the seeds in parallel (``executor.submit``); the factories must
        pickle for process pools. Results do not depend on the executor.
    confidence : float, default 0.95
        Confidence of the intervals and of the verdict.
    n_resamples : int, default 2000
        Bootstrap resamples.
    labels : (str, str)
        Names of A and B in the printed summary.

    Returns
    -------
    PerformanceComparison
        ``verdict`` is ``"better"``, ``"no different"`` or ``"worse"`` for
        A compared with B: ``"better"``/``"worse"`` when Welch's two-sided
        p-value is below ``1 - confidence``, in the direction of the mean
        difference.

    Raises
    ------
    InvalidParameterError
        On a non-callable factory, fewer than 2 seeds, or settings out of range.
    tdkit.sweep.SweepRunError
        When a run fails, naming the agent's label and the seed (the run's
        own exception is chained).
    """
    owner = "compare_performance"
    for name, value in (("make_a", make_a), ("make_b", make_b), ("make_env", make_env)):
        require_callable(owner, name, value)
    seed_list = require_seeds(owner, seeds, minimum=2, distinct=False)
    episodes = require_positive_int(owner, "episodes", episodes)
    eval_episodes = require_positive_int(owner, "eval_episodes", eval_episodes)
    if max_episode_steps is not None:
        max_episode_steps = require_positive_int(owner, "max_episode_steps", max_episode_steps)
    confidence = require_in_range(owner, "confidence", confidence, 0.0, 1.0,
                                low_open=True, high_open=True)
    n_resamples = require_positive_int(owner, "n_resamples", n_resamples)
    if executor is not None:
        require_executor(owner, executor, "submit")
    calls = [
        (make, make_env, seed, episodes, eval_episodes, max_episode_steps, stream)
        for stream, make in enumerate((make_a, make_b))
        for seed in seed_list
    ]
    outcomes = dispatch(run_score, calls, executor=executor, workers=1, stop_on_failure=True)
    for (_, _, seed, *_, stream), outcome in zip(calls, outcomes, strict=True):
        if outcome is not None and outcome.failure is not None:
            failure = outcome.failure
            raise SweepRunError(
                f"{owner}: the run of {labels[stream]} with seed {seed} failed: "
                f"{failure.error}. Run the factory on its own to debug it.",
                {"agent": labels[stream]}, stream, seed,
            ) from failure.exception()
    n = len(seed_list)
    summaries = [
        summarize_scores([outcome.value for outcome in outcomes[k * n:(k + 1) * n]],
                         label=label, confidence=confidence, n_resamples=n_resamples, seed=0)
        for k, label in enumerate(labels)
    ]
    a, b = summaries
    test = welch_test(a.scores, b.scores)
    if test.p_value < 1.0 - confidence:
        verdict = "better" if test.mean_difference > 0 else "worse"
    else:
        verdict = "no different"
    return PerformanceComparison(a, b, test, confidence, verdict, seed_list)

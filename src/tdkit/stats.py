r"""Statistics for comparing learners over seeds: means, IQM, bootstrap CIs, Welch's test.

Everything is plain numpy and the standard library; scipy is not needed (the
tests cross-check these functions against scipy).

* :func:`mean` and :func:`iqm` (interquartile mean) are the point estimates
  recommended by Agarwal et al. (2021) for scores over runs.
* :func:`bootstrap_ci` gives percentile bootstrap confidence intervals, and the
  *stratified* bootstrap of Agarwal et al. (2021) when scores come as a
  ``(runs, tasks)`` table (runs are resampled within each task);
  :func:`bootstrap_band` the same interval of a mean *curve* over runs, at
  every point (both draw their resamples through one function).
* :func:`summarize_scores` turns the scores of several runs into a
  :class:`ScoreSummary` (mean and IQM with intervals, standard deviation): the
  one summary type of sweeps and of agent comparisons.
* :func:`welch_test` is Welch's unequal-variance t-test; its p-value uses the
  Student-t distribution through the regularized incomplete beta function
  (:func:`betainc`).
* :func:`chi2_sf` (chi-square survival function, through the regularized
  incomplete gamma function :func:`gammaincc`) serves goodness-of-fit tests
  such as the verifier's tie-breaking check.

References
----------
.. [1] Agarwal, R., Schwarzer, M., Castro, P. S., Courville, A. & Bellemare,
   M. G. (2021). Deep Reinforcement Learning at the Edge of the Statistical
   Precipice. Advances in Neural Information Processing Systems 34.
.. [2] Welch, B. L. (1947). The generalization of "Student's" problem when
   several different population variances are involved. Biometrika 34, 28-35.
.. [3] Efron, B. & Tibshirani, R. J. (1993). An Introduction to the Bootstrap.
   Chapman & Hall. Chapter 13 (percentile intervals).
.. [4] NIST Digital Library of Mathematical Functions (DLMF), release 1.1.
   Eq. 8.17.22 (continued fraction of the incomplete beta function),
   Eq. 8.11.4 / 8.7.3 (series of the incomplete gamma function) and
   Eq. 8.9.2 (its continued fraction); Eq. 8.17.4 (symmetry).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._errors import InvalidParameterError
from ._seeding import SeedLike, as_generator
from ._validation import require_float_array, require_in_range, require_positive_int

__all__ = [
    # point estimates
    "mean",
    "iqm",
    # intervals and tests
    "ConfidenceInterval",
    "bootstrap_ci",
    "bootstrap_band",
    "ScoreSummary",
    "summarize_scores",
    "WelchResult",
    "welch_test",
    # distributions
    "betainc",
    "gammaincc",
    "student_t_sf",
    "student_t_isf",
    "chi2_sf",
]

_EPS = 1e-15
_TINY = 1e-300
_MAX_TERMS = 10_000


# ---------------------------------------------------------------- point estimates
def _scores(owner: str, scores: Any, *, min_size: int = 1) -> np.ndarray:
    array = require_float_array(owner, "scores", scores)
    if array.ndim == 0:
        array = array.reshape(1)
    if array.shape[0] < min_size or array.size == 0:
        raise InvalidParameterError(
            f"{owner}: need at least {min_size} score(s) along the first axis; got shape "
            f"{array.shape}."
        )
    if not np.isfinite(array).all():
        raise InvalidParameterError(
            f"{owner}: scores must be finite; got {array[~np.isfinite(array)][:3]!r} among them."
        )
    return array


def mean(scores: Any, axis: int | None = None) -> Any:
    """Arithmetic mean (over everything, or along ``axis``).

    Examples
    --------
    >>> mean([1.0, 2.0, 6.0])
    3.0
    """
    array = _scores("mean", scores)
    if axis is None:
        return float(array.mean())
    return array.mean(axis=axis)[()]


def _iqm_last_axis(values: np.ndarray) -> np.ndarray:
    """IQM along the last axis of a finite array (no validation; vectorised)."""
    n = values.shape[-1]
    ordered = np.sort(values, axis=-1)
    edges = np.arange(n + 1) / n
    overlap = np.clip(np.minimum(edges[1:], 0.75) - np.maximum(edges[:-1], 0.25), 0.0, None)
    return ordered @ (2.0 * overlap)


def iqm(scores: Any, axis: int | None = None) -> Any:
    r"""Interquartile mean: the mean of the middle 50% of the scores.

    Agarwal et al. (2021) recommend it as a robust aggregate of run scores: it
    discards the lowest and highest 25% and averages the rest. For a sample
    size ``n`` that is not a multiple of 4 the boundary scores count with the
    fraction of their probability mass inside the quartiles, i.e.

    .. math:: \mathrm{IQM} = 2 \int_{1/4}^{3/4} \hat F^{-1}(u)\, du,

    where :math:`\hat F^{-1}` is the empirical quantile function (step
    function with steps of width ``1/n``). For ``n`` divisible by 4 this is
    exactly the mean of the middle ``n / 2`` sorted scores.

    Parameters
    ----------
    scores : array_like
        Finite scores.
    axis : int, optional
        Axis along which to compute; default: over all scores.

    References
    ----------
    Agarwal et al. (2021), Section 4.2 ("Interquartile mean").

    Examples
    --------
    >>> iqm([0.0, 1.0, 2.0, 100.0])   # mean of the middle two
    1.5
    >>> iqm([1.0, 2.0, 3.0])          # weights 1/6, 2/3, 1/6
    2.0
    """
    array = _scores("iqm", scores)
    if axis is None:
        return float(_iqm_last_axis(array.ravel()))
    return _iqm_last_axis(np.moveaxis(array, axis, -1))[()]


_STATISTICS: dict[str, Callable[[np.ndarray], np.ndarray]] = {
    "mean": lambda x: x.mean(axis=-1),
    "iqm": _iqm_last_axis,
}


# ---------------------------------------------------------------- bootstrap
@dataclass(frozen=True)
class ConfidenceInterval:
    """A point estimate with a two-sided confidence interval."""

    estimate: float
    low: float
    high: float
    confidence: float

    def __str__(self) -> str:
        return (
            f"{self.estimate:.4g} [{self.low:.4g}, {self.high:.4g}] "
            f"({self.confidence:.0%} CI)"
        )


def bootstrap_ci(
    scores: Any,
    statistic: str | Callable[[np.ndarray], np.ndarray] = "mean",
    *,
    confidence: float = 0.95,
    n_resamples: int = 2000,
    seed: SeedLike = 0,
) -> ConfidenceInterval:
    r"""Percentile bootstrap confidence interval of ``statistic`` over runs.

    ``scores`` of shape ``(runs,)`` are resampled with replacement. Scores of
    shape ``(runs, tasks)`` use the **stratified bootstrap** of Agarwal et al.
    (2021): run indices are resampled independently within each task (column),
    and the statistic is computed over all resampled scores of all tasks. The
    interval is the ``(1 - c) / 2`` and ``(1 + c) / 2`` quantiles of the
    bootstrap distribution (percentile method, Efron & Tibshirani 1993,
    Chapter 13).

    Parameters
    ----------
    scores : array_like, shape (runs,) or (runs, tasks)
        Finite scores, at least 2 runs.
    statistic : {"mean", "iqm"} or callable
        A callable receives an array whose **last axis** holds one resampled
        set of scores and must reduce along that axis (like
        ``lambda x: x.mean(axis=-1)``).
    confidence : float, default 0.95
        In (0, 1).
    n_resamples : int, default 2000
    seed : int, Generator or None, default 0
        The interval is reproducible for a fixed seed.

    Returns
    -------
    ConfidenceInterval
        ``estimate`` is the statistic of the original scores.

    Raises
    ------
    InvalidParameterError
        On fewer than 2 runs, non-finite scores, an unknown statistic or a
        confidence outside (0, 1).

    References
    ----------
    Agarwal et al. (2021), Section 4.1 (stratified bootstrap confidence intervals).

    Examples
    --------
    >>> ci = bootstrap_ci([1.0, 2.0, 3.0, 4.0, 5.0], "mean", seed=0)
    >>> ci.estimate, ci.low <= 3.0 <= ci.high
    (3.0, True)
    """
    owner = "bootstrap_ci"
    array = _scores(owner, scores, min_size=2)
    if array.ndim > 2:
        raise InvalidParameterError(
            f"{owner}: scores must have shape (runs,) or (runs, tasks); got shape {array.shape}."
        )
    confidence = require_in_range(owner, "confidence", confidence, 0.0, 1.0,
                                low_open=True, high_open=True)
    n_resamples = require_positive_int(owner, "n_resamples", n_resamples)
    if isinstance(statistic, str):
        if statistic not in _STATISTICS:
            raise InvalidParameterError(
                f"{owner}: statistic must be 'mean', 'iqm' or a callable; got {statistic!r}."
            )
        stat = _STATISTICS[statistic]
    elif callable(statistic):
        stat = statistic
    else:
        raise InvalidParameterError(
            f"{owner}: statistic must be 'mean', 'iqm' or a callable; got {statistic!r}."
        )
    rng = as_generator(seed, owner=owner)
    table = array.reshape(array.shape[0], -1)  # (runs, tasks)
    runs, tasks = table.shape
    index = _resample_runs(rng, runs, n_resamples, tasks)
    resampled = np.take_along_axis(table[None, :, :], index, axis=1)
    distribution = np.asarray(stat(resampled.reshape(n_resamples, runs * tasks)), dtype=float)
    estimate = float(np.asarray(stat(table.reshape(1, -1)), dtype=float).reshape(-1)[0])
    low, high = _percentile_interval(distribution, confidence)
    return ConfidenceInterval(estimate, float(low), float(high), confidence)


def _resample_runs(rng: np.random.Generator, runs: int, n_resamples: int,
                   tasks: int) -> np.ndarray:
    """Run indices drawn with replacement: shape ``(n_resamples, runs, tasks)``.

    The one source of bootstrap draws (:func:`bootstrap_ci`, :func:`bootstrap_band`).
    """
    return rng.integers(0, runs, size=(n_resamples, runs, tasks))


def _percentile_interval(distribution: np.ndarray, confidence: float) -> np.ndarray:
    """The ``(1 - c) / 2`` and ``(1 + c) / 2`` quantiles along the first axis (Efron &
    Tibshirani 1993, Chapter 13)."""
    tail = (1.0 - confidence) / 2.0
    return np.quantile(distribution, [tail, 1.0 - tail], axis=0)


def bootstrap_band(
    curves: Any,
    *,
    confidence: float = 0.95,
    n_resamples: int = 2000,
    seed: SeedLike = 0,
) -> tuple[np.ndarray, np.ndarray]:
    r"""Percentile bootstrap band of the mean curve over runs, at every point.

    Each resample draws ``runs`` whole runs (rows) with replacement, as
    :func:`bootstrap_ci` does for scalar scores, and averages their curves;
    the band is the ``(1 - c) / 2`` and ``(1 + c) / 2`` quantiles of the
    resampled means at each point (Efron & Tibshirani 1993, Chapter 13).
    Resampling whole runs keeps the dependence between the points of a run.

    Parameters
    ----------
    curves : array_like, shape (runs, points)
        Finite values, at least 2 runs.
    confidence : float, default 0.95
    n_resamples : int, default 2000
    seed : int, Generator or None, default 0

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        Lower and upper bounds, each of shape ``(points,)``.

    Examples
    --------
    >>> low, high = bootstrap_band([[1.0, 1.0, 1.0], [3.0, 3.0, 3.0]], seed=0)
    >>> low.tolist(), high.tolist()   # resampled means are 1, 2 or 3
    ([1.0, 1.0, 1.0], [3.0, 3.0, 3.0])
    """
    owner = "bootstrap_band"
    table = _scores(owner, curves, min_size=2)
    if table.ndim != 2:
        raise InvalidParameterError(
            f"{owner}: curves must have shape (runs, points); got shape {table.shape}."
        )
    confidence = require_in_range(owner, "confidence", confidence, 0.0, 1.0,
                                low_open=True, high_open=True)
    n_resamples = require_positive_int(owner, "n_resamples", n_resamples)
    rng = as_generator(seed, owner=owner)
    runs = table.shape[0]
    index = _resample_runs(rng, runs, n_resamples, 1)[:, :, 0]
    weights = np.zeros((n_resamples, runs))
    np.add.at(weights, (np.arange(n_resamples)[:, None], index), 1.0 / runs)
    low, high = _percentile_interval(weights @ table, confidence)
    return low, high


# ---------------------------------------------------------------- summaries of run scores
@dataclass(frozen=True)
class ScoreSummary:
    """Scores of several runs of one agent or setting, and their summaries.

    ``mean`` and ``iqm`` carry percentile bootstrap intervals over runs
    (:func:`bootstrap_ci`); with a single run their bounds are NaN. ``std`` is
    the sample standard deviation (``ddof=1``; NaN for one run).

    Attributes
    ----------
    label : str
        What was run (an agent's name, or a sweep setting's label).
    scores : tuple of float
        One score per run.
    mean, iqm : ConfidenceInterval
    std : float
    setting_index : int or None
        For a sweep: the index of the setting.
    setting : dict or None
        For a sweep: the setting's keyword arguments.
    """

    label: str
    scores: tuple[float, ...]
    mean: ConfidenceInterval
    iqm: ConfidenceInterval
    std: float
    setting_index: int | None = None
    setting: dict[str, Any] | None = None

    @property
    def n_runs(self) -> int:
        """Number of runs summarised."""
        return len(self.scores)


def summarize_scores(
    scores: Any,
    *,
    label: str = "",
    confidence: float = 0.95,
    n_resamples: int = 2000,
    seed: SeedLike = 0,
    setting_index: int | None = None,
    setting: dict[str, Any] | None = None,
) -> ScoreSummary:
    """Mean and IQM of run scores with bootstrap intervals, and their standard deviation.

    Both intervals use the same ``seed`` (so the same resamples), as
    :meth:`tdkit.sweep.SweepResult.summary` and
    :func:`tdkit.verify.compare_performance` report them.

    Examples
    --------
    >>> s = summarize_scores([1.0, 2.0, 3.0, 10.0], label="A")
    >>> s.n_runs, s.mean.estimate, s.iqm.estimate
    (4, 4.0, 2.5)
    >>> import math
    >>> math.isnan(summarize_scores([5.0]).mean.low)
    True
    """
    owner = "summarize_scores"
    array = _scores(owner, scores).ravel()
    confidence = require_in_range(owner, "confidence", confidence, 0.0, 1.0,
                                low_open=True, high_open=True)
    if array.size >= 2:
        mean_ci, iqm_ci = (
            bootstrap_ci(array, stat, confidence=confidence, n_resamples=n_resamples, seed=seed)
            for stat in ("mean", "iqm")
        )
        std = float(array.std(ddof=1))
    else:
        value = float(array[0])
        mean_ci = iqm_ci = ConfidenceInterval(value, math.nan, math.nan, confidence)
        std = math.nan
    return ScoreSummary(label, tuple(float(x) for x in array), mean_ci, iqm_ci, std,
                        setting_index, None if setting is None else dict(setting))


# ---------------------------------------------------------------- special functions
def _beta_continued_fraction(a: float, b: float, x: float) -> float:
    """Continued fraction of DLMF 8.17.22, evaluated with the modified Lentz method."""
    c = 1.0
    d = 1.0 - (a + b) * x / (a + 1.0)
    d = 1.0 / (d if abs(d) > _TINY else _TINY)
    h = d
    for m in range(1, _MAX_TERMS):
        m2 = 2 * m
        for numerator in (
            m * (b - m) * x / ((a + m2 - 1.0) * (a + m2)),
            -(a + m) * (a + b + m) * x / ((a + m2) * (a + m2 + 1.0)),
        ):
            d = 1.0 + numerator * d
            d = 1.0 / (d if abs(d) > _TINY else _TINY)
            c = 1.0 + numerator / c
            c = c if abs(c) > _TINY else _TINY
            h *= d * c
        if abs(d * c - 1.0) < _EPS:
            return h
    raise ArithmeticError(  # pragma: no cover - the fraction converges for x < (a+1)/(a+b+2)
        f"betainc: continued fraction did not converge for a={a!r}, b={b!r}, x={x!r}."
    )


def betainc(a: float, b: float, x: float) -> float:
    r"""Regularized incomplete beta function :math:`I_x(a, b)`.

    Evaluated by the continued fraction of DLMF Eq. 8.17.22 when
    :math:`x < (a + 1)/(a + b + 2)` and through the symmetry
    :math:`I_x(a, b) = 1 - I_{1-x}(b, a)` (DLMF Eq. 8.17.4) otherwise.

    Examples
    --------
    >>> round(betainc(2.0, 3.0, 0.4), 12)   # 1 - 0.6**4 - 4*0.4*0.6**3 = 0.5248
    0.5248
    """
    if not (a > 0 and b > 0):
        raise InvalidParameterError(f"betainc: a and b must be > 0; got a={a!r}, b={b!r}.")
    if not 0.0 <= x <= 1.0:
        raise InvalidParameterError(f"betainc: x must be in [0, 1]; got {x!r}.")
    if x == 0.0 or x == 1.0:
        return x
    return _betainc(a, b, x, 1.0 - x)


def _betainc(a: float, b: float, x: float, y: float) -> float:
    """:math:`I_x(a, b)` with ``y = 1 - x`` given separately (exact when x is near 1)."""
    if y <= 0.0:
        return 1.0
    if x <= 0.0:
        return 0.0
    log_front = (
        math.lgamma(a + b) - math.lgamma(a) - math.lgamma(b) + a * math.log(x) + b * math.log(y)
    )
    if x < (a + 1.0) / (a + b + 2.0):
        return math.exp(log_front) * _beta_continued_fraction(a, b, x) / a
    return 1.0 - math.exp(log_front) * _beta_continued_fraction(b, a, y) / b


def gammaincc(a: float, x: float) -> float:
    r"""Regularized upper incomplete gamma function :math:`Q(a, x) = \Gamma(a, x)/\Gamma(a)`.

    Uses the power series of :math:`P(a, x) = 1 - Q(a, x)` (DLMF Eq. 8.7.3 /
    8.11.4) for :math:`x < a + 1` and Legendre's continued fraction (DLMF
    Eq. 8.9.2) otherwise.

    Examples
    --------
    >>> round(gammaincc(1.0, 2.0), 12) == round(math.exp(-2.0), 12)   # Q(1, x) = e^-x
    True
    """
    if not a > 0:
        raise InvalidParameterError(f"gammaincc: a must be > 0; got {a!r}.")
    if not x >= 0:
        raise InvalidParameterError(f"gammaincc: x must be >= 0; got {x!r}.")
    if x == 0.0:
        return 1.0
    if math.isinf(x):
        return 0.0
    log_front = a * math.log(x) - x - math.lgamma(a)
    if x < a + 1.0:
        term = total = 1.0 / a
        denominator = a
        for _ in range(_MAX_TERMS):
            denominator += 1.0
            term *= x / denominator
            total += term
            if abs(term) < abs(total) * _EPS:
                break
        return max(0.0, 1.0 - total * math.exp(log_front))
    # Continued fraction for Gamma(a, x) e^x x^-a, modified Lentz.
    b = x + 1.0 - a
    c = 1.0 / _TINY
    d = 1.0 / b
    h = d
    for i in range(1, _MAX_TERMS):
        an = -i * (i - a)
        b += 2.0
        d = an * d + b
        d = 1.0 / (d if abs(d) > _TINY else _TINY)
        c = b + an / c
        c = c if abs(c) > _TINY else _TINY
        h *= d * c
        if abs(d * c - 1.0) < _EPS:
            break
    return math.exp(log_front) * h


def student_t_sf(t: float, df: float) -> float:
    r"""Survival function :math:`P(T > t)` of Student's t with ``df`` degrees of freedom.

    :math:`P(T > t) = \tfrac12 I_{\nu/(\nu + t^2)}(\nu/2, 1/2)` for
    :math:`t \ge 0`, and ``1 - sf(-t)`` for ``t < 0``. ``df`` may be
    fractional (Welch's test).

    Examples
    --------
    >>> student_t_sf(0.0, 5)
    0.5
    >>> round(student_t_sf(1.0, 1), 12)   # Cauchy: 1/2 - arctan(1)/pi = 0.25
    0.25
    """
    if not df > 0:
        raise InvalidParameterError(f"student_t_sf: df must be > 0; got {df!r}.")
    if math.isnan(t):
        raise InvalidParameterError("student_t_sf: t is NaN.")
    if math.isinf(t):
        return 0.0 if t > 0 else 1.0
    t2 = t * t
    tail = 0.5 * _betainc(df / 2.0, 0.5, df / (df + t2), t2 / (df + t2))
    return tail if t >= 0 else 1.0 - tail


def student_t_isf(p: float, df: float) -> float:
    r"""Upper quantile of Student's t: the ``t >= 0`` with :math:`P(T > t) = p`, for ``p <= 1/2``.

    Found by bisection on :func:`student_t_sf` over ``[0, 1000]`` (widened by
    doubling when the quantile lies beyond; 200 halvings, so to the last bit of
    a float); a two-sided level ``q`` is ``p = q / 2``.

    Examples
    --------
    >>> round(student_t_isf(0.025, 9), 4)   # the familiar two-sided 95% value
    2.2622
    >>> round(student_t_isf(0.25, 1), 12)   # Cauchy: tan(pi/4)
    1.0
    """
    if not 0.0 < p <= 0.5:
        raise InvalidParameterError(f"student_t_isf: p must be in (0, 0.5]; got {p!r}.")
    if not df > 0:
        raise InvalidParameterError(f"student_t_isf: df must be > 0; got {df!r}.")
    low, high = 0.0, 1e3
    while student_t_sf(high, df) > p:  # heavy tails (df near 1, tiny p): widen first
        low, high = high, 2.0 * high
    for _ in range(200):
        mid = (low + high) / 2
        if student_t_sf(mid, df) > p:
            low = mid
        else:
            high = mid
    return high


def chi2_sf(x: float, df: float) -> float:
    r"""Survival function :math:`P(X > x)` of the chi-square distribution: :math:`Q(k/2, x/2)`.

    Examples
    --------
    >>> round(chi2_sf(2.0, 2), 12) == round(math.exp(-1.0), 12)   # df=2: e^(-x/2)
    True
    """
    if not df > 0:
        raise InvalidParameterError(f"chi2_sf: df must be > 0; got {df!r}.")
    if x <= 0:
        return 1.0
    return gammaincc(df / 2.0, x / 2.0)


# ---------------------------------------------------------------- Welch's test
@dataclass(frozen=True)
class WelchResult:
    """Result of :func:`welch_test` (``a`` minus ``b``)."""

    statistic: float
    """The t statistic; ``±inf`` when both samples are constant and their means differ."""
    df: float
    """Welch-Satterthwaite degrees of freedom."""
    p_value: float
    """Two-sided p-value."""
    mean_difference: float
    """``mean(a) - mean(b)``."""


def welch_test(a: Any, b: Any) -> WelchResult:
    r"""Welch's two-sample t-test (unequal variances), two-sided.

    .. math::
        t = \frac{\bar a - \bar b}{\sqrt{s_a^2/n_a + s_b^2/n_b}}, \qquad
        \nu = \frac{(s_a^2/n_a + s_b^2/n_b)^2}
                   {\frac{(s_a^2/n_a)^2}{n_a - 1} + \frac{(s_b^2/n_b)^2}{n_b - 1}}

    with sample variances :math:`s^2` (``ddof=1``) and p-value
    :math:`2\,P(T_\nu > |t|)`.

    When both samples are constant the statistic is undefined: the result is
    ``t = 0, p = 1`` if the means are equal, else ``t = ±inf, p = 0``; ``df``
    is then ``n_a + n_b - 2``.

    Parameters
    ----------
    a, b : array_like, 1-D
        At least 2 finite scores each.

    Returns
    -------
    WelchResult

    References
    ----------
    Welch (1947); Satterthwaite, F. E. (1946). An approximate distribution of
    estimates of variance components. Biometrics Bulletin 2, 110-114.

    Examples
    --------
    >>> r = welch_test([1.0, 2.0, 3.0, 4.0], [1.0, 2.0, 3.0, 4.0])
    >>> r.statistic, r.p_value
    (0.0, 1.0)
    """
    xa = _scores("welch_test", a, min_size=2).ravel()
    xb = _scores("welch_test", b, min_size=2).ravel()
    na, nb = xa.size, xb.size
    diff = float(xa.mean() - xb.mean())
    va = float(xa.var(ddof=1)) / na
    vb = float(xb.var(ddof=1)) / nb
    se2 = va + vb
    if se2 == 0.0:
        if diff == 0.0:
            return WelchResult(0.0, float(na + nb - 2), 1.0, 0.0)
        return WelchResult(math.copysign(math.inf, diff), float(na + nb - 2), 0.0, diff)
    t = diff / math.sqrt(se2)
    ra, rb = va / se2, vb / se2  # scale-free form: no underflow of se2 ** 2
    df = 1.0 / (ra * ra / (na - 1) + rb * rb / (nb - 1))
    p = min(1.0, 2.0 * student_t_sf(abs(t), df))
    return WelchResult(float(t), float(df), float(p), diff)

"""Argument validators (`require_*`) shared by every constructor; each names the parameter.

The `check_*` prefix is reserved for verifier checks (`tdkit.verify`).
"""

from __future__ import annotations

import difflib
import math
import numbers

import numpy as np

from ._errors import InvalidParameterError

__all__ = [
    "KEYWORD_ALIASES",
    "UnknownKeywordError",
    "require_float_array",
    "require_in_range",
    "require_probability_rows",
    "require_known_keywords",
    "require_positive_int",
    "require_real",
]


def require_real(owner: str, name: str, value: object) -> float:
    """Return ``value`` as a finite float or raise naming ``owner.name``."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise InvalidParameterError(
            f"{owner}: {name} must be a real number; got {value!r} of type "
            f"{type(value).__name__}."
        )
    value = float(value)
    if not math.isfinite(value):
        raise InvalidParameterError(f"{owner}: {name} must be finite; got {value!r}.")
    return value


def require_in_range(
    owner: str,
    name: str,
    value: object,
    low: float,
    high: float,
    *,
    low_open: bool = False,
    high_open: bool = False,
    hint: str = "",
) -> float:
    """Return ``value`` as float if it lies in the interval, else raise.

    The message has the shape "Owner: name must be in (0, 1]; got 1.5. hint".
    """
    x = require_real(owner, name, value)
    below = x <= low if low_open else x < low
    above = x >= high if high_open else x > high
    if below or above:
        interval = f"{'(' if low_open else '['}{low:g}, {high:g}{')' if high_open else ']'}"
        raise InvalidParameterError(
            f"{owner}: {name} must be in {interval}; got {value!r}." + (f" {hint}" if hint else "")
        )
    return x


def require_positive_int(owner: str, name: str, value: object, *, minimum: int = 1) -> int:
    """Return ``value`` as int if it is an integer >= ``minimum``, else raise."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < minimum:
        raise InvalidParameterError(
            f"{owner}: {name} must be an integer >= {minimum}; got {value!r}."
        )
    return int(value)


def require_float_array(
    owner: str,
    name: str,
    value: object,
    *,
    what: str = "an array of real numbers",
    ndim: int | None = None,
    copy: bool = False,
) -> np.ndarray:
    """Return ``value`` as a float64 array (a fresh copy with ``copy=True``), else raise.

    Raises naming ``owner.name`` when numpy cannot read ``value`` as floats,
    or when ``ndim`` is given and the array has another number of
    dimensions; the message has the shape "owner: name must be <what>; got
    <value>." Shapes and finiteness are the caller's to check.

    Examples
    --------
    >>> require_float_array("plot", "values", [[1, 2]], ndim=2)
    array([[1., 2.]])
    >>> try:  # doctest: +NORMALIZE_WHITESPACE
    ...     require_float_array("stats", "scores", ["a"])
    ... except ValueError as exc:
    ...     print(exc)
    stats: scores must be an array of real numbers; got ['a'] (could not convert string to
    float: 'a').
    """
    try:
        array = np.array(value, dtype=np.float64) if copy else np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InvalidParameterError(
            f"{owner}: {name} must be {what}; got {value!r:.80} ({exc})."
        ) from None
    if ndim is not None and array.ndim != ndim:
        raise InvalidParameterError(f"{owner}: {name} must be {what}; got {value!r:.80}.")
    return array


PROBABILITY_TOLERANCE = 1e-8
"""Allowed deviation of a probability row's sum from 1 (such rows are renormalised)."""


def require_probability_rows(
    owner: str,
    name: str,
    probs: np.ndarray,
    *,
    skip: np.ndarray | None = None,
    axes: tuple[str, ...] = (),
) -> np.ndarray:
    """Return the float array ``probs`` with its rows (last axis) renormalised, else raise.

    Every entry must be >= 0 and every row must sum to 1 within
    :data:`PROBABILITY_TOLERANCE`. ``skip`` (bool, along the first axis)
    marks rows that are neither checked nor changed (terminal states).
    ``axes`` names the axes in messages, e.g. ``("state", "action", "next
    state")``; the message names the first offending entry or row.

    Examples
    --------
    >>> require_probability_rows("solver", "policy", np.array([[0.5, 0.5 + 1e-9]]))
    array([[0.5, 0.5]])
    >>> try:  # doctest: +NORMALIZE_WHITESPACE
    ...     require_probability_rows("solver", "policy", np.array([[0.25, 0.75], [2.0, 2.0]]))
    ... except ValueError as exc:
    ...     print(exc)
    solver: policy[1, :] sums to 4.0; every row must sum to 1 (tolerance 1e-08). Normalise it,
    e.g. policy = policy / policy.sum(axis=-1, keepdims=True).
    """
    index = _first_true(probs < 0, skip)
    if index is not None:
        raise InvalidParameterError(
            f"{owner}: {name}{list(index)} = {float(probs[index])!r} is negative"
            f"{_named_index(axes, index)}; probabilities must be >= 0."
        )
    sums = probs.sum(axis=-1)
    row = _first_true(np.abs(sums - 1.0) > PROBABILITY_TOLERANCE, skip)
    if row is not None:
        raise InvalidParameterError(
            f"{owner}: {name}[{', '.join(map(str, row))}, :]{_named_index(axes, row)} sums to "
            f"{float(sums[row])!r}; every row must sum to 1 (tolerance "
            f"{PROBABILITY_TOLERANCE:g}). Normalise it, e.g. {name} = {name} / "
            f"{name}.sum(axis=-1, keepdims=True)."
        )
    if skip is not None:
        sums[skip] = 1.0
    return probs / sums[..., None]


def _first_true(bad: np.ndarray, skip: np.ndarray | None) -> tuple[int, ...] | None:
    """The index of the first True entry of ``bad`` outside the rows ``skip``, or None."""
    if skip is not None:
        bad[skip] = False
    return tuple(int(i) for i in np.argwhere(bad)[0]) if bad.any() else None


def _named_index(axes: tuple[str, ...], index: tuple[int, ...]) -> str:
    """`` (state 0, action 1)`` for ``axes=("state", "action")``, ``""`` without names."""
    if not axes:
        return ""
    return " (" + ", ".join(f"{axis} {i}" for axis, i in zip(axes, index, strict=False)) + ")"


class UnknownKeywordError(InvalidParameterError, TypeError):
    """A keyword argument the callee does not take (a TypeError, as Python's own, and a
    :class:`~tdkit.InvalidParameterError`)."""


#: Spellings users bring from elsewhere, and the name tdkit uses for them.
KEYWORD_ALIASES = {
    "alpha": "step_size",
    "lr": "step_size",
    "learning_rate": "step_size",
    "epsilon": "exploration",
    "eps": "exploration",
    "discount": "gamma",
    "discount_factor": "gamma",
    "lambda": "lam",
    "lambda_": "lam",
    "lmbda": "lam",
    "n_steps": "n",
    "random_state": "seed",
    "initial_q": "initial_value",
    "q_init": "initial_value",
}


def require_known_keywords(
    owner: str,
    given: dict[str, object],
    valid: tuple[str, ...],
    hints: dict[str, str] | None = None,
) -> None:
    """Raise :class:`UnknownKeywordError` naming the nearest valid keyword if ``given`` has others.

    The suggestion comes from ``hints`` (a sentence per known mistake), then
    :data:`KEYWORD_ALIASES`, then :func:`difflib.get_close_matches`.

    Examples
    --------
    >>> try:  # doctest: +NORMALIZE_WHITESPACE
    ...     require_known_keywords("Agent", {"alpha": 0.5}, ("gamma", "step_size"))
    ... except TypeError as exc:
    ...     print(exc)
    Agent got an unknown keyword alpha=0.5; did you mean step_size=0.5? Valid keywords: gamma,
    step_size.
    """
    for name, value in given.items():
        if name in valid:
            continue
        hint = (hints or {}).get(name)
        if hint is None:
            alias = KEYWORD_ALIASES.get(name)
            if alias is None or alias not in valid:
                close = difflib.get_close_matches(name, valid, n=1, cutoff=0.6)
                alias = close[0] if close else None
            hint = f"did you mean {alias}={value!r}?" if alias else "it takes no such parameter."
        raise UnknownKeywordError(
            f"{owner} got an unknown keyword {name}={value!r}; {hint} "
            f"Valid keywords: {', '.join(valid)}."
        )

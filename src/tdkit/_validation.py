"""Argument validators (`require_*`) shared by every constructor; each names the parameter.

The `check_*` prefix is reserved for verifier checks (`tdkit.verify`).
"""

from __future__ import annotations

import difflib
import math
import numbers

from ._errors import InvalidParameterError

__all__ = [
    "KEYWORD_ALIASES",
    "UnknownKeywordError",
    "require_in_range",
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

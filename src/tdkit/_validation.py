"""Argument validators (`require_*`) shared by every constructor; each names the parameter.

The `check_*` prefix is reserved for verifier checks (`tdkit.verify`).
"""

from __future__ import annotations

import math
import numbers

from ._errors import InvalidParameterError

__all__ = ["require_in_range", "require_positive_int", "require_real"]


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

"""Schedules for step sizes and exploration parameters.

A schedule maps the learner's step counter ``t`` (transitions observed so far)
and, for per-pair schedules, the visit count ``n(s, a)`` of the pair being
updated, to a value. Learners accept either a plain float (turned into
:class:`Constant`) or one of these objects.

References
----------
.. [1] Even-Dar, E. & Mansour, Y. (2003). Learning rates for Q-learning.
   Journal of Machine Learning Research 5, 1-25.
.. [2] Robbins, H. & Monro, S. (1951). A stochastic approximation method.
   Annals of Mathematical Statistics 22(3), 400-407.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from typing import Any

from ._errors import InvalidParameterError
from ._validation import require_in_range, require_positive_int, require_real

__all__ = [
    "Constant",
    "Exponential",
    "Linear",
    "Schedule",
    "VisitCount",
    "as_schedule",
    "schedule_from_description",
]


class Schedule(ABC):
    """Base class: ``value(step, visits)`` returns the parameter to use now."""

    #: True when the value depends on the visit count of the updated pair.
    per_visit: bool = False

    @abstractmethod
    def value(self, step: int, visits: int = 1) -> float:
        """Return the value at learner step ``step`` for a pair visited ``visits`` times."""

    @abstractmethod
    def bounds(self) -> tuple[float, float]:
        """Return the smallest and largest value the schedule can produce."""

    @abstractmethod
    def describe(self) -> dict[str, Any]:
        """Return a JSON-serialisable description ``{"kind": ..., **params}``."""

    def __repr__(self) -> str:
        params = {k: v for k, v in self.describe().items() if k != "kind"}
        inner = ", ".join(f"{k}={v!r}" for k, v in params.items())
        return f"{type(self).__name__}({inner})"

    def __eq__(self, other: object) -> bool:
        return type(self) is type(other) and self.describe() == other.describe()  # type: ignore[union-attr]

    def __hash__(self) -> int:
        return hash(tuple(sorted(self.describe().items())))


class Constant(Schedule):
    """The same value at every step.

    Examples
    --------
    >>> Constant(0.1).value(step=10_000)
    0.1
    """

    def __init__(self, value: float) -> None:
        self.constant = require_real("Constant", "value", value)

    def value(self, step: int, visits: int = 1) -> float:
        return self.constant

    def bounds(self) -> tuple[float, float]:
        return (self.constant, self.constant)

    def describe(self) -> dict[str, Any]:
        return {"kind": "constant", "value": self.constant}


class Linear(Schedule):
    r"""Linear interpolation from ``start`` to ``end`` over ``duration`` steps.

    .. math:: x_t = x_0 + (x_1 - x_0)\,\min(t / T, 1)

    Examples
    --------
    >>> sched = Linear(1.0, 0.1, duration=100)
    >>> sched.value(0), sched.value(50), sched.value(10_000)
    (1.0, 0.55, 0.1)
    """

    def __init__(self, start: float, end: float, duration: int) -> None:
        self.start = require_real("Linear", "start", start)
        self.end = require_real("Linear", "end", end)
        self.duration = require_positive_int("Linear", "duration", duration)

    def value(self, step: int, visits: int = 1) -> float:
        frac = step / self.duration
        if frac >= 1.0:
            return self.end
        return self.start + (self.end - self.start) * frac

    def bounds(self) -> tuple[float, float]:
        return (min(self.start, self.end), max(self.start, self.end))

    def describe(self) -> dict[str, Any]:
        return {"kind": "linear", "start": self.start, "end": self.end, "duration": self.duration}


class Exponential(Schedule):
    r"""Geometric decay with a floor.

    .. math:: x_t = \max(x_{\min},\; x_0\, d^{\,t})

    Examples
    --------
    >>> sched = Exponential(1.0, decay=0.5, minimum=0.1)
    >>> [sched.value(t) for t in range(5)]
    [1.0, 0.5, 0.25, 0.125, 0.1]
    """

    def __init__(self, start: float, decay: float, minimum: float = 0.0) -> None:
        self.start = require_real("Exponential", "start", start)
        self.decay = require_in_range("Exponential", "decay", decay, 0.0, 1.0, low_open=True)
        self.minimum = require_real("Exponential", "minimum", minimum)
        if self.minimum > self.start:
            raise InvalidParameterError(
                f"Exponential: minimum must not exceed start; got minimum={minimum!r} > "
                f"start={start!r}."
            )

    def value(self, step: int, visits: int = 1) -> float:
        decayed = self.start * self.decay**step  # underflows harmlessly to 0.0
        return decayed if decayed > self.minimum else self.minimum

    def bounds(self) -> tuple[float, float]:
        return (self.minimum, self.start)

    def describe(self) -> dict[str, Any]:
        return {
            "kind": "exponential",
            "start": self.start,
            "decay": self.decay,
            "minimum": self.minimum,
        }


class VisitCount(Schedule):
    r"""Per-pair step size :math:`\alpha = 1 / n(s, a)^{\omega}`.

    ``n(s, a)`` counts the updates of the pair, including the current one, so
    the first update of a pair uses :math:`\alpha = 1`. With
    :math:`\omega \in (1/2, 1]` the Robbins-Monro conditions hold and
    Q-learning converges with polynomial (:math:`\omega < 1`) rates [1]_.

    Parameters
    ----------
    power : float
        The exponent :math:`\omega` in (0, 1]. Values at or below 1/2 break
        the Robbins-Monro condition :math:`\sum \alpha^2 < \infty` [2]_.

    Examples
    --------
    >>> VisitCount(power=1.0).value(step=0, visits=4)
    0.25

    References
    ----------
    .. [1] Even-Dar, E. & Mansour, Y. (2003). Learning rates for Q-learning.
       Journal of Machine Learning Research 5, 1-25.
    .. [2] Robbins, H. & Monro, S. (1951). A stochastic approximation method.
    """

    per_visit = True

    def __init__(self, power: float = 0.8) -> None:
        self.power = require_in_range(
            "VisitCount", "power", power, 0.0, 1.0, low_open=True,
            hint="Use a value in (0.5, 1] for guaranteed convergence.",
        )

    def value(self, step: int, visits: int = 1) -> float:
        if visits <= 1:
            return 1.0
        return visits ** -self.power

    def bounds(self) -> tuple[float, float]:
        return (0.0, 1.0)

    def describe(self) -> dict[str, Any]:
        return {"kind": "visit_count", "power": self.power}


_KINDS: dict[str, type[Schedule]] = {
    "constant": Constant,
    "linear": Linear,
    "exponential": Exponential,
    "visit_count": VisitCount,
}


def schedule_from_description(description: dict[str, Any]) -> Schedule:
    """Rebuild a schedule from :meth:`Schedule.describe` output."""
    params = dict(description)
    kind = params.pop("kind", None)
    if kind not in _KINDS:
        raise InvalidParameterError(
            f"unknown schedule kind {kind!r}; expected one of {sorted(_KINDS)}."
        )
    return _KINDS[kind](**params)


def as_schedule(
    value: float | Schedule,
    *,
    owner: str,
    name: str,
    low: float,
    high: float,
    low_open: bool = False,
    hint: str = "",
) -> Schedule:
    """Turn a float or schedule into a schedule whose values lie in [low, high].

    ``low_open`` makes the lower end exclusive (as for a step size in (0, 1]).
    The check uses :meth:`Schedule.bounds`, so a bad schedule fails at
    construction, not an hour into training.
    """
    if isinstance(value, Schedule):
        lo, hi = value.bounds()
        if isinstance(value, VisitCount):
            lo = hi  # 1/n^w is positive for every finite n; its infimum 0 is never produced
        bad = (lo <= low if low_open else lo < low) or hi > high
        if bad:
            interval = f"{'(' if low_open else '['}{low:g}, {high:g}]"
            raise InvalidParameterError(
                f"{owner}: {name} schedule {value!r} produces values in [{lo:g}, {hi:g}], "
                f"outside {interval}." + (f" {hint}" if hint else "")
            )
        return value
    return Constant(
        require_in_range(owner, name, value, low, high, low_open=low_open, hint=hint)
    )

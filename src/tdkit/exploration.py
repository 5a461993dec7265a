r"""Exploration rules: how a learner turns action values into a behaviour.

Each rule answers three questions about the action values ``q`` of one state
(with an optional boolean ``mask`` of allowed actions):

* ``select``: which action to take now;
* ``probabilities``: the probability of each action under the rule;
* ``expected_value``: :math:`\sum_a \pi(a \mid s)\, q(a)`, the quantity an
  Expected SARSA target needs.

Masked actions get probability zero and are never selected. Greedy ties are
broken uniformly at random.

References
----------
.. [1] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
   Introduction, 2nd ed. MIT Press. Section 2.2 (epsilon-greedy), Section 2.7
   (UCB, Eq. 2.10), Section 2.8 / Eq. 13.2 (soft-max preferences).
.. [2] Auer, P., Cesa-Bianchi, N. & Fischer, P. (2002). Finite-time analysis of
   the multiarmed bandit problem. Machine Learning 47, 235-256.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from typing import Any, ClassVar

import numpy as np

from ._errors import InvalidParameterError
from ._greedy import greedy_action, masked_max, masked_mean, uniform_action
from ._validation import require_real
from .schedules import Constant, Schedule, as_schedule, schedule_from_description

__all__ = [
    "UCB", "EpsilonGreedy", "Exploration", "Softmax", "as_exploration",
    "exploration_from_description",
]


class Exploration(ABC):
    """Base class of exploration rules.

    ``step`` is the learner's step counter (for schedules); ``counts`` is the
    row of visit counts ``n(s, .)`` of the current state, passed only to rules
    that set :attr:`uses_counts` (UCB), so the others cost nothing for it.
    """

    #: Whether the rule reads the visit counts ``n(s, .)``.
    uses_counts: ClassVar[bool] = False

    @abstractmethod
    def select(
        self,
        values: np.ndarray,
        mask: np.ndarray | None,
        rng: np.random.Generator,
        *,
        step: int = 0,
        counts: np.ndarray | None = None,
    ) -> int:
        """Return the index of the action to take."""

    @abstractmethod
    def probabilities(
        self,
        values: np.ndarray,
        mask: np.ndarray | None,
        *,
        step: int = 0,
        counts: np.ndarray | None = None,
    ) -> np.ndarray:
        """Return the action probabilities, shape ``(n_actions,)``."""

    def expected_value(
        self,
        values: np.ndarray,
        mask: np.ndarray | None,
        *,
        step: int = 0,
        counts: np.ndarray | None = None,
    ) -> float:
        r"""Return :math:`\sum_a \pi(a)\, q(a)` under this rule."""
        probs = self.probabilities(values, mask, step=step, counts=counts)
        nz = probs > 0.0  # masked actions may hold -inf or junk; they carry no weight
        return float(probs[nz] @ values[nz])

    @abstractmethod
    def describe(self) -> dict[str, Any]:
        """JSON-serialisable description ``{"kind": ..., **params}``."""

    def __repr__(self) -> str:
        params = {k: v for k, v in self.describe().items() if k != "kind"}
        return f"{type(self).__name__}({', '.join(f'{k}={v!r}' for k, v in params.items())})"


def _greedy_probabilities(values: np.ndarray, mask: np.ndarray | None) -> np.ndarray:
    if mask is not None:
        values = np.where(mask, values, -np.inf)
    ties = values == values.max()
    return ties / ties.sum()


def _allowed_count(n: int, mask: np.ndarray | None) -> int:
    return n if mask is None else int(mask.sum())


class EpsilonGreedy(Exploration):
    r"""With probability :math:`\varepsilon` a uniformly random allowed action, else greedy.

    .. math::
        \pi(a \mid s) = \frac{\varepsilon}{|\mathcal A(s)|}
        + (1 - \varepsilon)\,\frac{[a \in \arg\max_b Q(s,b)]}{|\arg\max_b Q(s,b)|}

    Parameters
    ----------
    epsilon : float or Schedule
        Exploration probability in [0, 1], or a schedule over learner steps.

    Examples
    --------
    >>> import numpy as np
    >>> EpsilonGreedy(0.2).probabilities(np.array([1.0, 3.0, 3.0, 0.0]), None)
    array([0.05, 0.45, 0.45, 0.05])
    """

    def __init__(self, epsilon: float | Schedule = 0.1) -> None:
        self.epsilon = as_schedule(
            epsilon, owner="EpsilonGreedy", name="epsilon", low=0.0, high=1.0
        )
        self._fixed = self.epsilon.constant if isinstance(self.epsilon, Constant) else None

    def current(self, step: int) -> float:
        """The exploration probability at learner step ``step``."""
        return self._fixed if self._fixed is not None else self.epsilon.value(step)

    def select(self, values, mask, rng, *, step=0, counts=None):
        eps = self._fixed if self._fixed is not None else self.epsilon.value(step)
        if eps > 0.0 and rng.random() < eps:
            return uniform_action(values.shape[0], mask, rng)
        return greedy_action(values, mask, rng)

    def probabilities(self, values, mask, *, step=0, counts=None):
        eps = self.current(step)
        n = values.shape[0]
        base = np.full(n, eps / _allowed_count(n, mask))
        if mask is not None:
            base[~mask] = 0.0
        return base + (1.0 - eps) * _greedy_probabilities(values, mask)

    def expected_value(self, values, mask, *, step=0, counts=None):
        # Closed form: tied greedy actions share one value, so the greedy part is the max.
        eps = self.current(step)
        top = masked_max(values, mask)
        if eps == 0.0:
            return top
        return eps * masked_mean(values, mask) + (1.0 - eps) * top

    def describe(self) -> dict[str, Any]:
        return {"kind": "epsilon_greedy", "epsilon": self.epsilon.describe()}


class Softmax(Exploration):
    r"""Boltzmann exploration: :math:`\pi(a) \propto \exp(Q(s,a)/\tau)` over allowed actions.

    Parameters
    ----------
    temperature : float or Schedule
        :math:`\tau > 0`. Small values approach greedy, large values uniform.

    Examples
    --------
    >>> import numpy as np
    >>> Softmax(1.0).probabilities(np.array([0.0, np.log(3.0)]), None)
    array([0.25, 0.75])
    """

    def __init__(self, temperature: float | Schedule = 1.0) -> None:
        self.temperature = as_schedule(
            temperature, owner="Softmax", name="temperature", low=0.0, high=math.inf,
            low_open=True,
        )

    def probabilities(self, values, mask, *, step=0, counts=None):
        tau = self.temperature.value(step)
        logits = values / tau
        if mask is not None:
            logits = np.where(mask, logits, -np.inf)
        logits = logits - logits.max()  # stable: the largest logit becomes 0
        weights = np.exp(logits)
        return weights / weights.sum()

    def select(self, values, mask, rng, *, step=0, counts=None):
        probs = self.probabilities(values, mask, step=step)
        cumulative = np.cumsum(probs)
        idx = int(np.searchsorted(cumulative, rng.random() * cumulative[-1], side="right"))
        idx = min(idx, probs.shape[0] - 1)
        while probs[idx] == 0.0:  # never land on a masked / zero-probability action
            idx -= 1
        return idx

    def describe(self) -> dict[str, Any]:
        return {"kind": "softmax", "temperature": self.temperature.describe()}


class UCB(Exploration):
    r"""Upper-confidence-bound action choice per state.

    .. math::
        a = \arg\max_a \Big[ Q(s,a) + c \sqrt{\ln N(s) / N(s,a)} \Big],
        \qquad N(s) = \sum_b N(s,b)

    Untried allowed actions (:math:`N(s,a) = 0`) are taken first, uniformly at
    random among them. The bonus follows Sutton & Barto (2018), Eq. 2.10,
    applied per state; the bound comes from Auer et al. (2002).

    Parameters
    ----------
    c : float
        Exploration weight, ``c >= 0`` (``c = 0`` is greedy).
    """

    uses_counts: ClassVar[bool] = True

    def __init__(self, c: float = 2.0) -> None:
        self.c = require_real("UCB", "c", c)
        if self.c < 0:
            raise InvalidParameterError(f"UCB: c must be >= 0; got {c!r}.")

    def _scores(self, values: np.ndarray, counts: np.ndarray | None) -> np.ndarray:
        if counts is None:
            raise InvalidParameterError(
                "UCB needs the visit counts of the state; this learner did not pass them."
            )
        total = counts.sum()
        with np.errstate(divide="ignore", invalid="ignore"):
            bonus = self.c * np.sqrt(np.log(max(total, 1)) / counts)
        return np.where(counts == 0, np.inf, values + bonus)

    def select(self, values, mask, rng, *, step=0, counts=None):
        return greedy_action(self._scores(values, counts), mask, rng)

    def probabilities(self, values, mask, *, step=0, counts=None):
        return _greedy_probabilities(self._scores(values, counts), mask)

    def describe(self) -> dict[str, Any]:
        return {"kind": "ucb", "c": self.c}


def as_exploration(value: float | Schedule | Exploration, *, owner: str) -> Exploration:
    """Turn a float or schedule (epsilon) or an exploration object into an :class:`Exploration`."""
    if isinstance(value, Exploration):
        return value
    if isinstance(value, Schedule) or isinstance(value, (int, float)):
        try:
            return EpsilonGreedy(value)
        except InvalidParameterError as exc:
            raise InvalidParameterError(
                f"{owner}: exploration (epsilon) must be in [0, 1]; got {value!r}. "
                "Use a float, a schedule, or an object from tdkit.exploration."
            ) from exc
    raise InvalidParameterError(
        f"{owner}: exploration must be a float epsilon, a schedule or an Exploration object "
        f"from tdkit.exploration; got {value!r}."
    )


def exploration_from_description(description: dict[str, Any]) -> Exploration:
    """Rebuild an exploration rule from :meth:`Exploration.describe` output."""
    kind = description.get("kind")
    if kind == "epsilon_greedy":
        return EpsilonGreedy(schedule_from_description(description["epsilon"]))
    if kind == "softmax":
        return Softmax(schedule_from_description(description["temperature"]))
    if kind == "ucb":
        return UCB(description["c"])
    raise InvalidParameterError(f"unknown exploration kind {kind!r}.")

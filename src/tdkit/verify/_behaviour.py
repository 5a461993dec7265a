r"""What an agent's behaviour and one-step targets show while it trains.

Two checks need to know whether an agent's estimates should match the optimum
or the values of its own exploring policy: ``convergence`` (discounted
values, :func:`tdkit.verify.checks.check_convergence`) and ``average_reward``
(the gain, :mod:`tdkit.verify._average_checks`). Both read the same two
things from the protocol alone, with :class:`BehaviourReading`:

* **The exploration rate actually shown**: the share of actions that are not
  greedy by the agent's own ``q_values`` just before ``act``. An ε-greedy
  rule picks a non-greedy action with probability :math:`\varepsilon (1 -
  g/n)` (``g`` greedy among ``n`` actions), so :math:`\hat\varepsilon = k /
  \sum (1 - g/n)`, with a Wilson score interval on ``k`` (Wilson 1927,
  JASA 22) at the two-sided 99.9% level (``EXPLORATION_Z``). The checks
  accept anything between the fixed points of the interval's ends, and an
  interval that misses the true rate (probability 1e-3) does not by itself
  fail a correct agent: the target then moves by the change of the fixed
  point between the true rate and the nearer end, a fraction of the margin
  (on the 4x4 gridworld values move by at most about 3 per unit of ε, so by
  about 0.05 for an end 0.015 away, against margins of at least 0.15). An
  agent that commits its next action before its update (SARSA) can show a
  few more non-greedy actions than its ε where values are nearly tied, which
  only widens what is accepted.
* **Whether targets follow the behaviour (on-policy)**: after an update that
  returns one TD error :math:`\delta` and changes only :math:`Q(s, a)`, the
  bootstrap value is :math:`b = (Q(s, a) + \delta - (R - c)) / \gamma`, with
  ``Q`` as ``q_values`` reported it before the update and :math:`c` the
  reward baseline the target subtracts (0 for discounted agents; the
  average reward :math:`\bar R` read before the update for differential
  agents, with :math:`\gamma = 1`; Sutton & Barto 2018, Section 10.3). A
  bootstrap on the row's maximum is off-policy evidence; one on a
  non-greedy entry that ``act`` then takes (a sampled next action), or on a
  consistent ε-mixture of the row (an expectation under the exploring
  policy), is on-policy evidence.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from ._driver import read_row

__all__ = ["EXPLORATION_Z", "BehaviourReading", "bootstrap_value", "match_tolerance"]

EXPLORATION_Z = 3.29
"""Normal quantile of the exploration-rate interval (two-sided 99.9%)."""


def bootstrap_value(q_sa: float, error: float, reward: float, gamma: float,
                    baseline: float = 0.0) -> float:
    r"""The bootstrap a one-step target used: :math:`b = (Q(s, a) + \delta - (R - c)) / \gamma`.

    ``q_sa`` is :math:`Q(s, a)` before the update and ``error`` the TD error
    :math:`\delta` the update returned, so :math:`Q(s, a) + \delta` is the
    target :math:`R - c + \gamma b`; ``baseline`` is :math:`c` (0, or the
    average reward of a differential agent).
    """
    return (q_sa + error - (reward - baseline)) / gamma


def match_tolerance(row: Sequence[float], boot: float) -> float:
    """How close an entry of ``row`` must be to ``boot`` to count as the one bootstrapped on.

    1e-9 relative to the magnitudes involved: a decode from a TD error is exact
    up to a few roundings, and distinct values of a learning agent differ by far more.
    NaN when ``row`` holds a NaN (as numpy's ``max`` gives it), so nothing matches.
    """
    return 1e-9 * (1.0 + _largest_magnitude(row) + abs(boot))


def _has_nan(row: Sequence[float]) -> bool:
    return any(v != v for v in row)


def _largest_magnitude(row: Sequence[float]) -> float:
    """``float(np.abs(row).max())`` for a short row, without numpy: NaN if any entry is NaN."""
    return math.nan if _has_nan(row) else float(max(map(abs, row)))


class BehaviourReading:
    """Exploration shown and the kind of one-step targets, read step by step.

    The owner (a :class:`~tdkit.verify._driver.Watcher`) calls the three
    methods for the steps it wants read; the agent must have ``q_values``.

    Parameters
    ----------
    agent : object
        The agent being trained.
    gamma : float
        Discount of the targets (1 for average-reward agents).
    baseline : callable, optional
        Returns the reward baseline :math:`c` the agent's target subtracts,
        read before each ``observe`` (``lambda: agent.average_reward`` for a
        differential agent); None for 0.
    """

    def __init__(self, agent: Any, gamma: float,
                 baseline: Callable[[], float] | None = None) -> None:
        self.agent = agent
        self.gamma = gamma
        self.baseline = baseline
        self.non_greedy = 0
        self.acts = 0
        self.share = 0.0
        self.greedy_targets = 0
        self.sampled_targets = 0
        self.expected_targets = 0
        self._implied: float | None = None
        self._rows: tuple[list[float], list[float], float] | None = None
        self._expect: tuple[int, int] | None = None

    # The rows are read as lists of Python floats: the per-step reading costs a few
    # list operations instead of a dozen numpy calls on a 4-entry array, with the
    # same numbers (the same IEEE operations; numpy's NaN rules kept where they
    # matter, and the one mean still taken by numpy).

    def after_act(self, obs: Any, action: Any) -> None:
        """Count a greedy or non-greedy action; confirm a sampled next action."""
        if self._expect is not None:
            # a bootstrap on a non-greedy entry counts as on-policy when act then takes it
            if self._expect == (int(obs), int(action)):
                self.sampled_targets += 1
            self._expect = None
        row = read_row(self.agent, obs).tolist()
        top = math.nan if _has_nan(row) else max(row)
        cut = top - 1e-12 * (1.0 + abs(top))  # NaN (nothing greedy) when top is NaN or inf
        self.acts += 1
        self.share += 1.0 - sum(v >= cut for v in row) / len(row)
        if not row[int(action)] >= cut:
            self.non_greedy += 1

    def before_observe(self, transition: tuple) -> None:
        """Keep the rows (and the baseline) a one-step target of ``transition`` reads."""
        self._rows = None
        obs, _, _, next_obs, terminated, truncated, _ = transition
        if not (terminated or truncated):
            offset = 0.0 if self.baseline is None else float(self.baseline())
            self._rows = (read_row(self.agent, obs).tolist(),
                          read_row(self.agent, next_obs).tolist(), offset)

    def after_update(self, transition: tuple, errors: tuple) -> None:
        """Read what the update's target bootstrapped on, if it was one one-step update."""
        if self._rows is None or len(errors) != 1:
            return
        obs, action, reward, next_obs = transition[:4]
        row, row2, offset = self._rows
        after = read_row(self.agent, obs).tolist()
        a = int(action)
        if len(after) != len(row):  # a row that changed length says nothing about a target
            return
        changed = [i for i, (new, old) in enumerate(zip(after, row, strict=True)) if new != old]
        if changed != [a] or self.gamma == 0:
            return
        boot = bootstrap_value(row[a], errors[0], float(reward), self.gamma, offset)
        tol = match_tolerance(row2, boot)
        if tol != tol:  # a NaN in the row or the bootstrap: nothing can be read
            return
        top, low = max(row2), min(row2)
        if abs(boot - top) <= tol:
            self.greedy_targets += 1
        elif low < top and (near := [i for i, v in enumerate(row2) if abs(v - boot) <= tol]):
            self._expect = (int(next_obs), near[0])
        elif low - tol <= boot < top:
            spread = top - float(np.mean(row2))
            if spread > 1e-6:
                implied = float((top - boot) / spread)
                if self._implied is not None and abs(implied - self._implied) <= 1e-6:
                    self.expected_targets += 1
                self._implied = implied

    @property
    def policy_kind(self) -> str:
        """``"on-policy"``, ``"off-policy"`` or ``"undetermined"`` (no target read)."""
        if self.sampled_targets or self.expected_targets:
            return "on-policy"
        if self.greedy_targets:
            return "off-policy"
        return "undetermined"

    def exploration(self) -> tuple[float, float, float] | None:
        """(low, estimate, high) of the exploration rate, or None when not measured."""
        if self.acts == 0 or self.share <= 0:
            return None
        n, k, z = self.acts, self.non_greedy, EXPLORATION_Z
        p = k / n
        centre = (p + z * z / (2 * n)) / (1 + z * z / n)
        half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / (1 + z * z / n)
        per_act = self.share / n

        def clip(x: float) -> float:
            return float(min(1.0, max(0.0, x / per_act)))

        return clip(centre - half), clip(p), clip(centre + half)

"""Acting with a given policy and learning a state-value table: the base of the prediction
learners (:class:`~tdkit.TD0`, :class:`~tdkit.TDLambda`, :class:`~tdkit.DifferentialTD`).

The values live in a ``(n_states, 1)`` table, so the shared TD step of
:class:`~tdkit.agent.TabularAgent` serves them unchanged.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, ClassVar

import numpy as np

from .._errors import InvalidParameterError
from .._seeding import SeedLike
from ..agent import TabularAgent
from ..schedules import Schedule
from ..tables import InitialValue, initial_values, read_only, require_capacity

__all__ = ["PolicyLearner"]

_ROW_ATOL = 1e-8
"""Allowed deviation of a policy row's sum from 1."""


class PolicyLearner(TabularAgent):
    """Acting with a given policy and a state-value table (shared by TD0 and TDLambda)."""

    _saved_state: ClassVar[tuple[tuple[str, str], ...]] = (
        ("_q", "state_values"), ("_visits", "state_counts"),
    )
    _keyword_hints: ClassVar[dict[str, str]] = {
        "exploration": "prediction learners do not explore: they act with the given policy "
        "(pass policy=..., an (n_states, n_actions) probability table or a callable).",
    }

    def __init__(
        self,
        n_states: int,
        n_actions: int,
        *,
        policy: Any,
        gamma: float = 0.99,
        step_size: float | Schedule = 0.1,
        initial_value: InitialValue = 0.0,
        seed: SeedLike = None,
        state_encoder: Any = None,
        action_encoder: Any = None,
    ) -> None:
        TabularAgent.__init__(
            self, n_states, n_actions, gamma=gamma, step_size=step_size, exploration=0.0,
            initial_value=initial_value, seed=seed, state_encoder=state_encoder,
            action_encoder=action_encoder,
        )
        self._start_policy(policy)

    def _start_policy(self, policy: Any) -> None:
        self.policy = policy
        self._policy_cum, self._policy_fn = self._require_policy(policy)

    def _require_policy(self, policy: Any) -> tuple[np.ndarray | None, Callable | None]:
        name = type(self).__name__
        if callable(policy) and not isinstance(policy, np.ndarray):
            return None, policy
        try:
            table = np.array(policy, dtype=np.float64)
        except (TypeError, ValueError):
            table = None
        if table is None or table.ndim != 2:
            raise InvalidParameterError(
                f"{name}: policy must be an (n_states, n_actions) probability table or a "
                f"callable obs -> action; got {policy!r:.80}."
            )
        shape = (self.n_states, self.n_actions)
        if table.shape != shape:
            raise InvalidParameterError(
                f"{name}: policy table must have shape (n_states, n_actions) = {shape}; got "
                f"shape {table.shape}. Pass one row of action probabilities per state."
            )
        bad = ~np.isfinite(table) | (table < 0)
        if bad.any():
            s, a = (int(i) for i in np.argwhere(bad)[0])
            raise InvalidParameterError(
                f"{name}: policy[{s}, {a}] = {table[s, a]!r}; probabilities must be finite and "
                ">= 0."
            )
        sums = table.sum(axis=1)
        off = np.abs(sums - 1.0) > _ROW_ATOL
        if off.any():
            s = int(np.flatnonzero(off)[0])
            raise InvalidParameterError(
                f"{name}: policy row {s} sums to {sums[s]!r}; every row must sum to 1 "
                f"(within {_ROW_ATOL:g}). Normalise the table, e.g. policy / policy.sum(1, "
                "keepdims=True)."
            )
        return np.cumsum(table / sums[:, None], axis=1), None

    # ------------------------------------------------------------------ tables
    def _init_tables(self, initial_value: InitialValue) -> None:
        owner = type(self).__name__
        # values and counts, and the row cache's slot per state
        require_capacity(owner, (self.n_states, 1), 16, bytes_per_row=8)
        self._q = initial_values((self.n_states, 1), initial_value, self._rng, owner=owner)
        self._visits = np.zeros((self.n_states, 1), dtype=np.int64)

    @property
    def values_table(self) -> np.ndarray:
        """The state values :math:`V`, shape ``(n_states,)`` (read-only view)."""
        return read_only(self._values[:, 0])

    v = values_table
    table = values_table

    @property
    def visits(self) -> np.ndarray:
        """Update counts ``n(s)``, shape ``(n_states,)`` (read-only view)."""
        return read_only(self._visits[:, 0])

    def values(self, obs: Any) -> float:
        """The estimated value :math:`V(s)` of ``obs``."""
        return float(self._values[self._encode(obs), 0])

    def q_values(self, obs: Any) -> np.ndarray:
        """Not available: prediction learners estimate state values (use :meth:`values`)."""
        raise NotImplementedError(
            f"{type(self).__name__} learns state values, not action values; use "
            "values(obs) or values_table."
        )

    # ------------------------------------------------------------------ learning
    def _next_value(
        self, s2: int, next_mask: np.ndarray | None, terminated: bool, truncated: bool
    ) -> float:
        r"""The bootstrap value :math:`V(S_{t+1})` of TD(0) and TD(λ) (0 after ``terminated``)."""
        return 0.0 if terminated else (self._rows[s2] or self._load_row(s2))[0]

    # ------------------------------------------------------------------ acting
    def act(self, obs: Any, *, mask: Any = None, explore: bool = True) -> Any:
        """An action drawn from the given policy (``explore`` is ignored)."""
        if mask is not None:
            mask = self._sets.get(mask).mask
        if self._policy_fn is not None:
            action = self._policy_fn(obs)
            if mask is not None and not mask[self._action_index(action)]:
                raise InvalidParameterError(
                    f"{type(self).__name__}: the policy returned action {action!r}, which the "
                    f"mask {mask!r} forbids in state {obs!r}; make the policy respect masks."
                )
            return action
        return self._env_action(self._choose(self._encode(obs), mask, True))

    def _choose(self, s: int, mask: np.ndarray | None, explore: bool) -> int:
        cum = self._policy_cum[s]  # type: ignore[index]
        if mask is None:
            # u < cum[-1], so the first cum > u has positive probability.
            a = int(cum.searchsorted(self._rng.random() * cum[-1], side="right"))
            return min(a, self.n_actions - 1)
        probs = np.diff(cum, prepend=0.0) * mask
        total = probs.sum()
        if total <= 0.0:
            raise InvalidParameterError(
                f"{type(self).__name__}: the policy gives probability 0 to every action the "
                f"mask {mask!r} allows in state {s}; the policy table must put mass on "
                "allowed actions."
            )
        cum = np.cumsum(probs)
        a = min(int(cum.searchsorted(self._rng.random() * total, side="right")),
                self.n_actions - 1)
        while probs[a] == 0.0:
            a -= 1
        return a

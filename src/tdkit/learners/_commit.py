r"""Committing the next action: the one place SARSA-family learners pick :math:`A_{t+1}`.

An on-policy target such as :math:`R_{t+1} + \gamma Q(S_{t+1}, A_{t+1})` is
only right when :math:`A_{t+1}` is the action the agent really takes next.
:class:`CommitsNextAction` guarantees it for any
:class:`~tdkit.agent.TabularAgent` subclass:

* If :meth:`update` runs first (the order :func:`tdkit.train` uses), the
  learner draws :math:`A_{t+1}` from its behaviour policy while learning and
  *commits* to it: the next ``act(next_obs)`` (with ``explore=True``) returns
  that same action. A mask that forbids it, or an ``act`` for another state,
  drops the commitment and a fresh action is drawn.
* If ``act(next_obs)`` runs before :meth:`update`, the update uses the action
  ``act`` returned.
* At the end of an episode nothing is committed: after ``terminated`` no next
  action exists, and after ``truncated`` the bootstrap action is drawn but not
  committed (the next ``act`` belongs to a new episode).
"""

from __future__ import annotations

from typing import Any, ClassVar

import numpy as np

from ._targets import sampled_value

__all__ = ["CommitsNextAction"]


class CommitsNextAction:
    """Mixin for :class:`~tdkit.agent.TabularAgent` subclasses whose target uses :math:`A_{t+1}`.

    Put it first in the bases (``class Sarsa(CommitsNextAction, TabularAgent)``).
    Subclasses call :meth:`_next_action` when a transition does not terminate
    and :meth:`_drop_next_action` when it does, or use :meth:`_next_value`,
    which does both.
    """

    #: ``(state, action, returned_by_act)`` or None. ``returned_by_act`` is
    #: True when ``act`` ran before ``update`` (the update must use this action)
    #: and False when ``update`` drew it (the next ``act`` must return it).
    _committed: tuple[int, int, bool] | None = None

    _saved_state: ClassVar[tuple[tuple[str, str], ...]] = (("_committed", "commitment"),)

    def act(self, obs: Any, *, mask: Any = None, explore: bool = True) -> Any:
        """Choose an action; with ``explore=True`` return the committed one when it applies."""
        s = self._encode(obs)  # type: ignore[attr-defined]
        if mask is not None:
            mask = self._sets.get(mask).mask  # type: ignore[attr-defined]
        if not explore:
            return self._env_action(self._choose(s, mask, False))  # type: ignore[attr-defined]
        committed = self._committed
        if committed is not None and not committed[2]:
            self._committed = None
            cs, ca, _ = committed
            if cs == s and (mask is None or mask[ca]):
                return self._env_action(ca)  # type: ignore[attr-defined]
        a = self._choose(s, mask, True)  # type: ignore[attr-defined]
        pending = self._pending  # type: ignore[attr-defined]
        if pending:
            last = pending[-1]
            if last[3] == s and not (last[4] or last[5]):
                self._committed = (s, a, True)  # act came first: update must use this action
        return self._env_action(a)  # type: ignore[attr-defined]

    def _next_action(self, s2: int, next_mask: np.ndarray | None, truncated: bool) -> int:
        """:math:`A_{t+1}` for a transition into ``s2`` that did not terminate.

        Uses the action ``act`` already returned for ``s2`` if any; otherwise
        draws one from the behaviour policy and commits to it unless the
        episode was truncated.
        """
        committed = self._committed
        if committed is not None and committed[2]:
            if committed[0] == s2:
                self._committed = None
                return committed[1]
            # An act-first commitment for another state belongs to a later pending
            # transition of the same update(); keep it and draw for this one.
            return self._choose(s2, next_mask, True)  # type: ignore[attr-defined]
        a2 = self._choose(s2, next_mask, True)  # type: ignore[attr-defined]
        self._committed = None if truncated else (s2, a2, False)
        return a2

    def _next_value(
        self, s2: int, next_mask: np.ndarray | None, terminated: bool, truncated: bool
    ) -> float:
        r""":math:`Q(S_{t+1}, A_{t+1})` with :math:`A_{t+1}` from :meth:`_next_action`.

        The bootstrap hook of the trace and differential learners; after
        ``terminated`` it drops any commitment and returns 0.
        """
        if terminated:
            self._drop_next_action()
            return 0.0
        row = self._row(s2)  # type: ignore[attr-defined]
        return sampled_value(row, self._next_action(s2, next_mask, truncated))

    def _drop_next_action(self) -> None:
        """Forget any commitment (the episode terminated)."""
        self._committed = None

    def _end_episode(self) -> None:
        self._committed = None
        super()._end_episode()  # type: ignore[misc]

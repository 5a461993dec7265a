r"""n-step TD control: n-step SARSA (on- and off-policy) and n-step Tree Backup.

Both learners keep the last ``n`` steps of the current episode. When step
:math:`t` has been observed the return of step :math:`\tau = t - n + 1` is
complete and

.. math::
    Q(S_\tau, A_\tau) \leftarrow Q(S_\tau, A_\tau)
    + \alpha\,[G_{\tau:\tau+n} - Q(S_\tau, A_\tau)]

is applied through the shared TD step. At the end of an episode the last
``min(n, T)`` updates are flushed, oldest first: after ``terminated`` the
returns stop at the last reward (no bootstrap); after ``truncated`` (a time
limit) they bootstrap from the last next state. A transition whose state is
not the previous next state, without an episode end in between, is treated
the same way as a truncation of the previous episode (its pending updates are
flushed with a bootstrap) before the new episode starts.

Each step costs :math:`O(n)` (Tree Backup :math:`O(n\,|\mathcal A|)`); an
episode end costs :math:`O(n^2)` at most for Tree Backup and off-policy
n-step SARSA, :math:`O(n)` for on-policy n-step SARSA.

References
----------
.. [1] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
   Introduction, 2nd ed., Chapter 7 (Sections 7.2, 7.3 and 7.5).
"""

from __future__ import annotations

from collections import deque
from collections.abc import Sequence
from typing import Any, ClassVar

import numpy as np

from .._errors import InvalidParameterError
from .._greedy import masked_max
from .._seeding import SeedLike
from .._validation import require_positive_int
from ..agent import TabularAgent, Transition
from ..exploration import Exploration
from ..schedules import Schedule
from ..tables import InitialValue
from ._commit import CommitsNextAction
from ._targets import greedy_max, sampled_value

__all__ = ["NStepSarsa", "TreeBackup"]

#: One buffered step: (S_k, A_k, R_{k+1}, mask of S_k or None)
_Step = tuple[int, int, float, "np.ndarray | None"]
#: What the returns bootstrap from: (S_{t+1}, its mask, A_{t+1} or None)
_Tail = tuple[int, "np.ndarray | None", "int | None"]


class _NStepLearner(TabularAgent):
    """Buffering, completion and flushing shared by the n-step learners."""

    _saved_state: ClassVar[tuple[tuple[str, str], ...]] = (
        ("_buffer", "per_episode"), ("_mask_now", "per_episode"), ("_tail", "per_episode"),
    )

    def __init__(
        self,
        n_states: int,
        n_actions: int,
        *,
        n: int = 4,
        gamma: float = 0.99,
        step_size: float | Schedule = 0.1,
        exploration: float | Schedule | Exploration = 0.1,
        initial_value: InitialValue = 0.0,
        seed: SeedLike = None,
        state_encoder: Any = None,
        action_encoder: Any = None,
    ) -> None:
        self.n = require_positive_int(type(self).__name__, "n", n)
        super().__init__(
            n_states, n_actions, gamma=gamma, step_size=step_size, exploration=exploration,
            initial_value=initial_value, seed=seed, state_encoder=state_encoder,
            action_encoder=action_encoder,
        )
        self._buffer: deque[_Step] = deque()
        self._mask_now: np.ndarray | None = None  # mask of S_t (next_mask of the previous step)
        self._tail: _Tail | None = None  # bootstrap data of the last step of this episode

    # -------------------------------------------------------------- hooks
    def _bootstrap_action(
        self, s2: int, next_mask: np.ndarray | None, terminated: bool, truncated: bool
    ) -> int | None:
        """The action stored with the bootstrap state (None if not needed)."""
        return None

    def _update_front(self, count: int, tail: _Tail, terminated: bool) -> list[float]:
        """Apply the updates of the ``count`` oldest buffered steps; return their errors."""
        raise NotImplementedError

    # -------------------------------------------------------------- machinery
    def _learn(self, transition: Transition) -> tuple[float, ...]:
        s, a, r, s2, terminated, truncated, next_mask = transition
        buffer = self._buffer
        errors: list[float] = []
        tail = self._tail
        if tail is not None and s != tail[0]:
            # The stream jumped to another state without an episode end: close the
            # previous episode as if a time limit had cut it (bootstrap), then start anew.
            errors.extend(self._update_front(len(buffer), tail, False))
            buffer.clear()
            self._mask_now = None
        buffer.append((s, a, r, self._mask_now))
        tail = (s2, next_mask, self._bootstrap_action(s2, next_mask, terminated, truncated))
        if terminated or truncated:
            errors.extend(self._update_front(len(buffer), tail, terminated))
            buffer.clear()
            self._tail = None
            self._mask_now = None
        else:
            self._tail = tail
            self._mask_now = next_mask
            if len(buffer) == self.n:
                errors.extend(self._update_front(1, tail, False))
                buffer.popleft()
        return tuple(errors)

    def _settle_cut(self) -> tuple[float, ...]:
        tail = self._tail
        if tail is None or not self._buffer:
            return ()
        return tuple(self._update_front(len(self._buffer), tail, False))

    def _end_episode(self) -> None:
        self._buffer.clear()
        self._tail = None
        self._mask_now = None
        super()._end_episode()


class NStepSarsa(CommitsNextAction, _NStepLearner):
    r"""n-step SARSA, on-policy or off-policy with importance sampling.

    .. math::
        G_{\tau:\tau+n} = \sum_{i=\tau+1}^{\min(\tau+n,\,T)} \gamma^{i-\tau-1} R_i
        + \gamma^n Q(S_{\tau+n}, A_{\tau+n})\,[\tau + n < T]

    .. math::
        Q(S_\tau, A_\tau) \leftarrow Q(S_\tau, A_\tau)
        + \alpha\,\rho\,[G_{\tau:\tau+n} - Q(S_\tau, A_\tau)]

    On-policy (the default) :math:`\rho = 1`. With ``off_policy=True`` the
    target policy :math:`\pi` is greedy with respect to :math:`Q` (ties share
    the probability equally) and

    .. math::
        \rho = \prod_{k=\tau+1}^{\min(\tau+n,\,T-1)}
        \frac{\pi(A_k \mid S_k)}{b(A_k \mid S_k)},

    where :math:`b` is the learner's exploration rule; both are evaluated at
    update time, as in the book's algorithm. A weight of zero leaves
    :math:`Q` and the visit count unchanged and reports an error of 0.0;
    otherwise the reported error is :math:`\rho\,[G - Q]`.

    :math:`A_{t+1}` is committed exactly as in :class:`~tdkit.Sarsa`: the next
    ``act(next_obs)`` returns the action the return used (see
    :mod:`tdkit.learners._commit`). With ``n=1`` (on-policy) this is
    :class:`~tdkit.Sarsa`. After ``terminated`` the pending returns stop at
    the last reward; after ``truncated`` they bootstrap from the last next
    state with a drawn, uncommitted action (whose ratio enters :math:`\rho`).

    Parameters
    ----------
    n_states, n_actions, gamma, step_size, exploration, initial_value, seed
        As for :class:`~tdkit.QLearning`; so are ``state_encoder`` and
        ``action_encoder``.
    n : int, default 4
        Number of rewards before bootstrapping, ``n >= 1``.
    off_policy : bool, default False
        Learn the greedy policy's values from ε-greedy (or other) behaviour,
        weighting each update by :math:`\rho`.

    Raises
    ------
    ValueError
        If ``n`` is not an integer >= 1 or another hyper-parameter is out of range.

    References
    ----------
    .. [1] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
       Introduction, 2nd ed., Section 7.2 (Eq. 7.4, 7.5) and Section 7.3
       (Eq. 7.11, off-policy n-step Sarsa).

    Examples
    --------
    Three rewards of 1 reach the first pair of the episode only at the third
    step (n = 3, gamma = 1, alpha = 1):

    >>> agent = NStepSarsa(4, 1, n=3, gamma=1.0, step_size=1.0, seed=0)
    >>> agent.observe(0, 0, 1.0, 1, False, False); agent.update()
    ()
    >>> agent.observe(1, 0, 1.0, 2, False, False); agent.update()
    ()
    >>> agent.observe(2, 0, 1.0, 3, True, False); agent.update()   # flush: G = 3, 2, 1
    (3.0, 2.0, 1.0)
    """

    def __init__(
        self,
        n_states: int,
        n_actions: int,
        *,
        n: int = 4,
        off_policy: bool = False,
        gamma: float = 0.99,
        step_size: float | Schedule = 0.1,
        exploration: float | Schedule | Exploration = 0.1,
        initial_value: InitialValue = 0.0,
        seed: SeedLike = None,
        state_encoder: Any = None,
        action_encoder: Any = None,
    ) -> None:
        if not isinstance(off_policy, (bool, np.bool_)):
            raise InvalidParameterError(
                f"NStepSarsa: off_policy must be True or False; got {off_policy!r}."
            )
        self.off_policy = bool(off_policy)
        super().__init__(
            n_states, n_actions, n=n, gamma=gamma, step_size=step_size, exploration=exploration,
            initial_value=initial_value, seed=seed, state_encoder=state_encoder,
            action_encoder=action_encoder,
        )

    def _bootstrap_action(
        self, s2: int, next_mask: np.ndarray | None, terminated: bool, truncated: bool
    ) -> int | None:
        if terminated:
            self._drop_next_action()
            return None
        return self._next_action(s2, next_mask, truncated)

    def _ratio(self, s: int, a: int, mask: np.ndarray | None) -> float:
        r"""Importance ratio :math:`\pi(a|s) / b(a|s)` for the greedy target policy."""
        row = self._values[s]
        top = masked_max(row, mask)
        if row[a] < top:
            return 0.0
        ties = row == top
        if mask is not None:
            ties &= mask
        target = 1.0 / int(ties.sum())
        behaviour = float(
            self._explore.probabilities(row, mask, step=self.steps_, counts=self._counts_for(s))[a]
        )
        return target / behaviour if behaviour > 0.0 else 0.0

    def _update_front(self, count: int, tail: _Tail, terminated: bool) -> list[float]:
        steps = list(self._buffer)
        length = len(steps)
        gamma = self.gamma
        q = self._values
        suffix = [0.0] * length  # suffix[j] = sum_{i >= j} gamma^(i-j) R_{i+1}
        acc = 0.0
        for j in range(length - 1, -1, -1):
            acc = steps[j][2] + gamma * acc
            suffix[j] = acc
        s2, mask2, a2 = tail
        errors: list[float] = []
        for j in range(count):
            s, a = steps[j][0], steps[j][1]
            g = suffix[j]
            if not terminated:
                g += gamma ** (length - j) * sampled_value(self._row(s2), a2)
            if not self.off_policy:
                errors.append(self._td_step(q, self._visits, s, a, g))
                continue
            rho = 1.0
            for k in range(j + 1, length):
                sk, ak, _, mk = steps[k]
                rho *= self._ratio(sk, ak, mk)
                if rho == 0.0:
                    break
            if rho != 0.0 and not terminated:
                rho *= self._ratio(s2, a2, mask2)
            if rho == 0.0:
                errors.append(0.0)
                continue
            errors.append(self._td_step(q, self._visits, s, a, g, rho))
        return errors


class TreeBackup(_NStepLearner):
    r"""n-step Tree Backup: off-policy n-step returns without importance sampling.

    The target policy :math:`\pi` is greedy with respect to :math:`Q` (tied
    actions share the probability equally; masked actions get none). With
    :math:`t+1 = \min(\tau+n, T)`,

    .. math::
        G = R_{t+1} + \gamma \sum_a \pi(a \mid S_{t+1})\, Q(S_{t+1}, a)
        \quad (\text{just } R_{T} \text{ if the episode terminated at } T),

    then for :math:`k = t, t-1, \dots, \tau+1`:

    .. math::
        G \leftarrow R_k + \gamma \sum_{a \ne A_k} \pi(a \mid S_k)\, Q(S_k, a)
        + \gamma\, \pi(A_k \mid S_k)\, G,

    and :math:`Q(S_\tau, A_\tau) \leftarrow Q(S_\tau, A_\tau) + \alpha [G - Q(S_\tau, A_\tau)]`.
    With ``n=1`` the target is Q-learning's,
    :math:`R_{t+1} + \gamma \max_a Q(S_{t+1}, a)`. After ``truncated`` the
    innermost backup bootstraps from the last next state; after
    ``terminated`` it does not.

    Parameters
    ----------
    n_states, n_actions, gamma, step_size, exploration, initial_value, seed
        As for :class:`~tdkit.QLearning`; so are ``state_encoder`` and
        ``action_encoder``.
    n : int, default 4
        Depth of the tree, ``n >= 1``.

    References
    ----------
    .. [1] Precup, D., Sutton, R. S. & Singh, S. (2000). Eligibility traces
       for off-policy policy evaluation. Proceedings of the 17th ICML.
    .. [2] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
       Introduction, 2nd ed., Section 7.5 (Eq. 7.16).

    Examples
    --------
    >>> agent = TreeBackup(3, 2, n=2, gamma=1.0, step_size=1.0, seed=0)
    >>> agent.observe(0, 0, 1.0, 1, False, False); agent.update()
    ()
    >>> agent.observe(1, 1, 2.0, 2, True, False); agent.update()  # A_1 ties: G = 1 + (0 + 2)/2
    (2.0, 2.0)
    """

    def _update_front(self, count: int, tail: _Tail, terminated: bool) -> list[float]:
        steps = list(self._buffer)
        length = len(steps)
        gamma = self.gamma
        q = self._values
        s2, mask2, _ = tail
        errors: list[float] = []
        for j in range(count):
            # Recomputed for each flushed step: earlier updates may have changed Q(S_k, .).
            g = steps[-1][2]
            if not terminated:
                g += gamma * greedy_max(self._row(s2), self._allowed(mask2))
            for k in range(length - 1, j, -1):
                sk, ak, _, mk = steps[k]
                g = steps[k - 1][2] + gamma * _greedy_backup(
                    self._row(sk), self._allowed(mk), ak, g
                )
            errors.append(self._td_step(q, self._visits, steps[j][0], steps[j][1], g))
        return errors


def _greedy_backup(row: Sequence[float], allowed: Sequence[int], taken: int, g: float) -> float:
    r""":math:`\sum_{a \ne A} \pi(a)\,Q(a) + \pi(A)\,G` for the greedy :math:`\pi` (ties share)."""
    top = greedy_max(row, allowed)
    if row[taken] < top:
        return top
    k = sum(1 for a in allowed if row[a] == top)
    if k == 1:
        return g
    return ((k - 1) * top + g) / k

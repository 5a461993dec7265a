r"""TD prediction: state values :math:`v_\pi` of a given policy, by TD(0) and TD(λ).

The learners speak the same act / observe / update protocol as the control
learners, so :func:`tdkit.train` runs them: ``act`` samples the given policy
(``explore`` is ignored, there is nothing to explore), and the updates learn
:math:`V(s) \approx v_\pi(s)`. The transitions are assumed to follow the
policy; actions are checked for range but do not enter the updates.

* ``terminated``: the target does not bootstrap; ``truncated`` (a time
  limit): it bootstraps from :math:`V(S_{t+1})`.
* ``policy`` is an ``(n_states, n_actions)`` table of probabilities (rows sum
  to 1) or a callable ``obs -> action``. With a table and a ``mask`` the
  probabilities are renormalised over the allowed actions; a callable that
  returns a masked action raises.

The values live in a ``(n_states, 1)`` table, so the shared TD step of
:class:`~tdkit.agent.TabularAgent` and the shared trace step serve them
unchanged; :attr:`values_table` (alias :attr:`v`, and :attr:`table`) is its
``(n_states,)`` read-only view.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Iterable, Sequence
from typing import Any

import numpy as np

from .._errors import InvalidParameterError
from .._seeding import SeedLike
from .._validation import require_in_range, require_positive_int
from ..agent import Transition
from ..schedules import Schedule
from ..tables import InitialValue
from ._policy import PolicyLearner
from ._traces_math import TraceLearner

__all__ = ["TD0", "TDLambda"]

class TD0(PolicyLearner):
    r"""TD(0) prediction of the state values of a given policy.

    .. math::
        V(S_t) \leftarrow V(S_t) + \alpha\,[R_{t+1} + \gamma V(S_{t+1}) - V(S_t)]

    (just :math:`R_{t+1}` as target after ``terminated``). :meth:`fit_batch`
    runs batch TD(0) over a fixed set of episodes, whose fixed point is the
    certainty-equivalence estimate (Sutton & Barto 2018, Section 6.3).

    Parameters
    ----------
    n_states, n_actions : int
        Table shape (states; actions of the policy).
    policy : array_like of shape (n_states, n_actions), or callable
        Action probabilities per state (rows sum to 1), or ``obs -> action``.
    gamma : float, default 0.99
        Discount factor in [0, 1].
    step_size : float or Schedule, default 0.1
        :math:`\alpha \in (0, 1]` or a schedule (e.g. ``VisitCount(1.0)``).
    initial_value : float or (float, float), default 0.0
    seed : int, Generator or None
        Seeds the draws of actions from a policy table.
    state_encoder, action_encoder : optional
        See :mod:`tdkit.encoders`.

    Raises
    ------
    ValueError
        If the policy table has the wrong shape, negative or non-finite
        entries, or a row that does not sum to 1, or another hyper-parameter
        is out of range.

    References
    ----------
    .. [1] Sutton, R. S. (1988). Learning to predict by the methods of
       temporal differences. Machine Learning 3, 9-44.
    .. [2] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
       Introduction, 2nd ed., Section 6.1 (Eq. 6.2) and Section 6.3.

    Examples
    --------
    >>> agent = TD0(3, 2, policy=[[0.5, 0.5]] * 3, gamma=1.0, step_size=0.5, seed=0)
    >>> agent.observe(0, agent.act(0), 1.0, 1, False, False); agent.update()
    (1.0,)
    >>> agent.values(0)
    0.5
    """

    def _learn(self, transition: Transition) -> tuple[float, ...]:
        s, _a, r, s2, terminated, truncated, next_mask = transition
        target = r if terminated else r + self.gamma * self._next_value(
            s2, next_mask, terminated, truncated
        )
        return (self._td_step(self._values, self._visits, s, 0, target),)

    def fit_batch(
        self,
        episodes: Iterable[Sequence[Sequence[Any]]],
        *,
        step_size: float | None = None,
        tol: float = 1e-12,
        max_iterations: int = 100_000,
        max_sweeps: int | None = None,
    ) -> int:
        r"""Batch TD(0): sweep a fixed set of episodes until the values stop changing.

        Each sweep computes the TD error of every transition with the current
        values and then moves each state by the step size times the mean error
        of its transitions:

        .. math::
            V(s) \leftarrow V(s) + \alpha\,\frac{1}{n(s)}
            \sum_{i: S_i = s} [R_i + \gamma V(S'_i) [\lnot\text{terminated}_i] - V(s)]

        The fixed point makes every state's mean TD error zero, which is the
        certainty-equivalence estimate: the exact value of the maximum
        likelihood model of the data (Sutton & Barto 2018, Section 6.3).
        Truncated transitions bootstrap. States that never start a
        transition keep their value. Visit counts and ``steps_`` are not
        changed.

        Parameters
        ----------
        episodes : iterable of sequences of transitions
            Each transition in ``observe``'s argument order
            ``(obs, action, reward, next_obs, terminated, truncated)``.
        step_size : float, optional
            :math:`\alpha \in (0, 1]`; default the learner's constant step size.
        tol : float, default 1e-12
            Stop when no value changes by more than this in a sweep.
        max_iterations : int, default 100000
            Most sweeps to run.
        max_sweeps : int, optional
            Deprecated spelling of ``max_iterations`` (a ``FutureWarning``;
            removed in 0.3.0).

        Returns
        -------
        int
            Number of sweeps run.

        Raises
        ------
        ValueError
            On a malformed transition, a schedule step size without an
            explicit ``step_size``, or no convergence within ``max_iterations``.

        Examples
        --------
        >>> agent = TD0(3, 1, policy=[[1.0]] * 3, gamma=1.0, step_size=0.5)
        >>> agent.fit_batch([[(0, 0, 0.0, 1, False, False), (1, 0, 1.0, 2, True, False)]]) > 0
        True
        >>> agent.values_table.round(9).tolist()
        [1.0, 1.0, 0.0]
        """
        name = f"{type(self).__name__}.fit_batch"
        if step_size is None:
            if self._alpha_const is None:
                raise InvalidParameterError(
                    f"{name}: the learner's step_size is a schedule ({self.step_size!r}); pass "
                    "a constant step_size=... in (0, 1] for batch updating."
                )
            alpha = self._alpha_const
        else:
            alpha = require_in_range(name, "step_size", step_size, 0.0, 1.0, low_open=True)
        tol = require_in_range(name, "tol", tol, 0.0, math.inf, low_open=True)
        if max_sweeps is not None:
            warnings.warn(
                f"{name}: max_sweeps is deprecated and will be removed in tdkit 0.3.0; use "
                "max_iterations=... (the name every tdkit solver uses).",
                FutureWarning,
                stacklevel=2,
            )
            max_iterations = max_sweeps
        max_sweeps = require_positive_int(name, "max_iterations", max_iterations)
        rows = []
        for episode in episodes:
            for item in episode:
                if len(item) != 6:
                    raise InvalidParameterError(
                        f"{name}: each transition must be (obs, action, reward, next_obs, "
                        f"terminated, truncated); got {item!r}."
                    )
                obs, action, reward, next_obs, terminated, _truncated = item
                self._action_index(action)
                r = float(reward)
                if not math.isfinite(r):
                    raise InvalidParameterError(f"{name}: reward must be finite; got {reward!r}.")
                rows.append((self._encode(obs), r, self._encode(next_obs), not terminated))
        if not rows:
            return 0
        s = np.array([row[0] for row in rows], dtype=np.intp)
        r = np.array([row[1] for row in rows])
        s2 = np.array([row[2] for row in rows], dtype=np.intp)
        boot = np.array([row[3] for row in rows], dtype=bool)
        counts = np.bincount(s, minlength=self.n_states)
        seen = counts > 0
        v = self._q[:, 0]  # taking _q forgets the row cache; no row is read below
        gamma = self.gamma
        for sweep in range(1, max_sweeps + 1):
            delta = r + gamma * np.where(boot, v[s2], 0.0) - v[s]
            change = alpha * np.bincount(s, weights=delta, minlength=self.n_states)[seen]
            change /= counts[seen]
            v[seen] += change
            if np.max(np.abs(change)) <= tol:
                return sweep
        raise InvalidParameterError(
            f"{name}: no convergence within max_iterations={max_sweeps} (last change "
            f"{float(np.max(np.abs(change))):.3g} > tol={tol:g}); raise max_iterations or tol, or "
            "check that every episode can reach its end (gamma = 1 needs proper episodes)."
        )


class TDLambda(PolicyLearner, TraceLearner):
    r"""TD(λ) prediction of the state values of a given policy, with eligibility traces.

    .. math::
        \delta_t = R_{t+1} + \gamma V(S_{t+1}) - V(S_t), \qquad
        V \leftarrow V + \alpha\,\delta_t\,z_t, \qquad z \leftarrow \gamma\lambda z

    with accumulating, replacing or dutch traces; ``trace="dutch"`` is true
    online TD(λ) (van Seijen & Sutton 2014). Traces are sparse and cleared at
    every episode end; no bootstrap after ``terminated``. With ``lam=0`` this
    is :class:`TD0`.

    Parameters
    ----------
    n_states, n_actions, policy, gamma, step_size, initial_value, seed
        As for :class:`TD0`; so are ``state_encoder`` and ``action_encoder``.
    lam, trace, trace_cutoff
        As for :class:`~tdkit.SarsaLambda` (the trace of a state instead of a pair).

    Raises
    ------
    ValueError
        If ``lam`` is outside [0, 1], ``trace`` is not one of the three kinds,
        ``trace_cutoff`` is outside [0, 1), or another hyper-parameter is
        out of range.

    References
    ----------
    .. [1] Sutton, R. S. (1988). Learning to predict by the methods of
       temporal differences. Machine Learning 3, 9-44.
    .. [2] van Seijen, H. & Sutton, R. S. (2014). True online TD(lambda).
       Proceedings of the 31st ICML.
    .. [3] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
       Introduction, 2nd ed., Section 12.2 (TD(λ)) and Section 12.5
       (true online TD(λ)).

    Examples
    --------
    >>> agent = TDLambda(3, 1, policy=[[1.0]] * 3, lam=1.0, gamma=1.0, step_size=1.0)
    >>> agent.observe(0, 0, 0.0, 1, False, False); agent.update()
    (0.0,)
    >>> agent.observe(1, 0, 2.0, 2, True, False); agent.update()
    (2.0,)
    >>> agent.values_table.tolist()
    [2.0, 2.0, 0.0]
    """

    def __init__(
        self,
        n_states: int,
        n_actions: int,
        *,
        policy: Any,
        lam: float = 0.9,
        trace: str = "accumulating",
        trace_cutoff: float = 1e-8,
        gamma: float = 0.99,
        step_size: float | Schedule = 0.1,
        initial_value: InitialValue = 0.0,
        seed: SeedLike = None,
        state_encoder: Any = None,
        action_encoder: Any = None,
    ) -> None:
        self._require_trace_params(lam, trace, trace_cutoff)
        PolicyLearner.__init__(
            self, n_states, n_actions, policy=policy, gamma=gamma, step_size=step_size,
            initial_value=initial_value, seed=seed, state_encoder=state_encoder,
            action_encoder=action_encoder,
        )
        self._start_traces()

    def _column(self, a: int) -> int:
        return 0

r"""Average-reward TD learners for continuing tasks: differential Q-learning, SARSA and TD.

A continuing task never ends, and these learners optimise (or estimate) its
long-run average reward :math:`\rho` instead of a discounted return. Each
keeps an estimate :math:`\bar R` (attribute ``average_reward``) and learns
*differential* values with the TD error

.. math:: \delta_t = R_{t+1} - \bar R_t + \hat v(S_{t+1}) - \hat q(S_t, A_t),

where :math:`\hat v(S_{t+1})` is :math:`\max_a Q(S_{t+1}, a)` (differential
Q-learning), :math:`Q(S_{t+1}, A_{t+1})` (differential SARSA) or
:math:`V(S_{t+1})` (differential TD). Both estimates move with it
(Wan, Naik & Sutton 2021):

.. math:: Q(S_t, A_t) \leftarrow Q(S_t, A_t) + \alpha\,\delta_t, \qquad
          \bar R \leftarrow \bar R + \eta\,\alpha\,\delta_t,

``step_size`` being :math:`\alpha` and ``reward_step_size`` the ratio
:math:`\eta`. The table update is the shared TD step of
:class:`~tdkit.agent.TabularAgent` with target :math:`R_{t+1} - \bar R +
\hat v(S_{t+1})`; the average moves by :math:`\eta` times the change that step
made, so the rule is written once. There is no discount: the learners take no
``gamma`` (:meth:`for_env` does not read the env's) and their values are
defined up to one additive constant.

``terminated`` and ``truncated`` in a continuing task
-----------------------------------------------------
* ``truncated`` (a time limit: the task goes on, the simulation was cut):
  the target bootstraps from ``next_obs`` as usual; the next episode is a new
  piece of experience, not linked to this one.
* ``terminated``: the task *restarts*. A terminal state takes no time step;
  the next state is the start state of the next episode. So the update of a
  terminating transition waits for the first transition of the next episode
  and then bootstraps from its start state :math:`S_0` (``max_a Q(S_0, a)``
  over the actions ``act`` was allowed there, ``Q(S_0, A_0)`` with the action
  really taken, or ``V(S_0)``). It is applied when that first transition is
  learned, just before that transition's own update, and its TD error comes
  first in the tuple :meth:`update` returns. Until then it is held in the
  learner (and saved with it): this is the one thing that crosses from one
  episode to the next, because in a continuing task the restart is part of
  the dynamics. This is the reading
  :func:`tdkit.dp_average.relative_value_iteration` uses for terminal states,
  so learned and exact gains agree.
* :meth:`end_episode` (an episode cut without flags) is settled as a time
  limit, which for these one-step learners means nothing is left to do.

References
----------
Wan, Y., Naik, A. & Sutton, R. S. (2021). Learning and planning in
average-reward Markov decision processes. Proceedings of the 38th
International Conference on Machine Learning (ICML), PMLR 139.
Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An Introduction,
2nd ed., MIT Press. Section 10.3.
"""

from __future__ import annotations

from typing import Any, ClassVar

import numpy as np

from .._errors import InvalidParameterError
from .._greedy import masked_max, require_mask
from .._seeding import SeedLike
from .._validation import require_real
from ..agent import TabularAgent, Transition
from ..exploration import Exploration
from ..schedules import Schedule
from ..tables import InitialValue
from ._commit import CommitsNextAction
from ._policy import PolicyLearner

__all__ = ["DifferentialQLearning", "DifferentialSarsa", "DifferentialTD"]

_DEFAULT_ETA = 0.1
r"""Default :math:`\eta` (``reward_step_size``)."""


class _AverageReward:
    r"""What the three differential learners share: the average, the restart, no discount.

    Put it first in the bases. Subclasses call :meth:`_init_average` after the
    base constructor and implement :meth:`_restart_value` and, as the trace
    and prediction learners do, ``_next_value(s2, next_mask, terminated,
    truncated)``: :math:`\hat v(S_{t+1})`, or 0 after ``terminated`` (when the
    update waits for the next start state instead).
    """

    #: Read by :meth:`tdkit.TabularAgent.for_env`: no discount is taken from the env.
    _discounts: ClassVar[bool] = False

    _saved_state: ClassVar[tuple[tuple[str, str], ...]] = (
        ("average_reward", "real"), ("_restart", "held_transition"),
    )

    #: (state, action, reward) of a terminating transition whose bootstrap waits for the
    #: next episode's start state, or None.
    _restart: tuple[int, int, float] | None = None

    def _init_average(self, reward_step_size: float, initial_average_reward: float) -> None:
        name = type(self).__name__
        eta = require_real(name, "reward_step_size", reward_step_size)
        if eta <= 0.0:
            raise InvalidParameterError(
                f"{name}: reward_step_size must be > 0 (it is eta, the average reward's step "
                f"as a multiple of step_size); got {reward_step_size!r}. Values in (0, 1] are "
                "usual."
            )
        self.reward_step_size = reward_step_size
        self.initial_average_reward = initial_average_reward
        self._eta = eta
        self.average_reward = require_real(name, "initial_average_reward", initial_average_reward)
        self._restart = None

    # ------------------------------------------------------------ the rule
    def _learn(self, transition: Transition) -> tuple[float, ...]:
        s, a, r, s2, terminated, truncated, next_mask = transition
        head = () if self._restart is None else self._close_restart(s, a)
        v_next = self._next_value(s2, next_mask, terminated, truncated)
        if terminated:
            return head + self._hold_restart(s, a, r)
        return (*head, self._differential_step(s, a, r - self.average_reward + v_next))

    def _differential_step(self, s: int, a: int, target: float) -> float:
        r"""The shared TD step to ``target``, then :math:`\bar R \mathrel{+}= \eta\alpha\delta`.

        :math:`\alpha\delta` is exactly the change the TD step made to the entry.
        """
        values = self._values  # type: ignore[attr-defined]
        before = values[s, a]
        delta = self._td_step(values, self._visits, s, a, target)  # type: ignore[attr-defined]
        self.average_reward += self._eta * float(values[s, a] - before)
        return delta

    # ------------------------------------------------------------ restarts
    def _close_restart(self, s0: int, a0: int) -> tuple[float, ...]:
        """Apply the held terminating transition now that the start state ``s0`` is known."""
        s, a, r = self._restart  # type: ignore[misc]
        self._restart = None
        target = r - self.average_reward + self._restart_value(s0, a0)
        return (self._differential_step(s, a, target),)

    def _hold_restart(self, s: int, a: int, r: float) -> tuple[float, ...]:
        """Keep a terminating transition until the next episode's start state is seen."""
        self._restart = (s, a, r)
        return ()

    def _restart_value(self, s0: int, a0: int) -> float:
        raise NotImplementedError


class _DifferentialControl(_AverageReward, TabularAgent):
    """The constructor of the two control learners (their parameters are the same)."""

    def __init__(
        self,
        n_states: int,
        n_actions: int,
        *,
        step_size: float | Schedule = 0.1,
        reward_step_size: float = _DEFAULT_ETA,
        exploration: float | Schedule | Exploration = 0.1,
        initial_value: InitialValue = 0.0,
        initial_average_reward: float = 0.0,
        seed: SeedLike = None,
        state_encoder: Any = None,
        action_encoder: Any = None,
    ) -> None:
        super().__init__(
            n_states, n_actions, gamma=1.0, step_size=step_size, exploration=exploration,
            initial_value=initial_value, seed=seed, state_encoder=state_encoder,
            action_encoder=action_encoder,
        )
        self._init_average(reward_step_size, initial_average_reward)


class DifferentialQLearning(_DifferentialControl):
    r"""Differential Q-learning: off-policy average-reward control.

    .. math::
        \delta_t = R_{t+1} - \bar R_t + \max_{a \in \mathcal A(S_{t+1})} Q(S_{t+1}, a)
        - Q(S_t, A_t), \quad
        Q(S_t, A_t) \mathrel{+}= \alpha\,\delta_t, \quad
        \bar R \mathrel{+}= \eta\,\alpha\,\delta_t

    In a communicating MDP, with suitably decreasing step sizes and every
    pair visited infinitely often, :math:`\bar R` converges to the optimal
    gain :math:`\rho^*` and :math:`Q` to :math:`q^* + c` for a constant
    :math:`c` (Wan, Naik & Sutton 2021, Theorem 1), whatever the behaviour
    policy. The max runs over the actions ``next_mask`` allows; greedy ties
    are broken uniformly at random. ``truncated`` bootstraps; ``terminated``
    restarts the task (see :mod:`tdkit.learners.differential`).

    Parameters
    ----------
    n_states, n_actions : int
        Table shape.
    step_size : float or Schedule, default 0.1
        :math:`\alpha \in (0, 1]` or a schedule.
    reward_step_size : float, default 0.1
        :math:`\eta > 0`: the average reward moves by :math:`\eta\alpha\delta`.
    exploration : float, Schedule or Exploration, default 0.1
        ε of ε-greedy, or an exploration object.
    initial_value : float or (float, float), default 0.0
    initial_average_reward : float, default 0.0
        Starting :math:`\bar R`.
    seed : int, Generator or None
    state_encoder, action_encoder : optional
        See :mod:`tdkit.encoders`; :meth:`for_env` picks them from an env.

    Attributes
    ----------
    average_reward : float
        :math:`\bar R`, the learned estimate of the gain.

    Raises
    ------
    InvalidParameterError
        If a hyper-parameter is outside its range, e.g. ``reward_step_size
        <= 0`` (the message names it).

    References
    ----------
    .. [1] Wan, Y., Naik, A. & Sutton, R. S. (2021). Learning and planning in
       average-reward Markov decision processes. ICML, PMLR 139. Algorithm
       "Differential Q-learning".

    Examples
    --------
    >>> agent = DifferentialQLearning(2, 2, step_size=0.5, reward_step_size=1.0, seed=0)
    >>> agent.observe(0, 1, 2.0, 1, False, False)
    >>> agent.update()          # delta = 2 - 0 + max Q(1, .) - Q(0, 1) = 2
    (2.0,)
    >>> float(agent.table[0, 1]), agent.average_reward   # both moved by alpha * delta
    (1.0, 1.0)
    """

    _reset_state: int = -1

    _saved_state: ClassVar[tuple[tuple[str, str], ...]] = (
        ("_reset_mask", "mask"), ("_reset_state", "state_or_minus_one"),
    )

    def _init_average(self, reward_step_size: float, initial_average_reward: float) -> None:
        super()._init_average(reward_step_size, initial_average_reward)
        # The mask act saw in the first state after a restart (for that state's max).
        self._reset_mask = np.ones(self.n_actions, dtype=bool)
        self._reset_state = -1

    def act(self, obs: Any, *, mask: Any = None, explore: bool = True) -> Any:
        """Choose an action; after a terminal state, remember the start state's mask."""
        if self._restart is not None or (self._pending and self._pending[-1][4]):
            if mask is None:
                self._reset_state = -1
            else:
                self._reset_mask[:] = require_mask(mask, self.n_actions)
                self._reset_state = self._encode(obs)
        return super().act(obs, mask=mask, explore=explore)

    def _next_value(
        self, s2: int, next_mask: np.ndarray | None, terminated: bool, truncated: bool
    ) -> float:
        return 0.0 if terminated else masked_max(self._values[s2], next_mask)

    def _restart_value(self, s0: int, a0: int) -> float:
        mask = self._reset_mask if self._reset_state == s0 else None
        self._reset_state = -1
        return masked_max(self._values[s0], mask)


class DifferentialSarsa(_DifferentialControl, CommitsNextAction, TabularAgent):
    r"""Differential SARSA: on-policy average-reward control.

    .. math::
        \delta_t = R_{t+1} - \bar R_t + Q(S_{t+1}, A_{t+1}) - Q(S_t, A_t), \quad
        Q(S_t, A_t) \mathrel{+}= \alpha\,\delta_t, \quad
        \bar R \mathrel{+}= \eta\,\alpha\,\delta_t

    :math:`A_{t+1}` is committed exactly as for :class:`tdkit.Sarsa` (the
    next ``act(next_obs)`` returns the action the update used). With a fixed
    behaviour policy :math:`\bar R` estimates that policy's gain; with
    exploration decaying to greedy it approaches :math:`\rho^*`. The
    tabular case of the differential semi-gradient SARSA of Sutton & Barto
    (2018, Section 10.3) with :math:`\beta = \eta\alpha` and the TD error
    (rather than :math:`R - \bar R`) driving the average, as in Wan, Naik &
    Sutton (2021). ``truncated`` bootstraps with an uncommitted
    :math:`A_{t+1}`; ``terminated`` restarts the task and bootstraps from
    :math:`Q(S_0, A_0)` of the next episode's first transition.

    Parameters
    ----------
    n_states, n_actions, step_size, reward_step_size, exploration, initial_value
        As for :class:`DifferentialQLearning`; so are
        ``initial_average_reward``, ``seed``, ``state_encoder`` and
        ``action_encoder``.

    References
    ----------
    .. [1] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
       Introduction, 2nd ed., Section 10.3 (differential semi-gradient Sarsa).
    .. [2] Wan, Y., Naik, A. & Sutton, R. S. (2021). Learning and planning in
       average-reward Markov decision processes. ICML, PMLR 139.

    Examples
    --------
    >>> agent = DifferentialSarsa(2, 2, step_size=0.5, reward_step_size=0.5, seed=0)
    >>> agent.observe(0, 1, 4.0, 1, False, False)
    >>> agent.update()
    (4.0,)
    >>> agent.average_reward     # 0.5 * 0.5 * 4
    1.0
    """

    def _restart_value(self, s0: int, a0: int) -> float:
        return float(self._values[s0, a0])


class DifferentialTD(_AverageReward, PolicyLearner):
    r"""Differential TD(0): the differential values and the gain of a given policy.

    .. math::
        \delta_t = R_{t+1} - \bar R_t + V(S_{t+1}) - V(S_t), \quad
        V(S_t) \mathrel{+}= \alpha\,\delta_t, \quad
        \bar R \mathrel{+}= \eta\,\alpha\,\delta_t

    For a unichain policy :math:`\bar R` converges to the policy's gain
    (:func:`tdkit.policy_gain`) and :math:`V` to its bias plus a constant
    (Wan, Naik & Sutton 2021, "Differential TD-learning"). Acting samples the
    given policy, as :class:`tdkit.TD0` does. ``truncated`` bootstraps;
    ``terminated`` restarts the task and bootstraps from :math:`V(S_0)` of the
    next episode's start state.

    Parameters
    ----------
    n_states, n_actions : int
        Table shape (states; actions of the policy).
    policy : array_like of shape (n_states, n_actions), or callable
        Action probabilities per state (rows sum to 1), or ``obs -> action``.
    step_size : float or Schedule, default 0.1
        :math:`\alpha \in (0, 1]` or a schedule (e.g. ``VisitCount(1.0)``).
    initial_value : float or (float, float), default 0.0
    seed : int, Generator or None
        Seeds the draws of actions from a policy table.
    state_encoder, action_encoder : optional
        See :mod:`tdkit.encoders`.
    reward_step_size : float, default 0.1
        :math:`\eta > 0`: the average reward moves by :math:`\eta\alpha\delta`.
    initial_average_reward : float, default 0.0

    Attributes
    ----------
    average_reward : float
        :math:`\bar R`, the estimate of the policy's gain.

    References
    ----------
    .. [1] Wan, Y., Naik, A. & Sutton, R. S. (2021). Learning and planning in
       average-reward Markov decision processes. ICML, PMLR 139.
    .. [2] Tsitsiklis, J. N. & Van Roy, B. (1999). Average cost temporal-
       difference learning. Automatica 35(11), 1799-1808.

    Examples
    --------
    >>> agent = DifferentialTD(2, 1, policy=[[1.0], [1.0]], step_size=0.5, reward_step_size=1.0)
    >>> agent.observe(0, 0, 1.0, 1, False, False); agent.update()
    (1.0,)
    >>> agent.values(0), agent.average_reward
    (0.5, 0.5)
    """

    def __init__(
        self,
        n_states: int,
        n_actions: int,
        *,
        policy: Any,
        step_size: float | Schedule = 0.1,
        reward_step_size: float = _DEFAULT_ETA,
        initial_value: InitialValue = 0.0,
        initial_average_reward: float = 0.0,
        seed: SeedLike = None,
        state_encoder: Any = None,
        action_encoder: Any = None,
    ) -> None:
        super().__init__(
            n_states, n_actions, policy=policy, gamma=1.0, step_size=step_size,
            initial_value=initial_value, seed=seed, state_encoder=state_encoder,
            action_encoder=action_encoder,
        )
        self._init_average(reward_step_size, initial_average_reward)

    def _learn(self, transition: Transition) -> tuple[float, ...]:
        s, _a, *rest = transition
        return super()._learn((s, 0, *rest))  # V(s) is column 0 of the table

    def _restart_value(self, s0: int, a0: int) -> float:
        return self._next_value(s0, None, False, False)

r"""One-step TD control: Q-learning, SARSA, Expected SARSA, Double Q-learning.

All four share the TD step of :class:`tdkit.agent.TabularAgent`,

.. math:: Q(S_t, A_t) \leftarrow Q(S_t, A_t) + \alpha\,[G_t - Q(S_t, A_t)],

and differ only in the one-step target :math:`G_t`. When ``terminated`` the
target is :math:`R_{t+1}`; when only ``truncated`` (a time limit) it
bootstraps as usual and the episode then ends.
"""

from __future__ import annotations

from typing import Any, ClassVar

import numpy as np

from .._greedy import greedy_action, row_max
from ..agent import TabularAgent, Transition
from ..exploration import EpsilonGreedy, Softmax
from ..tables import ActionValueTable, InitialValue, read_only
from ._commit import CommitsNextAction
from ._targets import expected_epsilon_greedy, expected_softmax

__all__ = ["DoubleQLearning", "ExpectedSarsa", "QLearning", "Sarsa"]


class QLearning(TabularAgent):
    r"""Q-learning: off-policy TD control with a greedy target.

    .. math::
        Q(S_t, A_t) \leftarrow Q(S_t, A_t) + \alpha \Big[ R_{t+1}
        + \gamma \max_{a \in \mathcal A(S_{t+1})} Q(S_{t+1}, a) - Q(S_t, A_t) \Big]

    The max runs over the actions allowed by ``next_mask``; it is dropped
    (target :math:`R_{t+1}`) when ``terminated``, and kept when the episode is
    only ``truncated`` by a time limit. Behaviour is ε-greedy by default with
    ties broken uniformly at random.

    Parameters
    ----------
    n_states, n_actions : int
        Table shape.
    gamma : float, default 0.99
        Discount factor :math:`\gamma \in [0, 1]`.
    step_size : float or Schedule, default 0.1
        :math:`\alpha \in (0, 1]` or a schedule (e.g. ``VisitCount(0.8)``).
    exploration : float, Schedule or Exploration, default 0.1
        ε of ε-greedy, or an exploration object.
    initial_value : float or (float, float), default 0.0
        Initial action values (constant, optimistic, or seeded uniform range).
    seed : int, Generator or None
        Seed of the learner's generator.
    state_encoder, action_encoder : optional
        See :mod:`tdkit.encoders`; :meth:`for_env` picks them from an env.

    Raises
    ------
    ValueError
        If a hyper-parameter is outside its range (the message names it).

    References
    ----------
    .. [1] Watkins, C. J. C. H. (1989). Learning from Delayed Rewards. PhD
       thesis, King's College, Cambridge.
    .. [2] Watkins, C. J. C. H. & Dayan, P. (1992). Q-learning. Machine
       Learning 8, 279-292.
    .. [3] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
       Introduction, 2nd ed., Section 6.5, Eq. 6.8.

    Examples
    --------
    >>> agent = QLearning(3, 2, gamma=0.9, step_size=0.5, seed=0)
    >>> agent.observe(0, 1, 1.0, 1, False, False)
    >>> agent.update()
    (1.0,)
    >>> float(agent.table[0, 1])
    0.5
    """

    def _learn(self, transition: Transition) -> tuple[float, ...]:
        s, a, r, s2, terminated, _truncated, next_mask = transition
        if terminated:
            target = r
        else:
            row = self._rows[s2] or self._load_row(s2)
            if next_mask is None:
                target = r + self.gamma * max(row)
            else:
                target = r + self.gamma * row_max(row, self._sets.of(next_mask))
        if self._own_td_step:  # r, gamma and the row are Python floats
            return (self._td_main(s, a, target),)
        return (self._td_step(self._values, self._visits, s, a, target),)

    #: Q-learning's update under a name subclasses keep when they override ``_learn``
    #: (the planning learners apply it to real and simulated transitions alike).
    _q_learning_step = _learn


class Sarsa(CommitsNextAction, TabularAgent):
    r"""SARSA: on-policy TD control with the action actually taken next.

    .. math::
        Q(S_t, A_t) \leftarrow Q(S_t, A_t) + \alpha \big[ R_{t+1}
        + \gamma Q(S_{t+1}, A_{t+1}) - Q(S_t, A_t) \big]

    :math:`A_{t+1}` is drawn from the behaviour policy inside :meth:`update`
    and *committed*: the next ``act(next_obs)`` (with ``explore=True``) returns
    that same action, so the update always uses the action really taken. If
    ``act(next_obs)`` is called before :meth:`update`, the update uses the
    action ``act`` returned instead. No bootstrap when ``terminated``; on
    ``truncated`` the target bootstraps with a sampled :math:`A_{t+1}` that is
    not committed (the episode ends).

    Parameters
    ----------
    n_states, n_actions, gamma, step_size, exploration, initial_value, seed
        As for :class:`QLearning`; so are ``state_encoder`` and ``action_encoder``.

    References
    ----------
    .. [1] Rummery, G. A. & Niranjan, M. (1994). On-line Q-learning using
       connectionist systems. Technical Report CUED/F-INFENG/TR 166, Cambridge
       University Engineering Department.
    .. [2] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
       Introduction, 2nd ed., Section 6.4, Eq. 6.7.

    Examples
    --------
    >>> agent = Sarsa(2, 3, gamma=1.0, step_size=1.0, exploration=1.0, seed=0)
    >>> agent.observe(1, 0, 10.0, 0, True, False)      # teach Q(1, .) distinct values
    >>> agent.observe(1, 1, 20.0, 0, True, False)
    >>> agent.observe(1, 2, 30.0, 0, True, False)
    >>> _ = agent.update()
    >>> agent.observe(0, 0, 0.0, 1, False, False)
    >>> (delta,) = agent.update()   # the target used Q(1, a') of the committed a'
    >>> agent.act(1) == round(delta / 10.0) - 1   # and act returns that same a'
    True
    """

    def _learn(self, transition: Transition) -> tuple[float, ...]:
        s, a, r, s2, terminated, truncated, next_mask = transition
        if terminated:
            self._drop_next_action()
            target = r
        else:
            a2 = self._next_action(s2, next_mask, truncated)
            target = r + self.gamma * (self._rows[s2] or self._load_row(s2))[a2]
        if self._own_td_step:  # r, gamma and the entry are Python floats
            return (self._td_main(s, a, target),)
        return (self._td_step(self._values, self._visits, s, a, target),)


class ExpectedSarsa(TabularAgent):
    r"""Expected SARSA: the target averages over the behaviour policy.

    .. math::
        Q(S_t, A_t) \leftarrow Q(S_t, A_t) + \alpha \Big[ R_{t+1}
        + \gamma \sum_{a} \pi(a \mid S_{t+1})\, Q(S_{t+1}, a) - Q(S_t, A_t) \Big]

    :math:`\pi` is the learner's own exploration rule at the current step
    (ε-greedy by default: :math:`\varepsilon\,\overline{Q} + (1-\varepsilon)\max Q`
    over allowed actions). With ``exploration=0`` the target equals
    Q-learning's.

    Parameters
    ----------
    n_states, n_actions, gamma, step_size, initial_value, seed
        As for :class:`QLearning`; so are ``state_encoder`` and ``action_encoder``.
    exploration : float, Schedule or Exploration, default 0.1
        The behaviour policy, and the :math:`\pi` the target averages over.

    References
    ----------
    .. [1] van Seijen, H., van Hasselt, H., Whiteson, S. & Wiering, M. (2009).
       A theoretical and empirical analysis of Expected Sarsa. IEEE ADPRL.
    .. [2] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
       Introduction, 2nd ed., Section 6.6, Eq. 6.9.

    Examples
    --------
    >>> agent = ExpectedSarsa(2, 2, gamma=1.0, step_size=1.0, exploration=0.5, seed=0)
    >>> agent._q[1] = [0.0, 4.0]
    >>> agent.observe(0, 0, 0.0, 1, False, False)
    >>> agent.update()   # 0.5 * mean(0, 4) + 0.5 * max(0, 4) = 3
    (3.0,)
    """

    def _learn(self, transition: Transition) -> tuple[float, ...]:
        s, a, r, s2, terminated, _truncated, next_mask = transition
        target = r if terminated else r + self.gamma * self._expected_value(s2, next_mask)
        return (self._td_step(self._values, self._visits, s, a, target),)

    def _expected_value(self, s2: int, next_mask: np.ndarray | None) -> float:
        r""":math:`\sum_a \pi(a \mid s_2)\, Q(s_2, a)` under the exploration rule now.

        ε-greedy and soft-max use the closed forms of
        :mod:`tdkit.learners._targets` (shared with :func:`tdkit.train_batch`);
        other rules their own ``expected_value``.
        """
        rule = self._explore
        kind = type(rule)
        if kind is EpsilonGreedy:
            return expected_epsilon_greedy(
                self._row(s2), self._allowed(next_mask), rule.current(self.steps_)
            )
        if kind is Softmax:
            return expected_softmax(
                self._row(s2), self._allowed(next_mask), rule.temperature.value(self.steps_)
            )
        return rule.expected_value(
            self._values[s2], next_mask, step=self.steps_, counts=self._counts_for(s2)
        )


class DoubleQLearning(TabularAgent):
    r"""Double Q-learning: two tables, one selects and the other evaluates.

    With probability 1/2 (from the learner's own generator) update :math:`Q^A`:

    .. math::
        Q^A(S_t, A_t) \leftarrow Q^A(S_t, A_t) + \alpha \Big[ R_{t+1}
        + \gamma\, Q^B\big(S_{t+1}, \arg\max_a Q^A(S_{t+1}, a)\big) - Q^A(S_t, A_t) \Big]

    otherwise the same with A and B swapped. The argmax breaks ties uniformly
    at random and respects ``next_mask``. Behaviour is ε-greedy on
    :math:`Q^A + Q^B`; :attr:`table` and :meth:`q_values` report the mean
    :math:`(Q^A + Q^B)/2`, the estimate to compare with :math:`Q^*`. This
    removes the maximisation bias of Q-learning (Sutton & Barto 2018,
    Example 6.7).

    Parameters
    ----------
    n_states, n_actions, gamma, step_size, exploration, initial_value, seed
        As for :class:`QLearning`; so are ``state_encoder`` and ``action_encoder``.
        Each table keeps its own visit counts.

    References
    ----------
    .. [1] van Hasselt, H. (2010). Double Q-learning. Advances in Neural
       Information Processing Systems 23.
    .. [2] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
       Introduction, 2nd ed., Section 6.7.
    """

    _saved_state: ClassVar[tuple[tuple[str, str], ...]] = (
        ("_q_a", "values"), ("_q_b", "values"), ("_visits_a", "counts"), ("_visits_b", "counts"),
    )

    def _init_tables(self, initial_value: InitialValue) -> None:
        owner = type(self).__name__
        first = ActionValueTable(
            self.n_states, self.n_actions, initial_value=initial_value, rng=self._rng, owner=owner,
            bytes_per_row=8,  # the row cache's slot per state
        )
        second = ActionValueTable(
            self.n_states, self.n_actions, initial_value=initial_value, rng=self._rng, owner=owner
        )
        self._q_a, self._visits_a = first.values, first.visits
        self._q_b, self._visits_b = second.values, second.visits
        # Running sum Q^A + Q^B for behaviour, kept in step with both tables.
        self._q = self._q_a + self._q_b
        self._visits = np.zeros_like(self._visits_a)  # total updates per pair, for UCB

    def _learn(self, transition: Transition) -> tuple[float, ...]:
        s, a, r, s2, terminated, _truncated, next_mask = transition
        if self._rng.random() < 0.5:
            q_upd, q_eval, visits = self._q_a, self._q_b, self._visits_a
        else:
            q_upd, q_eval, visits = self._q_b, self._q_a, self._visits_b
        if terminated:
            target = r
        else:
            best = greedy_action(q_upd[s2], next_mask, self._rng)
            target = r + self.gamma * q_eval[s2, best]
        delta = self._td_step(q_upd, visits, s, a, target)
        self._set_value(s, a, self._q_a[s, a] + self._q_b[s, a])
        self._visits[s, a] += 1
        return (delta,)

    @property
    def table(self) -> np.ndarray:
        """The mean estimate :math:`(Q^A + Q^B) / 2` (a new array)."""
        return read_only((self._q_a + self._q_b) / 2.0)

    @property
    def tables(self) -> tuple[np.ndarray, np.ndarray]:
        """The two tables :math:`(Q^A, Q^B)` (read-only views)."""
        return read_only(self._q_a), read_only(self._q_b)

    def q_values(self, obs: Any) -> np.ndarray:
        s = self._encode(obs)
        return (self._q_a[s] + self._q_b[s]) / 2.0

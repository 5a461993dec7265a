r"""Eligibility-trace control: Sarsa(λ) and Watkins's Q(λ).

Every step computes a one-step TD error :math:`\delta_t`, bumps the trace
of the visited pair and moves every pair with an active trace:

.. math:: Q \leftarrow Q + \alpha\,\delta_t\, z, \qquad z \leftarrow \gamma\lambda z

(see :func:`tdkit.learners._traces_math.trace_step` for the three trace
kinds and the true online form used by ``trace="dutch"``). Traces are kept
sparse, so a step costs :math:`O(\text{active traces})`; they are cleared at
the end of every episode (``terminated`` or ``truncated``), and when a
transition does not start where the previous one ended.

Step sizes and visit counts: ``visits[s, a]`` counts the steps at which
:math:`(s, a)` was the visited pair, and the step size of a step is the
schedule's value for that pair (a constant step size is simply used); all
active traces move with that one step size.
"""

from __future__ import annotations

import numpy as np

from ._commit import CommitsNextAction
from ._targets import greedy_max
from ._traces_math import TraceLearner

__all__ = ["SarsaLambda", "WatkinsQLambda"]


class SarsaLambda(CommitsNextAction, TraceLearner):
    r"""Sarsa(λ): on-policy TD control with eligibility traces.

    .. math::
        \delta_t = R_{t+1} + \gamma Q(S_{t+1}, A_{t+1}) - Q(S_t, A_t), \qquad
        Q \leftarrow Q + \alpha\,\delta_t\,z_t, \qquad z \leftarrow \gamma\lambda z

    :math:`A_{t+1}` is committed as in :class:`~tdkit.Sarsa` (the next
    ``act(next_obs)`` returns it). No bootstrap after ``terminated``; after
    ``truncated`` the error bootstraps with a drawn, uncommitted action. The
    traces are cleared at every episode end. With ``lam=0`` this is
    :class:`~tdkit.Sarsa`.

    Parameters
    ----------
    n_states, n_actions, gamma, step_size, exploration, initial_value, seed
        As for :class:`~tdkit.QLearning`; so are ``state_encoder`` and
        ``action_encoder``.
    lam : float, default 0.9
        Trace decay :math:`\lambda \in [0, 1]`.
    trace : {"accumulating", "replacing", "dutch"}, default "accumulating"
        How the visited pair's trace is bumped: :math:`z \leftarrow z + 1`,
        :math:`z \leftarrow 1`, or the dutch trace
        :math:`z \leftarrow (1 - \alpha) z + 1` with the true online update
        :math:`Q \leftarrow Q + \alpha(\delta + Q_t - Q_{old}) z - \alpha (Q_t - Q_{old}) x_t`
        (van Seijen & Sutton 2014; Sutton & Barto 2018, Section 12.8).
    trace_cutoff : float, default 1e-8
        Traces that decay to this value or below are dropped (``0`` keeps
        every nonzero trace, the exact algorithm).

    Raises
    ------
    ValueError
        If ``lam`` is outside [0, 1], ``trace`` is not one of the three kinds,
        ``trace_cutoff`` is outside [0, 1), or another hyper-parameter is
        out of range.

    References
    ----------
    .. [1] Rummery, G. A. & Niranjan, M. (1994). On-line Q-learning using
       connectionist systems. Technical Report CUED/F-INFENG/TR 166,
       Cambridge University Engineering Department.
    .. [2] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
       Introduction, 2nd ed., Section 12.7 (Sarsa(λ)) and Section 12.8
       (true online Sarsa(λ)).
    .. [3] van Seijen, H. & Sutton, R. S. (2014). True online TD(lambda).
       Proceedings of the 31st ICML.

    Examples
    --------
    A reward of 1 at the end of a two-step episode reaches the first pair
    through its trace (gamma = lambda = 1, alpha = 1/2):

    >>> agent = SarsaLambda(3, 1, lam=1.0, gamma=1.0, step_size=0.5, seed=0)
    >>> agent.observe(0, 0, 0.0, 1, False, False); agent.update()
    (0.0,)
    >>> agent.observe(1, 0, 1.0, 2, True, False); agent.update()
    (1.0,)
    >>> agent.table[:2, 0].tolist()
    [0.5, 0.5]
    """


class WatkinsQLambda(TraceLearner):
    r"""Watkins's Q(λ): off-policy Q-learning with traces cut after exploratory actions.

    .. math::
        \delta_t = R_{t+1} + \gamma \max_{a} Q(S_{t+1}, a) - Q(S_t, A_t), \qquad
        Q \leftarrow Q + \alpha\,\delta_t\,z_t, \qquad z \leftarrow \gamma\lambda z

    Before the trace of :math:`(S_t, A_t)` is bumped, all traces are cleared
    if :math:`A_t` was exploratory, i.e. :math:`Q(S_t, A_t)` is below the
    maximum over the allowed actions (an action tied for the maximum counts
    as greedy). The check uses the table as it is when the transition is
    learned, which is the table the behaviour policy saw when ``act`` ran
    after the previous ``update`` (the order :func:`tdkit.train` uses). The
    max respects ``next_mask``; no bootstrap after ``terminated``; traces are
    cleared at every episode end. With ``lam=0`` this is
    :class:`~tdkit.QLearning`. With ``trace="dutch"`` the true online update
    of Section 12.8 is applied with the Q-learning error along greedy
    stretches (our combination, checked by the tests against Q-learning at
    ``lam=0`` and against :math:`Q^*`).

    Parameters
    ----------
    n_states, n_actions, gamma, step_size, exploration, initial_value, seed
        As for :class:`~tdkit.QLearning`; so are ``state_encoder`` and
        ``action_encoder``.
    lam, trace, trace_cutoff
        As for :class:`SarsaLambda`.

    Raises
    ------
    ValueError
        If ``lam`` is outside [0, 1], ``trace`` is not one of the three kinds,
        ``trace_cutoff`` is outside [0, 1), or another hyper-parameter is
        out of range.

    References
    ----------
    .. [1] Watkins, C. J. C. H. (1989). Learning from Delayed Rewards. PhD
       thesis, King's College, Cambridge.
    .. [2] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
       Introduction, 2nd ed., Section 12.10 (Watkins's Q(λ)).

    Examples
    --------
    >>> agent = WatkinsQLambda(3, 2, lam=1.0, gamma=1.0, step_size=1.0, exploration=0.0, seed=0)
    >>> agent.observe(0, 0, 0.0, 1, False, False); agent.update()
    (0.0,)
    >>> agent.observe(1, 1, 1.0, 2, True, False); agent.update()
    (1.0,)
    >>> float(agent.table[0, 0]), float(agent.table[1, 1])
    (1.0, 1.0)
    """

    def _before_step(self, s: int, a: int) -> None:
        if self._traces:
            row = self._row(s)
            if row[a] < greedy_max(row, self._allowed(self._mask_now)):
                self._traces.clear()

    def _next_value(
        self, s2: int, next_mask: np.ndarray | None, terminated: bool, truncated: bool
    ) -> float:
        if terminated:
            return 0.0
        return greedy_max(self._row(s2), self._allowed(next_mask))

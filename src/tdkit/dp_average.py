r"""Exact average-reward dynamic programming on a :class:`~tdkit.envs.finite.FiniteMDP`.

For a task that never ends, the criterion is the long-run average reward
(the *gain*) of a policy :math:`\pi`,

.. math:: \rho^\pi = \lim_{n\to\infty} \frac{1}{n}\, \mathbb E_\pi
          \Big[\sum_{t=1}^{n} R_t\Big],

and the optimality equation for the gain :math:`\rho^*` and the *bias*
(differential values) :math:`h^*` of a unichain model is

.. math:: h^*(s) + \rho^* = \max_a \Big[ r(s, a) + \sum_{s'} P(s' \mid s, a)\, h^*(s') \Big].

Both functions here ignore ``mdp.gamma``.

Terminal states in a continuing task
------------------------------------
A terminal state of the model is read as "the task restarts": entering it
takes no time step and the next state is drawn from ``mdp.initial``. So a
transition into a terminal state is a transition into a start state, with the
same reward. The reported bias of a terminal state is the value of that
restart, :math:`h(T) = \sum_s \mathrm{initial}(s)\, h(s)`, which is what a
learner bootstraps from there. The average-reward learners of
:mod:`tdkit.learners.differential` use the same reading.

References
----------
Puterman, M. L. (1994). Markov Decision Processes: Discrete Stochastic Dynamic
Programming. Wiley. Section 8.2 (gain and bias), Section 8.5.4 (the
aperiodicity transformation), Section 8.5.5 (relative value iteration),
Section 8.6 (policy iteration).
White, D. J. (1963). Dynamic programming, Markov chains, and the method of
successive approximations. Journal of Mathematical Analysis and Applications
6, 373-376.
Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An Introduction,
2nd ed., MIT Press. Section 10.3 (average reward).
"""

from __future__ import annotations

import numbers
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._errors import InvalidParameterError
from ._model_args import policy_probabilities, require_mdp
from ._validation import require_in_range, require_positive_int
from .envs.finite import FiniteMDP

__all__ = ["AverageSolution", "policy_gain", "relative_value_iteration"]

_APERIODICITY = 0.5
r""":math:`\tau` of the aperiodicity transformation :math:`P_\tau = \tau P + (1-\tau) I`."""

_TIE_ATOL = 1e-9
"""Action values within this of the state's best count as ties (lowest index wins)."""


@dataclass(frozen=True)
class AverageSolution:
    r"""Result of :func:`relative_value_iteration`.

    Attributes
    ----------
    gain : float
        The optimal long-run average reward :math:`\rho^*`; within
        ``residual / 2`` of the exact value.
    bias : ndarray, shape (S,)
        Differential values :math:`h^*`, zero at the reference state (terminal
        states hold the value of the restart, see the module notes).
    q : ndarray, shape (S, A)
        :math:`r(s, a) - \rho^* + \sum_{s'} P(s' \mid s, a) h^*(s')`: the
        differential action values a differential learner's table approaches
        up to one additive constant.
    policy : ndarray of int, shape (S,)
        A greedy policy of ``q`` (lowest action index among ties within 1e-9).
    iterations : int
        Sweeps of relative value iteration.
    residual : float
        Span of :math:`T h - h` for the transformed operator at the last
        sweep; the gain lies in ``[gain - residual / 2, gain + residual / 2]``.
    """

    gain: float
    bias: np.ndarray
    q: np.ndarray
    policy: np.ndarray
    iterations: int
    residual: float


# ---------------------------------------------------------------- helpers
def _expected_next(mdp: FiniteMDP, h: np.ndarray) -> np.ndarray:
    r""":math:`\sum_{s'} P(s' \mid s, a) h(s')` with a terminal successor read as a restart.

    Writes the restart value ``initial @ h`` into the terminal entries of ``h``
    (in place) first, so a transition into a terminal state is worth what a
    fresh start is worth.
    """
    terminal = mdp.terminal
    if terminal.any():
        h[terminal] = 0.0
        h[terminal] = mdp.initial @ h
    return mdp.expected_next(h)


def _greedy(q: np.ndarray) -> np.ndarray:
    best = q.max(axis=1, keepdims=True)
    policy = np.argmax(q >= best - _TIE_ATOL, axis=1).astype(np.intp)
    policy.flags.writeable = False
    return policy


# ---------------------------------------------------------------- solver
def relative_value_iteration(
    mdp: FiniteMDP,
    *,
    tol: float = 1e-9,
    reference_state: int = 0,
    max_iterations: int = 1_000_000,
) -> AverageSolution:
    r"""Optimal gain, bias and policy of a continuing task by relative value iteration.

    Relative value iteration (White 1963) iterates the Bellman optimality
    operator and subtracts the value of a reference state each sweep, so the
    iterates stay bounded. It is run on the *aperiodicity transformation*
    :math:`P_\tau = \tau P + (1 - \tau) I` with :math:`\tau = 1/2` (Puterman
    1994, Section 8.5.4): every policy's chain gains a self-loop, so
    periodic chains (where plain iteration oscillates forever) converge, while
    the gain of every policy is unchanged and the bias is scaled by
    :math:`1/\tau` (undone before returning):

    .. math::
        w_{n+1} = T_\tau w_n - (T_\tau w_n)(s_\text{ref}), \qquad
        (T_\tau w)(s) = \max_a \big[ r(s,a) + \tau \textstyle\sum_{s'} P(s'\mid s,a) w(s')
        \big] + (1-\tau) w(s).

    It stops when the span :math:`\max(T_\tau w - w) - \min(T_\tau w - w)`
    is at most ``tol``; the gain lies between that min and max (Puterman
    1994, Theorem 8.5.5), and the midpoint is returned. ``mdp.gamma`` is
    ignored; terminal states restart the task (see the module notes).

    Parameters
    ----------
    mdp : FiniteMDP
        A model in which every policy's chain is unichain, or at least whose
        optimal gain is the same from every state (weakly communicating).
    tol : float, default 1e-9
        Target span; the gain is then exact to within ``tol / 2``.
    reference_state : int, default 0
        The state whose bias is 0; must not be terminal.
    max_iterations : int, default 1_000_000

    Returns
    -------
    AverageSolution
        ``gain``, ``bias`` (zero at ``reference_state``), ``q``, ``policy``,
        ``iterations``, ``residual``.

    Raises
    ------
    InvalidParameterError
        If ``mdp`` is not a FiniteMDP, a parameter is out of range, or the span
        does not fall below ``tol`` within ``max_iterations`` (which is what
        a multichain model, whose optimal gain differs between states, does).

    References
    ----------
    .. [1] White, D. J. (1963). Dynamic programming, Markov chains, and the
       method of successive approximations. J. Math. Anal. Appl. 6, 373-376.
    .. [2] Puterman, M. L. (1994). Markov Decision Processes. Wiley. Sections
       8.5.4 and 8.5.5.

    Examples
    --------
    Two states. In state 0, action 0 stays and pays 1; action 1 pays 3 and
    moves to state 1, which pays nothing and returns. Alternating earns 3
    every two steps, a gain of 1.5, against 1 for staying.

    >>> import numpy as np
    >>> from tdkit import FiniteMDP
    >>> P = np.zeros((2, 2, 2))
    >>> P[0, 0, 0] = P[0, 1, 1] = P[1, :, 0] = 1.0
    >>> R = np.array([[1.0, 3.0], [0.0, 0.0]])
    >>> sol = relative_value_iteration(FiniteMDP(P, R, gamma=0.9))
    >>> round(sol.gain, 6), sol.policy.tolist()
    (1.5, [1, 0])
    >>> sol.bias.round(6).tolist()
    [0.0, -1.5]
    """
    owner = "relative_value_iteration"
    mdp = require_mdp(owner, mdp)
    tol = require_in_range(owner, "tol", tol, 0.0, np.inf, low_open=True, high_open=True)
    max_iterations = require_positive_int(owner, "max_iterations", max_iterations)
    ref = _require_state(owner, mdp, reference_state)
    tau = _APERIODICITY
    rewards = mdp.R
    if mdp.masks is not None:  # masked actions never enter the max (their q is -inf)
        rewards = np.where(mdp.masks, rewards, -np.inf)
    w = np.zeros(mdp.n_states)
    span = np.inf
    for iteration in range(1, max_iterations + 1):
        backed = (rewards + tau * _expected_next(mdp, w)).max(axis=1) + (1.0 - tau) * w
        diff = backed - w
        live = ~mdp.terminal
        low, high = float(diff[live].min()), float(diff[live].max())
        span = high - low
        w = backed - backed[ref]
        if span <= tol:
            gain = 0.5 * (low + high)
            bias = tau * w
            q = rewards - gain + _expected_next(mdp, bias)
            bias.flags.writeable = False
            q.flags.writeable = False
            return AverageSolution(
                gain=gain, bias=bias, q=q, policy=_greedy(q), iterations=iteration,
                residual=span,
            )
    raise InvalidParameterError(
        f"{owner}: the span of T h - h is still {span:.3g} > tol={tol:g} after "
        f"max_iterations={max_iterations}. Raise max_iterations or tol; if it does not "
        "shrink, the model is multichain (its optimal gain differs between states) and has "
        "no single gain."
    )


def _require_state(owner: str, mdp: FiniteMDP, state: Any) -> int:
    if isinstance(state, bool) or not isinstance(state, numbers.Integral) or not (
        0 <= state < mdp.n_states
    ):
        raise InvalidParameterError(
            f"{owner}: reference_state must be a state index in [0, {mdp.n_states}); "
            f"got {state!r}."
        )
    if mdp.terminal[state]:
        raise InvalidParameterError(
            f"{owner}: reference_state={state!r} is a terminal state, which the continuing "
            "task never occupies (it restarts); pick a non-terminal state."
        )
    return int(state)


# ---------------------------------------------------------------- gain of a policy
def _restart_chain(mdp: FiniteMDP, probs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The policy's chain on the live states, with terminal successors read as restarts."""
    live = np.flatnonzero(~mdp.terminal)
    dense = mdp.P  # (S, A, S); built and cached for sparse models
    chain = np.einsum("sa,sat->st", probs[live], dense[live])
    into_terminal = chain[:, mdp.terminal].sum(axis=1)
    chain = chain[:, live] + into_terminal[:, None] * mdp.initial[live][None, :]
    rewards = (probs[live] * mdp.R[live]).sum(axis=1)
    return chain, rewards


def _reach(adjacency: np.ndarray, start: int) -> np.ndarray:
    """Boolean (n,) mask of the states reachable from ``start`` (including it)."""
    seen = np.zeros(adjacency.shape[0], dtype=bool)
    seen[start] = True
    frontier = seen.copy()
    while frontier.any():
        frontier = adjacency[frontier].any(axis=0) & ~seen
        seen |= frontier
    return seen


def _recurrent_state(adjacency: np.ndarray) -> int:
    """A state in some closed communicating class (walk down until nothing escapes)."""
    x = 0
    while True:
        forward = _reach(adjacency, x)
        backward = _reach(adjacency.T, x)
        escaped = forward & ~backward
        if not escaped.any():
            return x
        x = int(np.argmax(escaped))  # reach(x) shrinks strictly: at most n steps


def policy_gain(mdp: FiniteMDP, policy: Any) -> float:
    r"""The exact long-run average reward of a policy: :math:`\rho^\pi = \mu_\pi \cdot r_\pi`.

    :math:`\mu_\pi` is the stationary distribution of the policy's chain,
    solved from :math:`\mu (I - P_\pi) = 0`, :math:`\mu \mathbf 1 = 1`. The
    chain must be *unichain* (exactly one closed communicating class, plus any
    transient states), so the gain does not depend on the start state; this
    is checked exactly on the chain's graph. ``mdp.gamma`` is ignored;
    terminal states restart the task from ``mdp.initial`` (module notes).

    Parameters
    ----------
    mdp : FiniteMDP
    policy : array_like
        ``(S,)`` action indices or ``(S, A)`` action probabilities.

    Returns
    -------
    float

    Raises
    ------
    InvalidParameterError
        If the policy is malformed, or its chain has more than one closed
        class (multichain), in which case no single gain exists.

    Notes
    -----
    The chain is built densely (``S x S``) and solved directly, which suits
    models up to a few thousand states; :func:`relative_value_iteration`
    works through ``mdp.expected_next`` and handles the sparse large ones.

    References
    ----------
    .. [1] Puterman, M. L. (1994). Markov Decision Processes. Wiley. Section
       8.2 (gain of a stationary policy) and Appendix A (stationary
       distributions of unichain chains).

    Examples
    --------
    >>> import numpy as np
    >>> from tdkit import FiniteMDP
    >>> P = np.zeros((2, 2, 2))
    >>> P[0, 0, 0] = P[0, 1, 1] = P[1, :, 0] = 1.0
    >>> mdp = FiniteMDP(P, [[1.0, 3.0], [0.0, 0.0]], gamma=0.9)
    >>> policy_gain(mdp, [0, 0]), policy_gain(mdp, [1, 0])
    (1.0, 1.5)
    """
    owner = "policy_gain"
    mdp = require_mdp(owner, mdp)
    probs = policy_probabilities(owner, mdp, policy)
    chain, rewards = _restart_chain(mdp, probs)
    n = chain.shape[0]
    adjacency = chain > 0
    anchor = _recurrent_state(adjacency)
    reaches_anchor = _reach(adjacency.T, anchor)
    if not reaches_anchor.all():
        live = np.flatnonzero(~mdp.terminal)
        stuck = int(live[int(np.argmax(~reaches_anchor))])
        raise InvalidParameterError(
            f"{owner}: the policy's chain is multichain: state {stuck} never reaches state "
            f"{int(live[anchor])}, which lies in a closed class, so the long-run average reward "
            "depends on the start state and no single gain exists. Use a policy that reaches "
            "one recurrent class from every state."
        )
    system = (np.eye(n) - chain).T
    system[-1, :] = 1.0
    rhs = np.zeros(n)
    rhs[-1] = 1.0
    stationary = np.linalg.solve(system, rhs)
    return float(stationary @ rewards)

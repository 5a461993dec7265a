r"""Exact dynamic programming on a :class:`~tdkit.envs.finite.FiniteMDP`.

Every function goes through one operation of the model,
:meth:`FiniteMDP.expected_next` (:math:`\sum_{s'} P(s' \mid s, a) v(s')`),
via :func:`action_values`; so the Bellman mathematics is written once and the
dense and sparse forms give the same answers.

Conventions: terminal states are absorbing with value 0; ``policy`` is either
an ``(S,)`` array of action indices or an ``(S, A)`` array of action
probabilities; all norms are sup norms.

References
----------
Bellman, R. (1957). Dynamic Programming. Princeton University Press.
Howard, R. A. (1960). Dynamic Programming and Markov Processes. MIT Press.
Puterman, M. L. (1994). Markov Decision Processes: Discrete Stochastic Dynamic
Programming. Wiley. Theorem 6.3.1 (value iteration stopping rule), Section 6.4
(policy iteration).
Williams, R. J. & Baird, L. C. (1993). Tight performance bounds on greedy
policies based on imperfect value functions. Northeastern University,
Technical Report NU-CCS-93-14.
Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An Introduction,
2nd ed., MIT Press. Chapter 4.
"""

from __future__ import annotations

import math
import numbers
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np

from ._errors import InvalidParameterError
from ._validation import require_in_range, require_positive_int
from .envs.finite import FiniteMDP

__all__ = [
    "GreedyPolicy",
    "Solution",
    "action_values",
    "bellman_expectation_operator",
    "bellman_optimality_operator",
    "bellman_residual",
    "evaluate_policy",
    "greedy_policy",
    "policy_iteration",
    "value_iteration",
]

_STALL_SWEEPS = 50
"""Sweeps without a new minimum change after which value iteration blames rounding."""

_DIRECT_LIMIT = 3000
"""Largest number of non-terminal states solved by a dense linear solve."""


@dataclass(frozen=True)
class Solution:
    """Result of :func:`value_iteration` or :func:`policy_iteration`.

    Attributes
    ----------
    q : ndarray, shape (S, A)
        Action values, ``action_values(mdp, v)``.
    v : ndarray, shape (S,)
        State values.
    policy : ndarray of int, shape (S,)
        A greedy policy of ``q`` (lowest action index among ties; use
        :func:`greedy_policy` to see every tie).
    iterations : int
        Sweeps of value iteration, or improvement steps of policy iteration.
    residual : float
        Bellman optimality residual of ``v``: ``max |T v - v|``.
    """

    q: np.ndarray
    v: np.ndarray
    policy: np.ndarray
    iterations: int
    residual: float


class GreedyPolicy(NamedTuple):
    """A greedy policy with its ties reported (see :func:`greedy_policy`)."""

    policy: np.ndarray
    """(S,) int: the lowest-index maximising action of each state."""
    maximisers: np.ndarray
    """(S, A) bool: every action within ``atol`` of the state's maximum."""

    @property
    def ties(self) -> np.ndarray:
        """(S,) bool: states with more than one maximising action."""
        return self.maximisers.sum(axis=1) > 1

    def stochastic(self) -> np.ndarray:
        """(S, A) probabilities spreading each state uniformly over its maximisers."""
        weights = self.maximisers.astype(np.float64)
        return weights / weights.sum(axis=1, keepdims=True)


# ---------------------------------------------------------------- validation
def _check_mdp(owner: str, mdp: Any) -> FiniteMDP:
    if not isinstance(mdp, FiniteMDP):
        raise InvalidParameterError(
            f"{owner}: mdp must be a tdkit.FiniteMDP; got {type(mdp).__name__}. "
            "Build one with FiniteMDP(P, R, gamma=...) or FiniteMDP.from_gymnasium(env)."
        )
    return mdp


def _check_values(owner: str, name: str, values: Any, shape: tuple[int, ...]) -> np.ndarray:
    array = np.asarray(values, dtype=np.float64)
    if array.shape != shape:
        raise InvalidParameterError(
            f"{owner}: {name} must have shape {shape}; got shape {array.shape}."
        )
    if not np.isfinite(array).all():
        raise InvalidParameterError(f"{owner}: {name} must be finite; got {values!r:.80}.")
    return array


def _policy_probabilities(owner: str, mdp: FiniteMDP, policy: Any) -> np.ndarray:
    """Return ``policy`` as an (S, A) probability array, validated."""
    n, m = mdp.n_states, mdp.n_actions
    array = np.asarray(policy)
    if array.shape == (n,):
        if not np.issubdtype(array.dtype, np.integer):
            if not (np.issubdtype(array.dtype, np.floating) and (array == np.round(array)).all()):
                raise InvalidParameterError(
                    f"{owner}: a deterministic policy must hold action indices (ints); "
                    f"got dtype {array.dtype}."
                )
            array = array.astype(np.intp)
        bad = (array < 0) | (array >= m)
        if bad.any():
            s = int(np.argmax(bad))
            raise InvalidParameterError(
                f"{owner}: policy[{s}] = {int(array[s])!r} is not an action index in [0, {m})."
            )
        probs = np.zeros((n, m))
        probs[np.arange(n), array] = 1.0
        return probs
    if array.shape == (n, m):
        probs = _check_values(owner, "policy", array, (n, m))
        if (probs < 0).any():
            s, a = (int(i) for i in np.argwhere(probs < 0)[0])
            raise InvalidParameterError(
                f"{owner}: policy[{s}, {a}] = {float(probs[s, a])!r} is negative; action "
                "probabilities must be >= 0."
            )
        sums = probs.sum(axis=1)
        off = np.abs(sums - 1.0) > 1e-8
        if off.any():
            s = int(np.argmax(off))
            raise InvalidParameterError(
                f"{owner}: policy[{s}, :] sums to {float(sums[s])!r}; action probabilities of "
                "each state must sum to 1."
            )
        return probs / sums[:, None]
    raise InvalidParameterError(
        f"{owner}: policy must have shape (S,) = ({n},) (action indices) or (S, A) = "
        f"({n}, {m}) (probabilities); got shape {array.shape}."
    )


# ---------------------------------------------------------------- Bellman operators
def _action_values(mdp: FiniteMDP, v: np.ndarray) -> np.ndarray:
    # Terminal rows of the model are zero-reward self-loops, so once v is 0 on
    # terminal states their rows of q are exactly 0 as well.
    terminal = mdp.terminal
    if terminal.any():
        v = np.where(terminal, 0.0, v)
    return mdp.R + mdp.gamma * mdp.expected_next(v)


def action_values(mdp: FiniteMDP, v: Any) -> np.ndarray:
    r"""One-step look-ahead :math:`q(s, a) = R(s, a) + \gamma \sum_{s'} P(s' \mid s, a) v(s')`.

    Terminal states count as value 0 whatever ``v`` holds there, and their
    rows of the result are 0.

    Parameters
    ----------
    mdp : FiniteMDP
    v : array_like, shape (S,)

    Returns
    -------
    ndarray, shape (S, A)

    Examples
    --------
    >>> import numpy as np
    >>> from tdkit.envs.finite import FiniteMDP
    >>> P = np.zeros((2, 2, 2)); P[0, 0, 0] = P[0, 1, 1] = 1.0
    >>> mdp = FiniteMDP(P, [[0.0, 1.0], [0.0, 0.0]], gamma=0.5, terminal=[False, True])
    >>> action_values(mdp, np.array([2.0, 99.0]))
    array([[1., 1.],
           [0., 0.]])
    """
    mdp = _check_mdp("action_values", mdp)
    return _action_values(mdp, _check_values("action_values", "v", v, (mdp.n_states,)))


def bellman_optimality_operator(mdp: FiniteMDP, v: Any) -> np.ndarray:
    r"""Apply :math:`(T v)(s) = \max_a q(s, a)` with ``q = action_values(mdp, v)``.

    ``T`` is a ``gamma``-contraction in the sup norm (Puterman 1994, Prop. 6.2.4).

    Returns
    -------
    ndarray, shape (S,)
    """
    mdp = _check_mdp("bellman_optimality_operator", mdp)
    v = _check_values("bellman_optimality_operator", "v", v, (mdp.n_states,))
    return _action_values(mdp, v).max(axis=1)


def bellman_expectation_operator(mdp: FiniteMDP, v: Any, policy: Any) -> np.ndarray:
    r"""Apply :math:`(T_\pi v)(s) = \sum_a \pi(a \mid s)\, q(s, a)`, ``q = action_values(mdp, v)``.

    Returns
    -------
    ndarray, shape (S,)
    """
    owner = "bellman_expectation_operator"
    mdp = _check_mdp(owner, mdp)
    v = _check_values(owner, "v", v, (mdp.n_states,))
    pi = _policy_probabilities(owner, mdp, policy)
    return (pi * _action_values(mdp, v)).sum(axis=1)


def bellman_residual(mdp: FiniteMDP, q: Any, policy: Any = None) -> float:
    r"""Sup-norm Bellman residual of action values ``q`` (or state values ``v``).

    For ``q`` of shape ``(S, A)`` this is :math:`\max_{s,a} |(T q)(s, a) - q(s, a)|`
    with :math:`(T q)(s, a) = R(s, a) + \gamma \sum_{s'} P(s' \mid s, a)\, u(s')`,
    where :math:`u(s') = \max_{a'} q(s', a')` (optimality, ``policy=None``) or
    :math:`u(s') = \sum_{a'} \pi(a' \mid s') q(s', a')` (the given policy).
    For ``v`` of shape ``(S,)`` it is :math:`\max_s |(T v)(s) - v(s)|` with the
    optimality operator or :math:`T_\pi`.

    A small residual bounds the error: for ``gamma < 1``,
    :math:`\|v - v^*\|_\infty \le \text{residual} / (1 - \gamma)`
    (Puterman 1994, Theorem 6.2.3 / Williams & Baird 1993).

    Parameters
    ----------
    mdp : FiniteMDP
    q : array_like, shape (S, A) or (S,)
    policy : array_like, optional
        ``(S,)`` action indices or ``(S, A)`` probabilities.

    Returns
    -------
    float

    Examples
    --------
    >>> import numpy as np
    >>> from tdkit.envs.finite import FiniteMDP
    >>> P = np.ones((1, 1, 1))
    >>> mdp = FiniteMDP(P, [[1.0]], gamma=0.5)      # v* = 1 / (1 - 0.5) = 2
    >>> bellman_residual(mdp, np.array([2.0]))
    0.0
    >>> bellman_residual(mdp, np.array([[1.0]]))     # T q = 1 + 0.5 * 1
    0.5
    """
    owner = "bellman_residual"
    mdp = _check_mdp(owner, mdp)
    array = np.asarray(q, dtype=np.float64)
    pi = None if policy is None else _policy_probabilities(owner, mdp, policy)
    if array.ndim == 1:
        v = _check_values(owner, "v", array, (mdp.n_states,))
        look_ahead = _action_values(mdp, v)
        target = look_ahead.max(axis=1) if pi is None else (pi * look_ahead).sum(axis=1)
        return float(np.max(np.abs(target - v)))
    q = _check_values(owner, "q", array, (mdp.n_states, mdp.n_actions))
    u = q.max(axis=1) if pi is None else (pi * q).sum(axis=1)
    return float(np.max(np.abs(_action_values(mdp, u) - q)))


def greedy_policy(q: Any, *, atol: float = 1e-9) -> GreedyPolicy:
    """Greedy policy of action values, with ties reported.

    Parameters
    ----------
    q : array_like, shape (S, A)
    atol : float, default 1e-9
        Actions within ``atol`` of a state's maximum count as maximisers.

    Returns
    -------
    GreedyPolicy
        ``policy`` (lowest-index maximiser per state, deterministic),
        ``maximisers`` (all of them), ``ties`` and ``stochastic()``.

    Examples
    --------
    >>> g = greedy_policy([[1.0, 3.0, 3.0], [0.0, -1.0, -2.0]])
    >>> g.policy
    array([1, 0])
    >>> g.ties
    array([ True, False])
    >>> g.stochastic()
    array([[0. , 0.5, 0.5],
           [1. , 0. , 0. ]])
    """
    owner = "greedy_policy"
    array = np.asarray(q, dtype=np.float64)
    if array.ndim != 2 or array.shape[1] < 1:
        raise InvalidParameterError(
            f"{owner}: q must have shape (S, A) with A >= 1; got shape {array.shape}."
        )
    array = _check_values(owner, "q", array, array.shape)
    atol = require_in_range(owner, "atol", atol, 0.0, math.inf)
    maximisers = array >= array.max(axis=1, keepdims=True) - atol
    return GreedyPolicy(np.argmax(maximisers, axis=1), maximisers)


# ---------------------------------------------------------------- policy evaluation
def _induced_chain(mdp: FiniteMDP, pi: np.ndarray) -> FiniteMDP:
    r"""The Markov chain of policy ``pi`` as a one-action model in the successor form.

    Its single action has the successors of every action of ``mdp`` weighted
    by ``pi`` (only the chosen action's when ``pi`` is deterministic) and the
    expected reward ``sum_a pi(a|s) R(s, a)``; so ``action_values(chain, v)[:, 0]``
    is :math:`T_\pi v` and every evaluation method reuses the one Bellman
    operation.
    """
    next_states, probs, _ = mdp.successors
    n = mdp.n_states
    if ((pi == 0.0) | (pi == 1.0)).all():
        chosen = np.argmax(pi, axis=1)
        rows = np.arange(n)
        nxt = next_states[rows, chosen][:, None, :]
        weights = probs[rows, chosen][:, None, :]
    else:
        nxt = next_states.reshape(n, 1, -1)
        weights = (pi[:, :, None] * probs).reshape(n, 1, -1)
    rewards = (pi * mdp.R).sum(axis=1)[:, None]
    return FiniteMDP.from_successors(
        nxt, weights, rewards, gamma=mdp.gamma, terminal=mdp.terminal, initial=mdp.initial
    )


def _proper_or_raise(owner: str, chain: FiniteMDP) -> None:
    """Raise unless a terminal state is reachable from every state of the chain.

    In a finite Markov chain this is equivalent to every non-terminal state
    being transient, i.e. to the undiscounted return being finite (Bertsekas
    & Tsitsiklis 1996, Neuro-Dynamic Programming, Section 2.1: proper policies).
    """
    next_states, probs, _ = chain.successors
    into = probs[:, 0] > 0
    targets = next_states[:, 0]
    reach = chain.terminal.copy()
    while True:
        grown = reach | (into & reach[targets]).any(axis=1)
        if (grown == reach).all():
            break
        reach = grown
    if not reach.all():
        stuck = np.flatnonzero(~reach)
        raise InvalidParameterError(
            f"{owner}: with gamma=1 the policy must be proper (reach a terminal state with "
            f"probability 1), but from state(s) {stuck[:10].tolist()} no terminal state is "
            "reachable under it, so the return is undefined. Use gamma < 1 or a policy that "
            "terminates."
        )


def _chain_system(chain: FiniteMDP) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Coordinates of ``gamma P_pi`` restricted to non-terminal states, and ``r_pi`` there.

    Returns ``(live, rows, cols, values)`` with duplicates not yet summed;
    transitions into terminal states are dropped (their value is 0).
    """
    live = np.flatnonzero(~chain.terminal)
    index = np.full(chain.n_states, -1, dtype=np.intp)
    index[live] = np.arange(live.size)
    next_states, probs, _ = chain.successors
    cols = index[next_states[live, 0]]
    weights = probs[live, 0]
    rows = np.broadcast_to(np.arange(live.size)[:, None], weights.shape)
    keep = (cols >= 0) & (weights > 0)
    return live, rows[keep], cols[keep], chain.gamma * weights[keep]


def _evaluate_direct(chain: FiniteMDP) -> np.ndarray:
    """Solve (I - gamma P_pi) v = r_pi on the non-terminal states with a dense solve."""
    live, rows, cols, values = _chain_system(chain)
    system = np.eye(live.size)
    np.add.at(system, (rows, cols), -values)
    v = np.zeros(chain.n_states)
    v[live] = np.linalg.solve(system, chain.R[live, 0])
    return v


def _evaluate_krylov(chain: FiniteMDP, tol: float) -> tuple[np.ndarray, bool] | None:
    """Solve the same system with scipy's sparse GMRES; None if scipy is unavailable.

    GMRES (relative tolerance 1e-6) is followed by rounds of iterative
    refinement until the sup norm of the residual ``r_pi - (I - gamma P_pi) v``
    is below ``tol (1 - gamma)``, which bounds the sup-norm error by ``tol``
    since ``||(I - gamma P_pi)^-1||_inf <= 1 / (1 - gamma)``. (For gamma = 1 the
    target is ``tol / 1000``, without such a bound.) Returns the solution and
    whether the target was met within 6 rounds.
    """
    try:
        from scipy import sparse
        from scipy.sparse import linalg as sparse_linalg
    except ImportError:
        return None
    live, rows, cols, values = _chain_system(chain)
    system = sparse.identity(live.size, format="csr") - sparse.csr_matrix(
        (values, (rows, cols)), shape=(live.size, live.size)
    )
    r_pi = chain.R[live, 0]
    target = tol * (1.0 - chain.gamma) if chain.gamma < 1.0 else tol * 1e-3
    solved = np.zeros(live.size)
    met = False
    for _ in range(6):
        residual = r_pi - system @ solved
        if float(np.max(np.abs(residual), initial=0.0)) <= target:
            met = True
            break
        try:
            step, _info = sparse_linalg.gmres(
                system, residual, rtol=1e-6, atol=0.0, restart=60, maxiter=50
            )
        except TypeError:  # scipy < 1.12 calls rtol "tol"
            step, _info = sparse_linalg.gmres(
                system, residual, tol=1e-6, atol=0.0, restart=60, maxiter=50
            )
        solved = solved + step
    v = np.zeros(chain.n_states)
    v[live] = solved
    return v, met


def _fixed_point(
    owner: str,
    step: Callable[[np.ndarray], np.ndarray],
    v: np.ndarray,
    threshold: float,
    max_iterations: int,
) -> tuple[np.ndarray, int]:
    """Iterate ``v <- step(v)`` until the sup-norm change is below ``threshold``.

    Returns the last iterate and the number of sweeps. For a gamma-contraction
    the change shrinks by at least gamma per sweep, so if it makes no new
    minimum for ``_STALL_SWEEPS`` sweeps rounding noise has been reached (or,
    with gamma = 1, the values do not converge); iteration then stops with a
    ``RuntimeWarning``, as it does when ``max_iterations`` is reached.
    """
    best_change, best_sweep = math.inf, 0
    change = math.inf
    for sweep in range(1, max_iterations + 1):
        new = step(v)
        change = float(np.max(np.abs(new - v), initial=0.0))
        v = new
        if change < threshold:
            return v, sweep
        if change < best_change:
            best_change, best_sweep = change, sweep
        elif sweep - best_sweep >= _STALL_SWEEPS:
            warnings.warn(
                f"{owner}: the change between sweeps stopped decreasing at about "
                f"{best_change:.3g}, above the threshold {threshold:.3g} (rounding noise for "
                "values this large, or with gamma=1 a policy that never terminates); "
                "stopping. Use a larger tol.",
                RuntimeWarning,
                stacklevel=3,
            )
            return v, sweep
    warnings.warn(
        f"{owner}: stopped after max_iterations={max_iterations} sweeps with last change "
        f"{change:.3g} above the threshold {threshold:.3g}; the error bound does not hold. "
        "Raise max_iterations (with gamma=1, check that the policies terminate).",
        RuntimeWarning,
        stacklevel=3,
    )
    return v, max_iterations


def _evaluate_iterative(
    chain: FiniteMDP, tol: float, max_iterations: int, v0: np.ndarray | None
) -> np.ndarray:
    """Iterate v <- T_pi v until the change is below tol (1 - gamma) / gamma."""
    gamma = chain.gamma
    if gamma == 0.0:
        threshold = math.inf
    else:
        threshold = tol * (1.0 - gamma) / gamma if gamma < 1.0 else tol
    v = np.zeros(chain.n_states) if v0 is None else v0

    def step(values: np.ndarray) -> np.ndarray:
        return _action_values(chain, values)[:, 0]

    return _fixed_point("evaluate_policy", step, v, threshold, max_iterations)[0]


def evaluate_policy(
    mdp: FiniteMDP,
    policy: Any,
    *,
    method: str = "auto",
    tol: float = 1e-10,
    max_iterations: int = 1_000_000,
) -> np.ndarray:
    r"""Exact value :math:`v_\pi` of a policy: solve :math:`v = r_\pi + \gamma P_\pi v`.

    The system is solved on the non-terminal states only (terminal states
    have value 0), so ``gamma = 1`` works for proper policies, i.e. policies
    that reach a terminal state with probability 1 from every state; an
    improper policy with ``gamma = 1`` raises.

    Parameters
    ----------
    mdp : FiniteMDP
    policy : array_like
        ``(S,)`` action indices or ``(S, A)`` action probabilities.
    method : {"auto", "direct", "sparse", "iterative"}
        ``"direct"``: dense linear solve (numpy). ``"sparse"``: scipy's sparse
        GMRES (needs scipy). ``"iterative"``: repeated application of
        :math:`T_\pi` until the change is below ``tol (1 - gamma) / gamma``,
        which bounds the error by ``tol`` for ``gamma < 1`` (for ``gamma = 1``
        the change itself is compared with ``tol``). ``"auto"``: direct for at
        most 3000 non-terminal states, else sparse, else iterative.
    tol : float, default 1e-10
        Target accuracy of the iterative methods.
    max_iterations : int, default 1_000_000
        Cap on iterative sweeps (a ``RuntimeWarning`` is issued when reached).

    Returns
    -------
    ndarray, shape (S,)

    Raises
    ------
    InvalidParameterError
        On a malformed policy or method, or an improper policy with ``gamma = 1``.

    Examples
    --------
    Equiprobable random walk with 3 non-terminal states, +1 on the right end
    (Sutton & Barto 2018, Example 6.2 with 3 states): true values 1/4, 1/2, 3/4.

    >>> from tdkit.envs.problems import random_walk
    >>> mdp = random_walk(3)
    >>> evaluate_policy(mdp, [0] * 5).round(12)
    array([0.  , 0.25, 0.5 , 0.75, 0.  ])
    """
    owner = "evaluate_policy"
    mdp = _check_mdp(owner, mdp)
    pi = _policy_probabilities(owner, mdp, policy)
    if method not in ("auto", "direct", "sparse", "iterative"):
        raise InvalidParameterError(
            f"{owner}: method must be 'auto', 'direct', 'sparse' or 'iterative'; "
            f"got {method!r}."
        )
    tol = require_in_range(owner, "tol", tol, 0.0, math.inf, low_open=True)
    max_iterations = require_positive_int(owner, "max_iterations", max_iterations)
    chain = _induced_chain(mdp, pi)
    if mdp.gamma == 1.0:
        _proper_or_raise(owner, chain)
    n_live = int((~mdp.terminal).sum())
    if method == "direct" or (method == "auto" and n_live <= _DIRECT_LIMIT):
        return _evaluate_direct(chain)
    start = None
    if method in ("sparse", "auto"):
        solved = _evaluate_krylov(chain, tol)
        if solved is None and method == "sparse":
            raise InvalidParameterError(
                f"{owner}: method='sparse' needs scipy (pip install scipy); "
                "use method='iterative'."
            )
        if solved is not None:
            if solved[1]:
                return solved[0]
            start = solved[0]  # refinement missed its target: polish by iteration
    return _evaluate_iterative(chain, tol, max_iterations, start)


# ---------------------------------------------------------------- control
def _finish(mdp: FiniteMDP, v: np.ndarray, iterations: int) -> Solution:
    q = _action_values(mdp, v)
    residual = float(np.max(np.abs(q.max(axis=1) - v)))
    q.flags.writeable = False
    v = v.copy()
    v.flags.writeable = False
    policy = greedy_policy(q).policy
    policy.flags.writeable = False
    return Solution(q=q, v=v, policy=policy, iterations=iterations, residual=residual)


def value_iteration(
    mdp: FiniteMDP,
    *,
    tol: float = 1e-10,
    max_iterations: int | None = None,
    v0: Any = None,
) -> Solution:
    r"""Value iteration :math:`v_{k+1} = T v_k` with a stopping rule that bounds the error.

    Stopping rule for ``gamma < 1``: stop at the first ``k`` with
    :math:`\|v_{k+1} - v_k\|_\infty < \text{tol}\,(1 - \gamma) / (2\gamma)`.
    Then (Puterman 1994, Theorem 6.3.1; Williams & Baird 1993)

    * :math:`\|v_{k+1} - v^*\|_\infty < \text{tol} / 2`: the returned ``v`` is
      within ``tol / 2`` of :math:`v^*`;
    * the greedy policy of ``q`` is ``tol``-optimal:
      :math:`\|v_\pi - v^*\|_\infty < \text{tol}`;
    * ``residual`` :math:`= \|T v - v\|_\infty < \text{tol}\,(1 - \gamma) / 2`.

    Rounding limits how small the change can get: if the change stops
    reaching new minima for 50 sweeps (impossible in exact arithmetic, where
    it shrinks by ``gamma`` per sweep), iteration stops with a
    ``RuntimeWarning`` (the bound then holds up to rounding).

    For ``gamma = 1`` there is no contraction bound; iteration stops when the
    change :math:`\|v_{k+1} - v_k\|_\infty = \|T v_k - v_k\|_\infty` falls
    below ``tol``; ``T`` is non-expansive, so the returned :math:`v_{k+1}` has
    residual below ``tol`` as well. The values
    converge to :math:`v^*` when every policy is proper, or when improper
    policies have return :math:`-\infty` (Bertsekas & Tsitsiklis 1996,
    Proposition 2.2); the distance to :math:`v^*` is then at most ``tol``
    times the longest expected time to termination.

    Parameters
    ----------
    mdp : FiniteMDP
    tol : float, default 1e-10
        Accuracy target (see the stopping rule).
    max_iterations : int, optional
        Cap on sweeps. Default: the number of sweeps the contraction bound
        says suffice, plus 100 (gamma < 1), or 1,000,000 (gamma = 1). A
        ``RuntimeWarning`` is issued if the cap is reached.
    v0 : array_like, shape (S,), optional
        Starting values (default 0).

    Returns
    -------
    Solution
        ``v`` the last iterate, ``q = action_values(mdp, v)``, ``policy`` greedy
        in ``q``, ``iterations`` the number of sweeps, ``residual`` as above.

    Examples
    --------
    Sutton & Barto (2018), Example 4.1 gridworld: from the cell next to a
    terminal corner the optimal return is -1.

    >>> from tdkit.envs.problems import gridworld_4x4
    >>> sol = value_iteration(gridworld_4x4())
    >>> sol.v.reshape(4, 4)
    array([[ 0., -1., -2., -3.],
           [-1., -2., -3., -2.],
           [-2., -3., -2., -1.],
           [-3., -2., -1.,  0.]])
    """
    owner = "value_iteration"
    mdp = _check_mdp(owner, mdp)
    tol = require_in_range(owner, "tol", tol, 0.0, math.inf, low_open=True)
    gamma = mdp.gamma
    v = (
        np.zeros(mdp.n_states)
        if v0 is None
        else _check_values(owner, "v0", v0, (mdp.n_states,)).copy()
    )
    if gamma == 0.0:
        return _finish(mdp, _action_values(mdp, v).max(axis=1), 1)
    threshold = tol * (1.0 - gamma) / (2.0 * gamma) if gamma < 1.0 else tol
    if max_iterations is None:
        if gamma < 1.0:
            first = float(np.max(np.abs(_action_values(mdp, v).max(axis=1) - v)))
            needed = math.log(threshold / first) / math.log(gamma) if first > threshold else 0
            max_iterations = math.ceil(max(needed, 0.0)) + 2 * _STALL_SWEEPS
        else:
            max_iterations = 1_000_000
    max_iterations = require_positive_int(owner, "max_iterations", max_iterations)

    def step(values: np.ndarray) -> np.ndarray:
        return _action_values(mdp, values).max(axis=1)

    v, sweeps = _fixed_point(owner, step, v, threshold, max_iterations)
    return _finish(mdp, v, sweeps)


def _proper_start(mdp: FiniteMDP) -> np.ndarray:
    """A deterministic policy that reaches a terminal state from every state it can.

    Backward breadth-first search from the terminal states: each newly
    reached state takes an action with positive probability of moving into
    the already reached set. States that cannot reach a terminal state under
    any action keep action 0.
    """
    next_states, probs, _ = mdp.successors
    into = probs > 0
    reach = mdp.terminal.copy()
    policy = np.zeros(mdp.n_states, dtype=np.intp)
    while True:
        hits = (into & reach[next_states]).any(axis=2) & ~reach[:, None]
        new = hits.any(axis=1)
        if not new.any():
            return policy
        policy[new] = np.argmax(hits[new], axis=1)
        reach |= new


def policy_iteration(
    mdp: FiniteMDP,
    *,
    initial_policy: Any = None,
    max_iterations: int = 10_000,
    atol: float = 1e-12,
) -> Solution:
    """Howard's policy iteration: exact evaluation, then greedy improvement.

    Improvement keeps the current action whenever it is within ``atol`` of the
    best, so the iteration cannot cycle between tied policies; it stops when no
    state changes action, at which point the policy is optimal (Puterman 1994,
    Theorem 6.4.2) and ``v`` is its exact value.

    Parameters
    ----------
    mdp : FiniteMDP
    initial_policy : array_like of int, shape (S,), optional
        Default: for ``gamma < 1`` the myopic policy ``argmax R``; for
        ``gamma = 1`` a policy that reaches a terminal state from every state
        (found by backward search), since evaluation needs a proper policy.
    max_iterations : int, default 10_000
    atol : float, default 1e-12
        Improvement threshold.

    Returns
    -------
    Solution
        ``iterations`` counts improvement steps; ``residual`` is the Bellman
        optimality residual of ``v`` (zero up to rounding).

    Raises
    ------
    InvalidParameterError
        If ``gamma = 1`` and a policy met on the way is improper.

    Examples
    --------
    >>> from tdkit.envs.problems import gridworld_4x4
    >>> int(policy_iteration(gridworld_4x4()).v.min())
    -3
    """
    owner = "policy_iteration"
    mdp = _check_mdp(owner, mdp)
    max_iterations = require_positive_int(owner, "max_iterations", max_iterations)
    atol = require_in_range(owner, "atol", atol, 0.0, math.inf)
    if initial_policy is None:
        policy = _proper_start(mdp) if mdp.gamma == 1.0 else np.argmax(mdp.R, axis=1)
    else:
        pi = _policy_probabilities(owner, mdp, initial_policy)
        if not ((pi == 0) | (pi == 1)).all() or isinstance(initial_policy, numbers.Number):
            raise InvalidParameterError(
                f"{owner}: initial_policy must be deterministic, (S,) action indices; "
                f"got {initial_policy!r:.80}."
            )
        policy = np.argmax(pi, axis=1)
    rows = np.arange(mdp.n_states)
    for iteration in range(1, max_iterations + 1):
        v = evaluate_policy(mdp, policy)
        q = _action_values(mdp, v)
        best = q.max(axis=1)
        improve = q[rows, policy] < best - atol
        if not improve.any():
            return _finish(mdp, v, iteration)
        policy = np.where(improve, np.argmax(q, axis=1), policy)
    warnings.warn(
        f"policy_iteration: no stable policy after max_iterations={max_iterations}.",
        RuntimeWarning,
        stacklevel=2,
    )
    return _finish(mdp, evaluate_policy(mdp, policy), max_iterations)

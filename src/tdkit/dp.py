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
from typing import Any

import numpy as np

from ._bellman import (
    GreedyPolicy,
    Solution,
    allowed_counts,
    finish_solution,
    greedy_policy,
    look_ahead,
    model_action_values,
    policy_backup,
)
from ._errors import InvalidParameterError, TdkitError
from ._model_args import policy_probabilities, require_exploration, require_mdp, require_values
from ._progress import sweep_progress
from ._validation import require_in_range, require_positive_int
from .envs.finite import FiniteMDP

__all__ = [
    "ConvergenceError",
    "GreedyPolicy",
    "Solution",
    "action_values",
    "bellman_expectation_operator",
    "bellman_optimality_operator",
    "bellman_residual",
    "epsilon_greedy_policy",
    "evaluate_policy",
    "greedy_policy",
    "policy_iteration",
    "value_iteration",
]

_STALL_SWEEPS = 50
"""Sweeps without a new minimum change after which value iteration blames rounding."""

_DIRECT_LIMIT = 3000
"""Largest number of non-terminal states solved by a dense linear solve."""

DEFAULT_MAX_ITERATIONS = 10_000
"""Default cap on the sweeps of :func:`value_iteration` (and iterative evaluation).

Enough for ``gamma <= 0.995`` at the default ``tol=1e-10`` (the contraction
bound asks for about ``log(tol (1 - gamma) / 2) / log(gamma)`` sweeps: 2,800 at
0.99, 5,800 at 0.995, 30,000 at 0.999); a 2-state model runs it in well under
a second. Beyond it, :func:`policy_iteration` or :func:`tdkit.solve` finish in
a few exact evaluations."""

_NEG_INF = float("-inf")


class ConvergenceError(TdkitError, RuntimeError):
    """An iterative solver cannot reach its accuracy target.

    Raised when the iteration cap is reached (the stated error bound would
    not hold) and, with ``gamma = 1``, when the values diverge.
    """


ConvergenceError.__module__ = "tdkit"


# ---------------------------------------------------------------- validation
# ---------------------------------------------------------------- Bellman operators


def action_values(mdp: FiniteMDP, v: Any) -> np.ndarray:
    r"""One-step look-ahead :math:`q(s, a) = R(s, a) + \gamma \sum_{s'} P(s' \mid s, a) v(s')`.

    Terminal states count as value 0 whatever ``v`` holds there, and their
    rows of the result are 0. Masked actions (:attr:`FiniteMDP.masks`) get
    their look-ahead like any other action here; the solvers exclude them.

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
    mdp = require_mdp("action_values", mdp)
    return model_action_values(mdp, require_values("action_values", "v", v, (mdp.n_states,)))


def bellman_optimality_operator(mdp: FiniteMDP, v: Any) -> np.ndarray:
    r"""Apply :math:`(T v)(s) = \max_a q(s, a)` with ``q = action_values(mdp, v)``.

    ``T`` is a ``gamma``-contraction in the sup norm (Puterman 1994, Prop. 6.2.4).
    The maximum runs over the allowed actions of each state.

    Returns
    -------
    ndarray, shape (S,)
    """
    mdp = require_mdp("bellman_optimality_operator", mdp)
    v = require_values("bellman_optimality_operator", "v", v, (mdp.n_states,))
    return look_ahead(mdp, v).max(axis=1)


def bellman_expectation_operator(mdp: FiniteMDP, v: Any, policy: Any) -> np.ndarray:
    r"""Apply :math:`(T_\pi v)(s) = \sum_a \pi(a \mid s)\, q(s, a)`, ``q = action_values(mdp, v)``.

    Returns
    -------
    ndarray, shape (S,)
    """
    owner = "bellman_expectation_operator"
    mdp = require_mdp(owner, mdp)
    v = require_values(owner, "v", v, (mdp.n_states,))
    pi = policy_probabilities(owner, mdp, policy)
    return (pi * model_action_values(mdp, v)).sum(axis=1)


def bellman_residual(mdp: FiniteMDP, q: Any, policy: Any = None) -> float:
    r"""Sup-norm Bellman residual of action values ``q`` (or state values ``v``).

    For ``q`` of shape ``(S, A)`` this is :math:`\max_{s,a} |(T q)(s, a) - q(s, a)|`
    with :math:`(T q)(s, a) = R(s, a) + \gamma \sum_{s'} P(s' \mid s, a)\, u(s')`,
    where :math:`u(s') = \max_{a'} q(s', a')` (optimality, ``policy=None``) or
    :math:`u(s') = \sum_{a'} \pi(a' \mid s') q(s', a')` (the given policy).
    For ``v`` of shape ``(S,)`` it is :math:`\max_s |(T v)(s) - v(s)|` with the
    optimality operator or :math:`T_\pi`. With action masks, maxima run over
    allowed actions, masked entries of ``q`` may be ``-inf`` and are not
    compared.

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
    mdp = require_mdp(owner, mdp)
    array = np.asarray(q, dtype=np.float64)
    pi = None if policy is None else policy_probabilities(owner, mdp, policy)
    if array.ndim == 1:
        v = require_values(owner, "v", array, (mdp.n_states,))
        if pi is None:
            target = look_ahead(mdp, v).max(axis=1)
        else:
            target = (pi * model_action_values(mdp, v)).sum(axis=1)
        return float(np.max(np.abs(target - v)))
    shape = (mdp.n_states, mdp.n_actions)
    masks = mdp.masks
    if masks is not None and array.shape == shape:
        array = np.where(masks, array, 0.0)  # masked entries (e.g. -inf) are not compared
    q = require_values(owner, "q", array, shape)
    if pi is None:
        u = (q if masks is None else np.where(masks, q, _NEG_INF)).max(axis=1)
    else:
        u = (pi * q).sum(axis=1)
    gap = np.abs(model_action_values(mdp, u) - q)
    if masks is not None:
        gap = gap[masks]
    return float(np.max(gap))


def epsilon_greedy_policy(
    q: Any, epsilon: float, *, masks: Any = None, atol: float = 1e-9
) -> np.ndarray:
    r"""Action probabilities of the ε-greedy policy of ``q``, ties sharing the greedy mass.

    .. math:: \pi_\varepsilon(a \mid s) = \frac{\varepsilon}{|\mathcal{A}(s)|}
              + (1 - \varepsilon) \frac{[a \in G(s)]}{|G(s)|}

    for allowed actions :math:`a \in \mathcal{A}(s)` (0 for masked ones), where
    :math:`G(s)` holds the allowed actions within ``atol`` of the best. Equal
    shares for tied actions are what tdkit's uniform tie-breaking does in
    expectation (:mod:`tdkit._greedy`).

    Parameters
    ----------
    q : array_like, shape (S, A)
        Action values (``-inf`` allowed at masked actions).
    epsilon : float
        Exploration rate in [0, 1].
    masks : array_like of bool, shape (S, A), optional
        Allowed actions (e.g. ``mdp.masks``); default all.
    atol : float, default 1e-9

    Returns
    -------
    ndarray, shape (S, A)

    Examples
    --------
    >>> epsilon_greedy_policy([[1.0, 2.0, 2.0, 0.0]], 0.2)
    array([[0.05, 0.45, 0.45, 0.05]])
    >>> epsilon_greedy_policy([[1.0, 2.0, 2.0, 0.0]], 0.2, masks=[[True, False, True, True]])
    array([[0.06666667, 0.        , 0.86666667, 0.06666667]])
    """
    owner = "epsilon_greedy_policy"
    epsilon = require_in_range(owner, "epsilon", epsilon, 0.0, 1.0)
    array = np.asarray(q, dtype=np.float64)
    if masks is None:
        allowed = np.ones(array.shape, dtype=bool)
    else:
        allowed = np.asarray(masks, dtype=bool)
        if allowed.shape != array.shape or array.ndim != 2:
            raise InvalidParameterError(
                f"{owner}: masks must have the shape of q, {array.shape}; got {allowed.shape}."
            )
        array = np.where(allowed, array, _NEG_INF)
    greedy = greedy_policy(array, atol=atol).maximisers & allowed
    explore = allowed / allowed.sum(axis=1, keepdims=True)
    exploit = greedy / greedy.sum(axis=1, keepdims=True)
    return epsilon * explore + (1.0 - epsilon) * exploit


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
    *,
    gamma: float,
    progress: bool = False,
) -> tuple[np.ndarray, int, float]:
    """Iterate ``v <- step(v)`` until the sup-norm change is below ``threshold``.

    Returns the last iterate, the number of sweeps and the last change.

    * Cap: reaching ``max_iterations`` raises :class:`ConvergenceError`
      (the error bound would not hold), suggesting ``policy_iteration``.
    * Stall: for a gamma-contraction the change shrinks by at least gamma per
      sweep, so if it makes no new minimum for ``_STALL_SWEEPS`` sweeps
      rounding noise has been reached; iteration stops with a
      ``RuntimeWarning``. With ``gamma = 1`` a stall at a change far above
      rounding (more than ``1e3 * eps * max|v|``) means the values diverge
      (a policy that never terminates and gathers reward forever), which
      raises :class:`ConvergenceError`.
    """
    best_change, best_sweep = math.inf, 0
    change = math.inf
    with sweep_progress(owner, progress, max_iterations) as bar:
        for sweep in range(1, max_iterations + 1):
            new = step(v)
            change = float(np.max(np.abs(new - v), initial=0.0))
            v = new
            if bar is not None:
                bar.update(1)
                if sweep % 25 == 1:
                    bar.set_postfix(change=f"{change:.3g}", refresh=False)
            if change < threshold:
                return v, sweep, change
            if change < best_change:
                best_change, best_sweep = change, sweep
            elif sweep - best_sweep >= _STALL_SWEEPS:
                scale = float(np.max(np.abs(v), initial=0.0))
                if gamma == 1.0 and best_change > 1e3 * np.finfo(np.float64).eps * scale:
                    raise ConvergenceError(
                        f"{owner}: with gamma=1 the values diverge: after {sweep} sweeps the "
                        f"change is still {change:.3g} (max |v| = {scale:.3g}) and no longer "
                        "shrinks. Some policy never reaches a terminal state and gathers "
                        "reward forever, so the undiscounted values are infinite. Use "
                        "gamma < 1, or make every such loop end or cost reward."
                    )
                warnings.warn(
                    f"{owner}: the change between sweeps stopped decreasing at about "
                    f"{best_change:.3g}, above the threshold {threshold:.3g} (rounding noise "
                    "for values this large); stopping. Use a larger tol.",
                    RuntimeWarning,
                    stacklevel=3,
                )
                return v, sweep, change
    advice = (
        "policy_iteration(mdp) or tdkit.solve(mdp) (a few exact evaluations), or raise "
        "max_iterations"
    )
    if gamma < 1.0 and change > threshold > 0.0:
        more = math.log(threshold / change) / math.log(gamma)
        advice += f" (the contraction bound asks for up to {math.ceil(more):,} more sweeps)"
    raise ConvergenceError(
        f"{owner}: stopped after max_iterations={max_iterations} sweeps with last change "
        f"{change:.3g} above the threshold {threshold:.3g} (gamma={gamma!r}); the stated "
        f"error bound does not hold. Use {advice}."
    )


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
        return model_action_values(chain, values)[:, 0]

    return _fixed_point("evaluate_policy", step, v, threshold, max_iterations, gamma=gamma)[0]


def _evaluate(
    owner: str,
    mdp: FiniteMDP,
    pi: np.ndarray,
    *,
    method: str = "auto",
    tol: float = 1e-10,
    max_iterations: int = DEFAULT_MAX_ITERATIONS,
) -> np.ndarray:
    """Value of the validated (S, A) policy ``pi`` (see :func:`evaluate_policy`)."""
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


def evaluate_policy(
    mdp: FiniteMDP,
    policy: Any,
    *,
    method: str = "auto",
    tol: float = 1e-10,
    max_iterations: int | None = None,
) -> np.ndarray:
    r"""Exact value :math:`v_\pi` of a policy: solve :math:`v = r_\pi + \gamma P_\pi v`.

    The system is solved on the non-terminal states only (terminal states
    have value 0), so ``gamma = 1`` works for proper policies, i.e. policies
    that reach a terminal state with probability 1 from every state; an
    improper policy with ``gamma = 1`` raises. A policy that takes a masked
    action (:attr:`FiniteMDP.masks`) in a non-terminal state is refused.

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
    max_iterations : int, optional
        Cap on iterative sweeps; default :data:`DEFAULT_MAX_ITERATIONS`.

    Returns
    -------
    ndarray, shape (S,)

    Raises
    ------
    InvalidParameterError
        On a malformed policy or method, a policy that takes a masked action,
        or an improper policy with ``gamma = 1``.
    ConvergenceError
        If iterative evaluation reaches ``max_iterations``.

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
    mdp = require_mdp(owner, mdp)
    pi = policy_probabilities(owner, mdp, policy)
    if method not in ("auto", "direct", "sparse", "iterative"):
        raise InvalidParameterError(
            f"{owner}: method must be 'auto', 'direct', 'sparse' or 'iterative'; "
            f"got {method!r}."
        )
    tol = require_in_range(owner, "tol", tol, 0.0, math.inf, low_open=True)
    cap = DEFAULT_MAX_ITERATIONS if max_iterations is None else max_iterations
    cap = require_positive_int(owner, "max_iterations", cap)
    return _evaluate(owner, mdp, pi, method=method, tol=tol, max_iterations=cap)


# ---------------------------------------------------------------- control


def _reach_terminal(mdp: FiniteMDP) -> tuple[np.ndarray, np.ndarray]:
    """States that can reach a terminal state, and a policy that does so.

    Backward breadth-first search from the terminal states over allowed
    actions: each newly reached state takes an allowed action with positive
    probability of moving into the already reached set. States that cannot
    reach a terminal state under any action keep their first allowed action.
    """
    next_states, probs, _ = mdp.successors
    into = probs > 0
    masks = mdp.masks
    if masks is not None:
        into = into & masks[:, :, None]
    reach = mdp.terminal.copy()
    policy = np.zeros(mdp.n_states, dtype=np.intp) if masks is None else np.argmax(masks, axis=1)
    while True:
        hits = (into & reach[next_states]).any(axis=2) & ~reach[:, None]
        new = hits.any(axis=1)
        if not new.any():
            return reach, policy
        policy[new] = np.argmax(hits[new], axis=1)
        reach |= new


def _require_terminal_reachable(owner: str, mdp: FiniteMDP) -> np.ndarray:
    """With gamma = 1, refuse a model with states that can never reach a terminal state.

    From such a state every policy runs forever, so its undiscounted return
    is an infinite sum: undefined or infinite unless every reward it can
    collect is zero. tdkit asks for the standard condition of stochastic
    shortest-path problems that a proper policy exists (Bertsekas &
    Tsitsiklis 1996, Neuro-Dynamic Programming, Section 2.1), here checked
    state by state. Returns that proper policy.
    """
    reach, policy = _reach_terminal(mdp)
    if not reach.all():
        stuck = np.flatnonzero(~reach)
        raise InvalidParameterError(
            f"{owner}: with gamma=1 every state must be able to reach a terminal state, but "
            f"from {stuck.size} state(s) {stuck[:10].tolist()} no terminal state is "
            f"reachable under any {'allowed ' if mdp.masks is not None else ''}action "
            f"(mdp has {int(mdp.terminal.sum())} terminal state(s)), so their undiscounted "
            "values diverge or are undefined. Use gamma < 1, mark the states where "
            "episodes end as terminal, or tdkit.relative_value_iteration for a continuing "
            "task."
        )
    return policy


def value_iteration(
    mdp: FiniteMDP,
    *,
    tol: float = 1e-10,
    max_iterations: int | None = None,
    v0: Any = None,
    exploration: float = 0.0,
    progress: bool = False,
) -> Solution:
    r"""Value iteration :math:`v_{k+1} = T v_k` with a stopping rule that bounds the error.

    With ``exploration=0`` (default), ``T`` is the Bellman optimality operator
    :math:`(T v)(s) = \max_a q_v(s, a)`, with
    :math:`q_v(s, a) = R(s, a) + \gamma \sum_{s'} P(s' \mid s, a) v(s')`; its
    fixed point is :math:`v^*`.

    With ``exploration=ε > 0`` it is the **ε-greedy Bellman operator**

    .. math:: (T_\varepsilon v)(s) = (1 - \varepsilon) \max_a q_v(s, a)
              + \frac{\varepsilon}{|\mathcal{A}(s)|} \sum_{a} q_v(s, a),

    i.e. :math:`\sum_a \pi_\varepsilon(a \mid s) q_v(s, a)` for the ε-greedy
    policy of :math:`q_v` (:func:`epsilon_greedy_policy`; tied greedy actions
    share the greedy mass equally, as tdkit's uniform tie-breaking does in
    expectation, and the expectation equals the maximum whatever the split).
    Its fixed point is the value of the best ε-soft policy (Sutton & Barto
    2018, Section 5.4) and ``q`` is what Expected SARSA, and SARSA with
    decaying step sizes, converge to when they explore with a constant ε
    (van Seijen, van Hasselt, Whiteson & Wiering 2009; Singh, Jaakkola,
    Littman & Szepesvári 2000). :math:`T_\varepsilon` is monotone and a
    ``gamma``-contraction in the sup norm (a convex mix of the maximum and the
    mean, both non-expansive), so the stopping rule and bounds below hold for
    it unchanged. ``Solution.operator`` names the operator.

    Masked actions (:attr:`FiniteMDP.masks`) enter neither the maximum nor
    the mean, and their ``q`` is ``-inf``.

    Stopping rule for ``gamma < 1``: stop at the first ``k`` with
    :math:`\|v_{k+1} - v_k\|_\infty < \text{tol}\,(1 - \gamma) / (2\gamma)`.
    Then (Puterman 1994, Theorem 6.3.1; Williams & Baird 1993)

    * :math:`\|v_{k+1} - v^*\|_\infty < \text{tol} / 2`: the returned ``v`` is
      within ``tol / 2`` of the fixed point (``Solution.error_bound`` holds the
      a-posteriori bound :math:`\gamma/(1-\gamma)\,\|v_{k+1} - v_k\|_\infty`);
    * with ``exploration=0``, the greedy policy of ``q`` is ``tol``-optimal:
      :math:`\|v_\pi - v^*\|_\infty < \text{tol}`;
    * ``residual`` :math:`= \|T v - v\|_\infty < \text{tol}\,(1 - \gamma) / 2`.

    Rounding limits how small the change can get: if the change stops
    reaching new minima for 50 sweeps (impossible in exact arithmetic, where
    it shrinks by ``gamma`` per sweep), iteration stops with a
    ``RuntimeWarning`` (the bound then holds up to rounding).

    For ``gamma = 1`` there is no contraction bound; iteration stops when the
    change :math:`\|v_{k+1} - v_k\|_\infty = \|T v_k - v_k\|_\infty` falls
    below ``tol``; ``T`` is non-expansive, so the returned :math:`v_{k+1}` has
    residual below ``tol`` as well. Every state must be able to reach a
    terminal state (else :class:`~tdkit.InvalidParameterError` before any
    sweep), and if some policy loops forever gathering positive reward the
    values diverge, which raises :class:`ConvergenceError` (Bertsekas &
    Tsitsiklis 1996, Proposition 2.2: value iteration converges when a
    proper policy exists and improper ones have return :math:`-\infty`).

    Parameters
    ----------
    mdp : FiniteMDP
    tol : float, default 1e-10
        Accuracy target (see the stopping rule).
    max_iterations : int, optional
        Cap on sweeps; default :data:`DEFAULT_MAX_ITERATIONS` (10,000).
        Reaching it raises :class:`ConvergenceError`: near ``gamma = 1`` use
        :func:`policy_iteration` or :func:`tdkit.solve`.
    v0 : array_like, shape (S,), optional
        Starting values (default 0).
    exploration : float, default 0.0
        ε of the ε-greedy operator; 0 gives the optimality operator.
    progress : bool, default False
        Show a progress bar over sweeps (needs tqdm, the ``progress`` extra).

    Returns
    -------
    Solution
        ``v`` the last iterate, ``q`` its look-ahead (``-inf`` on masked
        actions), ``policy`` greedy in ``q``, ``iterations`` the number of
        sweeps, ``residual`` as above, ``operator``, ``exploration``,
        ``method="value_iteration"``, ``error_bound``.

    Raises
    ------
    InvalidParameterError
        On bad arguments, or ``gamma = 1`` with a state that cannot reach a
        terminal state.
    ConvergenceError
        If ``max_iterations`` is reached, or with ``gamma = 1`` the values
        diverge.

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

    A one-state bandit with rewards 1 and 0, gamma = 0.5: with ε = 0.2 the
    ε-greedy policy earns 0.9 + 0.1 * 0 = 0.9 per step, so v = 0.9 / 0.5.

    >>> import numpy as np
    >>> from tdkit.envs.finite import FiniteMDP
    >>> bandit = FiniteMDP(np.ones((1, 2, 1)), [[1.0, 0.0]], gamma=0.5)
    >>> sol = value_iteration(bandit, exploration=0.2)
    >>> round(float(sol.v[0]), 9), sol.operator
    (1.8, 'epsilon-greedy(0.2)')
    """
    owner = "value_iteration"
    mdp = require_mdp(owner, mdp)
    tol = require_in_range(owner, "tol", tol, 0.0, math.inf, low_open=True)
    epsilon = require_exploration(owner, exploration)
    cap = DEFAULT_MAX_ITERATIONS if max_iterations is None else max_iterations
    cap = require_positive_int(owner, "max_iterations", cap)
    gamma = mdp.gamma
    v = (
        np.zeros(mdp.n_states)
        if v0 is None
        else require_values(owner, "v0", v0, (mdp.n_states,)).copy()
    )
    if gamma == 1.0:
        _require_terminal_reachable(owner, mdp)
    masks, counts = mdp.masks, allowed_counts(mdp)

    def step(values: np.ndarray) -> np.ndarray:
        return policy_backup(look_ahead(mdp, values), masks, epsilon, counts)

    if gamma == 0.0:
        return finish_solution(mdp, step(v), 1, epsilon=epsilon, method=owner, error_bound=0.0)
    threshold = tol * (1.0 - gamma) / (2.0 * gamma) if gamma < 1.0 else tol
    v, sweeps, change = _fixed_point(
        owner, step, v, threshold, cap, gamma=gamma, progress=progress
    )
    bound = gamma / (1.0 - gamma) * change if gamma < 1.0 else math.inf
    return finish_solution(mdp, v, sweeps, epsilon=epsilon, method=owner, error_bound=bound)


def _soft_policy(policy: np.ndarray, epsilon: float, mdp: FiniteMDP) -> np.ndarray:
    """(S, A) probabilities: ε uniform over allowed actions, 1 - ε on ``policy``."""
    n, m = mdp.n_states, mdp.n_actions
    allowed = np.ones((n, m)) if mdp.masks is None else mdp.masks.astype(np.float64)
    probs = epsilon * allowed / allowed.sum(axis=1, keepdims=True)
    probs[np.arange(n), policy] += 1.0 - epsilon
    return probs


def policy_iteration(
    mdp: FiniteMDP,
    *,
    initial_policy: Any = None,
    max_iterations: int = 10_000,
    atol: float = 1e-12,
    exploration: float = 0.0,
) -> Solution:
    r"""Howard's policy iteration: exact evaluation, then greedy improvement.

    Improvement keeps the current action whenever it is within ``atol`` of the
    best, so the iteration cannot cycle between tied policies; it stops when no
    state changes action, at which point the policy is optimal (Puterman 1994,
    Theorem 6.4.2) and ``v`` is its exact value. Masked actions are never
    chosen.

    With ``exploration=ε > 0`` each evaluated policy is the ε-soft policy
    "ε uniform over the allowed actions, 1 - ε on the greedy choice", and the
    result is the fixed point of the ε-greedy operator described in
    :func:`value_iteration` (ε-soft policy iteration; Sutton & Barto 2018,
    Section 5.4): at a stable policy :math:`v = T_\varepsilon v`.

    Parameters
    ----------
    mdp : FiniteMDP
    initial_policy : array_like of int, shape (S,), optional
        Default: for ``gamma < 1`` the myopic policy ``argmax R`` over allowed
        actions; for ``gamma = 1`` a policy that reaches a terminal state from
        every state (found by backward search), since evaluation needs a
        proper policy.
    max_iterations : int, default 10_000
    atol : float, default 1e-12
        Improvement threshold.
    exploration : float, default 0.0
        ε of the ε-greedy operator.

    Returns
    -------
    Solution
        ``iterations`` counts improvement steps; ``residual`` is the Bellman
        residual of ``v`` (zero up to rounding); ``error_bound`` is 0 (exact,
        up to rounding and ``atol / (1 - gamma)``).

    Raises
    ------
    InvalidParameterError
        If ``gamma = 1`` and a state cannot reach a terminal state, or a
        policy met on the way is improper.

    Examples
    --------
    >>> from tdkit.envs.problems import gridworld_4x4
    >>> int(policy_iteration(gridworld_4x4()).v.min())
    -3
    """
    owner = "policy_iteration"
    mdp = require_mdp(owner, mdp)
    max_iterations = require_positive_int(owner, "max_iterations", max_iterations)
    atol = require_in_range(owner, "atol", atol, 0.0, math.inf)
    epsilon = require_exploration(owner, exploration)
    masks = mdp.masks
    if initial_policy is None:
        if mdp.gamma == 1.0:
            policy = _require_terminal_reachable(owner, mdp)
        else:
            rewards = mdp.R if masks is None else np.where(masks, mdp.R, _NEG_INF)
            policy = np.argmax(rewards, axis=1)
    else:
        pi = policy_probabilities(owner, mdp, initial_policy)
        if not ((pi == 0) | (pi == 1)).all() or isinstance(initial_policy, numbers.Number):
            raise InvalidParameterError(
                f"{owner}: initial_policy must be deterministic, (S,) action indices; "
                f"got {initial_policy!r:.80}."
            )
        policy = np.argmax(pi, axis=1)
        if mdp.gamma == 1.0 and epsilon > 0.0:
            _require_terminal_reachable(owner, mdp)
    rows = np.arange(mdp.n_states)
    for iteration in range(1, max_iterations + 1):
        v = _evaluate(owner, mdp, _soft_policy(policy, epsilon, mdp))
        q = look_ahead(mdp, v)
        best = q.max(axis=1)
        improve = q[rows, policy] < best - atol
        if not improve.any():
            return finish_solution(mdp, v, iteration, epsilon=epsilon, method=owner,
                                   error_bound=0.0)
        policy = np.where(improve, np.argmax(q, axis=1), policy)
    raise ConvergenceError(
        f"{owner}: no stable policy after max_iterations={max_iterations} improvement "
        "steps (ties closer than atol can make policies alternate); raise atol or "
        "max_iterations."
    )


# Average reward lives in its own module; re-exported so tdkit.dp reaches it too.
from .dp_average import AverageSolution, policy_gain, relative_value_iteration  # noqa: E402

__all__ += ["AverageSolution", "policy_gain", "relative_value_iteration"]

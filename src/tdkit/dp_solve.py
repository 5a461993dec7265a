r"""Fast exact solves of large discounted models: :func:`solve`.

Plain value iteration stops on the sup norm of its change, which shrinks by
only ``gamma`` per sweep (1,900 sweeps at ``gamma = 0.99``, ``tol = 1e-6``),
although the *shape* of the values usually settles much sooner: the change
``T u - u`` becomes nearly constant across states. The bounds of MacQueen
(1966) and Porteus (1971) (Puterman 1994, Section 6.6.3) turn that into a
certificate. For any ``u``, with :math:`\delta = T u - u`,
:math:`m = \min_s \delta(s)` and :math:`M = \max_s \delta(s)`,

.. math:: u + \frac{m}{1 - \gamma} \le v_{d} \le v^* \le u + \frac{M}{1 - \gamma},

where ``d`` is the greedy policy of ``u``. (Proof: ``T`` is monotone and
:math:`T(u + c) = T u + \gamma c`; so :math:`T u \le u + M` gives
:math:`T^k u \le u + M(1 + \dots + \gamma^{k-1})`, and
:math:`T_d u = T u \ge u + m` gives the lower bound for :math:`v_d`.) Hence
the midpoint :math:`\tilde v = u + \frac{m + M}{2 (1 - \gamma)}` has

.. math:: \|\tilde v - v^*\|_\infty \le b = \frac{M - m}{2 (1 - \gamma)},
          \qquad \|v_d - v^*\|_\infty \le 2 b,

and every method here stops when ``2 b < tol``, i.e. with the same
guarantee as :func:`tdkit.dp.value_iteration` (values within ``tol / 2``,
greedy policy ``tol``-optimal), reported as ``Solution.error_bound = b``.
The same holds for the ε-greedy operator (monotone, same shift property;
``d`` is then the ε-greedy policy and :math:`v^*` the ε-greedy fixed
point). Terminal states keep value 0, so :math:`\delta = 0` there and
``m <= 0 <= M``: with terminal states the certificate is no sharper than the
sup norm, and the speed-up comes from models without them.

Methods
-------
``"modified_policy_iteration"``
    Puterman (1994), Section 6.5: each iteration applies ``T`` once (which
    also gives the greedy policy ``d`` and the bounds above), then
    ``evaluation_sweeps`` sweeps of :math:`T_d`, which for a deterministic
    ``d`` read one action's successors instead of all ``A``.
``"gauss_seidel"``
    In-place sweeps over blocks of states, each block using the values the
    earlier blocks of the same sweep just produced (Puterman 1994, Section
    6.3.3, by blocks so that numpy vectorises each block); the bounds are
    checked with one full ``T`` every ``check_every`` sweeps.
``"value_iteration"``, ``"policy_iteration"``
    :func:`tdkit.dp.value_iteration` and :func:`tdkit.dp.policy_iteration`.
``"auto"``
    ``value_iteration`` for ``gamma = 0`` (one sweep); ``policy_iteration``
    (exact) for ``gamma = 1`` (no contraction bound) and for models with at
    most 300 non-terminal states (dense solves are cheap there);
    otherwise ``modified_policy_iteration``, switching to
    ``policy_iteration`` if it needs more than 1000 improvement steps (a
    periodic chain with ``gamma`` near 1 keeps the span from shrinking).
    ``Solution.method`` names the method that ran.

References
----------
MacQueen, J. (1966). A modified dynamic programming method for Markovian
decision problems. Journal of Mathematical Analysis and Applications 14.
Porteus, E. L. (1971). Some bounds for discounted sequential decision
processes. Management Science 18(1).
Puterman, M. L. & Shin, M. C. (1978). Modified policy iteration algorithms for
discounted Markov decision problems. Management Science 24(11).
Puterman, M. L. (1994). Markov Decision Processes: Discrete Stochastic Dynamic
Programming. Wiley. Sections 6.3.3, 6.5, 6.6.3.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable
from typing import Any

import numpy as np

from ._bellman import Solution, allowed_counts, finish_solution, look_ahead, policy_backup
from ._errors import InvalidParameterError
from ._model_args import require_exploration, require_mdp, require_values
from ._progress import sweep_progress
from ._validation import require_in_range, require_positive_int
from .dp import DEFAULT_MAX_ITERATIONS, ConvergenceError, policy_iteration, value_iteration
from .envs.finite import FiniteMDP

__all__ = ["METHODS", "solve"]

METHODS = (
    "auto",
    "modified_policy_iteration",
    "gauss_seidel",
    "value_iteration",
    "policy_iteration",
)
"""Accepted values of ``solve(method=...)``."""

_SMALL = 300
"""Up to this many non-terminal states ``"auto"`` uses policy iteration (dense solves)."""

_AUTO_MPI_CAP = 1000
"""Improvement steps ``"auto"`` gives modified policy iteration before switching."""

_BLOCKS = 16
"""Blocks per Gauss-Seidel sweep (enough reuse within a sweep, little numpy overhead)."""


def _certified(
    owner: str,
    mdp: FiniteMDP,
    u: np.ndarray,
    q: np.ndarray,
    low: float,
    high: float,
    *,
    iterations: int,
    epsilon: float,
) -> Solution:
    """The midpoint solution of the MacQueen-Porteus bounds for iterate ``u``."""
    gamma = mdp.gamma
    shift = (low + high) / (2.0 * (1.0 - gamma))
    v = u + shift
    v[mdp.terminal] = 0.0
    # q of the unpinned midpoint u + shift (terminal value `shift`, within the
    # bound of the true 0): a uniform shift of q_u, so its greedy policy is d.
    q = q + gamma * shift
    q[mdp.terminal] = 0.0
    return finish_solution(
        mdp,
        v,
        iterations,
        epsilon=epsilon,
        method=owner,
        error_bound=(high - low) / (2.0 * (1.0 - gamma)),
        q=q,
    )


def _stop_test(
    owner: str,
    mdp: FiniteMDP,
    u: np.ndarray,
    q: np.ndarray,
    backed: np.ndarray,
    target: float,
    iterations: int,
    epsilon: float,
    bar: Any,
) -> tuple[Solution | None, float]:
    """The stopping rule of both iterative solvers: ``(solution, span)``.

    ``backed`` is ``T u`` and ``q`` the look-ahead it came from; the solution
    (:func:`_certified`) is returned once the span of ``T u - u`` is below
    ``target``, else None. The bar, if any, shows the span.
    """
    delta = backed - u
    low, high = float(delta.min()), float(delta.max())
    if bar is not None:
        bar.set_postfix(span=f"{high - low:.3g}", refresh=False)
    if high - low < target:
        return _certified(owner, mdp, u, q, low, high, iterations=iterations,
                          epsilon=epsilon), high - low
    return None, high - low


def _policy_arrays(
    mdp: FiniteMDP, next_states: np.ndarray, probs: np.ndarray, policy: np.ndarray
) -> Callable[[np.ndarray], np.ndarray]:
    """``u -> T_d u`` for a deterministic ``d``, reading only the chosen action's successors."""
    rows = np.arange(mdp.n_states)
    nxt = next_states[rows, policy]
    weights = probs[rows, policy]
    rewards = mdp.R[rows, policy]
    gamma = mdp.gamma

    def step(u: np.ndarray) -> np.ndarray:
        return rewards + gamma * np.einsum("sk,sk->s", weights, np.take(u, nxt))

    return step


def _modified_policy_iteration(
    mdp: FiniteMDP,
    u: np.ndarray,
    *,
    target: float,
    epsilon: float,
    evaluation_sweeps: int,
    max_iterations: int,
    progress: bool,
) -> Solution:
    owner = "modified_policy_iteration"
    masks, counts = mdp.masks, allowed_counts(mdp)
    next_states, probs = mdp._successor_arrays()
    with sweep_progress(owner, progress, max_iterations) as bar:
        for iteration in range(1, max_iterations + 1):
            q = look_ahead(mdp, u)
            backed = policy_backup(q, masks, epsilon, counts)
            if bar is not None:
                bar.update(1)
            solution, span = _stop_test(owner, mdp, u, q, backed, target, iteration, epsilon, bar)
            if solution is not None:
                return solution
            u = backed
            if epsilon == 0.0:
                step = _policy_arrays(mdp, next_states, probs, np.argmax(q, axis=1))
            else:
                weights = _epsilon_weights(q, masks, epsilon)

                def step(values: np.ndarray, weights: np.ndarray = weights) -> np.ndarray:
                    return (weights * _look_ahead_finite(mdp, values)).sum(axis=1)

            for _ in range(evaluation_sweeps):
                u = step(u)
    raise _capped(owner, max_iterations, span, target)


def _epsilon_weights(q: np.ndarray, masks: np.ndarray | None, epsilon: float) -> np.ndarray:
    """ε-soft policy: ε uniform over allowed actions, 1 - ε on the first greedy one."""
    n, m = q.shape
    allowed = np.ones((n, m)) if masks is None else masks.astype(np.float64)
    weights = epsilon * allowed / allowed.sum(axis=1, keepdims=True)
    weights[np.arange(n), np.argmax(q, axis=1)] += 1.0 - epsilon
    return weights


def _look_ahead_finite(mdp: FiniteMDP, v: np.ndarray) -> np.ndarray:
    q = look_ahead(mdp, v)
    if mdp.masks is not None:
        q[~mdp.masks] = 0.0  # weight 0 there; avoid 0 * -inf
    return q


def _gauss_seidel(
    mdp: FiniteMDP,
    u: np.ndarray,
    *,
    target: float,
    epsilon: float,
    check_every: int,
    max_iterations: int,
    progress: bool,
) -> Solution:
    owner = "gauss_seidel"
    masks, counts = mdp.masks, allowed_counts(mdp)
    next_states, probs = mdp._successor_arrays()
    n = mdp.n_states
    edges = np.linspace(0, n, min(_BLOCKS, n) + 1).astype(np.intp)
    blocks = [slice(int(a), int(b)) for a, b in itertools.pairwise(edges)]
    gamma, rewards, terminal = mdp.gamma, mdp.R, mdp.terminal
    block_counts = [
        counts if np.isscalar(counts) else counts[block] for block in blocks  # type: ignore[index]
    ]
    with sweep_progress(owner, progress, max_iterations) as bar:
        for sweep in range(1, max_iterations + 1):
            for block, block_count in zip(blocks, block_counts, strict=True):
                q = rewards[block] + gamma * np.einsum(
                    "sak,sak->sa", probs[block], np.take(u, next_states[block])
                )
                if masks is not None:
                    q[~masks[block]] = -np.inf
                u[block] = policy_backup(q, None if masks is None else masks[block], epsilon,
                                   block_count)
            u[terminal] = 0.0
            if bar is not None:
                bar.update(1)
            if sweep % check_every == 0 or sweep == max_iterations:
                q = look_ahead(mdp, u)
                backed = policy_backup(q, masks, epsilon, counts)
                solution, span = _stop_test(owner, mdp, u, q, backed, target, sweep, epsilon, bar)
                if solution is not None:
                    return solution
    raise _capped(owner, max_iterations, span, target)


def _capped(owner: str, cap: int, span: float, target: float) -> ConvergenceError:
    return ConvergenceError(
        f"{owner}: stopped after max_iterations={cap} with span of T u - u = {span:.3g} "
        f"above the target {target:.3g}; the stated error bound does not hold. Raise "
        "max_iterations, or use method='policy_iteration' (exact evaluations)."
    )


def solve(
    mdp: FiniteMDP,
    *,
    method: str = "auto",
    tol: float = 1e-10,
    exploration: float = 0.0,
    max_iterations: int | None = None,
    evaluation_sweeps: int = 10,
    check_every: int = 5,
    v0: Any = None,
    progress: bool = False,
) -> Solution:
    r"""Solve ``mdp`` exactly with the fastest suitable method, with a stated error bound.

    See the module documentation for the methods and the bound. Every
    method returns a :class:`~tdkit.dp.Solution` whose ``v`` is within
    ``tol / 2`` of the fixed point of the chosen operator (``error_bound``
    holds the certified bound, ``method`` the method that ran) and whose
    greedy ``policy`` is ``tol``-optimal (for ``exploration=0``);
    ``policy_iteration`` is exact up to rounding.

    Parameters
    ----------
    mdp : FiniteMDP
    method : str, default "auto"
        One of :data:`METHODS`.
    tol : float, default 1e-10
        Accuracy target, as in :func:`tdkit.dp.value_iteration`.
    exploration : float, default 0.0
        ε of the ε-greedy operator (0: optimality operator).
    max_iterations : int, optional
        Cap on iterations (improvement steps of modified policy iteration,
        sweeps otherwise); default :data:`tdkit.dp.DEFAULT_MAX_ITERATIONS`.
        Reaching it raises :class:`~tdkit.ConvergenceError`.
    evaluation_sweeps : int, default 10
        Sweeps of :math:`T_d` per improvement (modified policy iteration).
    check_every : int, default 5
        Gauss-Seidel sweeps between checks of the bound.
    v0 : array_like, shape (S,), optional
        Starting values (default 0).
    progress : bool, default False
        A tqdm progress bar (the ``progress`` extra).

    Returns
    -------
    Solution

    Raises
    ------
    InvalidParameterError
        On bad arguments; ``modified_policy_iteration`` and ``gauss_seidel``
        need ``gamma < 1`` for their bound (use ``policy_iteration``).
    ConvergenceError
        If the cap is reached.

    Examples
    --------
    >>> from tdkit.envs.problems import garnet
    >>> mdp = garnet(2000, 4, 8, gamma=0.99, seed=0)
    >>> fast = solve(mdp, tol=1e-6)
    >>> fast.method, fast.error_bound < 0.5e-6
    ('modified_policy_iteration', True)
    >>> from tdkit.dp import value_iteration
    >>> bool(abs(fast.v - value_iteration(mdp, tol=1e-6).v).max() < 1e-6)
    True
    """
    owner = "solve"
    mdp = require_mdp(owner, mdp)
    if method not in METHODS:
        raise InvalidParameterError(
            f"{owner}: method must be one of {', '.join(map(repr, METHODS))}; got {method!r}."
        )
    tol = require_in_range(owner, "tol", tol, 0.0, math.inf, low_open=True)
    epsilon = require_exploration(owner, exploration)
    cap = DEFAULT_MAX_ITERATIONS if max_iterations is None else max_iterations
    cap = require_positive_int(owner, "max_iterations", cap)
    evaluation_sweeps = require_positive_int(owner, "evaluation_sweeps", evaluation_sweeps)
    check_every = require_positive_int(owner, "check_every", check_every)
    gamma = mdp.gamma
    if method == "auto":
        if gamma == 0.0:
            method = "value_iteration"
        elif gamma == 1.0 or int((~mdp.terminal).sum()) <= _SMALL:
            method = "policy_iteration"
        else:
            try:
                return solve(
                    mdp,
                    method="modified_policy_iteration",
                    tol=tol,
                    exploration=epsilon,
                    max_iterations=min(cap, _AUTO_MPI_CAP),
                    evaluation_sweeps=evaluation_sweeps,
                    v0=v0,
                    progress=progress,
                )
            except ConvergenceError:
                method = "policy_iteration"  # e.g. a periodic chain with gamma near 1
    if method == "value_iteration":
        return value_iteration(
            mdp, tol=tol, max_iterations=cap, v0=v0, exploration=epsilon, progress=progress
        )
    if method == "policy_iteration":
        return policy_iteration(mdp, exploration=epsilon)
    if gamma == 1.0:
        raise InvalidParameterError(
            f"{owner}: method={method!r} bounds its error through the discount and needs "
            "gamma < 1; got gamma=1. Use method='policy_iteration' (or 'auto')."
        )
    u = np.zeros(mdp.n_states) if v0 is None else require_values(
        owner, "v0", v0, (mdp.n_states,)
    ).copy()
    u[mdp.terminal] = 0.0
    target = tol * (1.0 - gamma)  # 2 b = (M - m) / (1 - gamma) < tol
    if method == "modified_policy_iteration":
        return _modified_policy_iteration(
            mdp,
            u,
            target=target,
            epsilon=epsilon,
            evaluation_sweeps=evaluation_sweeps,
            max_iterations=cap,
            progress=progress,
        )
    return _gauss_seidel(
        mdp,
        u,
        target=target,
        epsilon=epsilon,
        check_every=check_every,
        max_iterations=cap,
        progress=progress,
    )

"""The Bellman backups and the solution type shared by the exact solvers (written once).

:mod:`tdkit.dp` (value and policy iteration, policy evaluation),
:mod:`tdkit.dp_solve` (modified policy iteration, Gauss-Seidel) and
:mod:`tdkit.dp_average` read the look-ahead of a value vector, the ε-greedy
backup of action values and the greedy policy from here, and package what
they return with :func:`finish_solution`.

References
----------
Puterman, M. L. (1994). Markov Decision Processes: Discrete Stochastic Dynamic
Programming. Wiley. Sections 6.2-6.5.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np

from ._errors import InvalidParameterError
from ._model_args import require_values
from ._validation import require_in_range
from .envs.finite import FiniteMDP

__all__ = [
    "GreedyPolicy",
    "Solution",
    "allowed_counts",
    "finish_solution",
    "greedy_policy",
    "look_ahead",
    "model_action_values",
    "operator_name",
    "policy_backup",
]

_NEG_INF = float("-inf")


@dataclass(frozen=True)
class Solution:
    r"""Result of :func:`value_iteration` or :func:`policy_iteration`.

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
        Residual of ``v`` under ``operator``: ``max |T v - v|``.
    operator : str
        The Bellman operator whose fixed point this is: ``"optimality"``
        (:math:`v^*`, :math:`q^*`) or ``"epsilon-greedy(0.1)"`` (the values of
        the ε-greedy policy of its own ``q``, see :func:`value_iteration`).
    exploration : float
        The ε of that operator (0 for ``"optimality"``).
    method : str
        The algorithm that produced it (``"value_iteration"``,
        ``"policy_iteration"``, ``"modified_policy_iteration"``,
        ``"gauss_seidel"``).
    error_bound : float
        A bound on :math:`\|v - v_{\text{fixed}}\|_\infty`, the sup-norm
        distance of ``v`` to the operator's exact fixed point (``inf`` when no
        bound is known, e.g. value iteration with ``gamma = 1``; rounding not
        included). ``q`` is then within ``gamma * error_bound`` of the exact
        action values.

    Action values of masked actions (see :attr:`FiniteMDP.masks`) are
    ``-inf``.
    """

    q: np.ndarray
    v: np.ndarray
    policy: np.ndarray
    iterations: int
    residual: float
    operator: str = "optimality"
    exploration: float = 0.0
    method: str = "value_iteration"
    error_bound: float = math.inf


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


def model_action_values(mdp: FiniteMDP, v: np.ndarray) -> np.ndarray:
    # Terminal rows of the model are zero-reward self-loops, so once v is 0 on
    # terminal states their rows of q are exactly 0 as well.
    terminal = mdp.terminal
    if terminal.any():
        v = np.where(terminal, 0.0, v)
    return mdp.R + mdp.gamma * mdp.expected_next(v)


def look_ahead(mdp: FiniteMDP, v: np.ndarray) -> np.ndarray:
    """:func:`model_action_values` with masked actions set to ``-inf``."""
    q = model_action_values(mdp, v)
    if mdp.masks is not None:
        q[~mdp.masks] = _NEG_INF
    return q


def allowed_counts(mdp: FiniteMDP) -> np.ndarray | float:
    """Number of allowed actions per state (a scalar when nothing is masked)."""
    masks = mdp.masks
    return float(mdp.n_actions) if masks is None else masks.sum(axis=1).astype(np.float64)


def policy_backup(
    q: np.ndarray, masks: np.ndarray | None, epsilon: float, counts: np.ndarray | float
) -> np.ndarray:
    r"""State values of the ε-greedy policy of ``q``: :math:`(1-ε) \max_a q + ε\,\text{mean}_a q`.

    Maximum and mean run over allowed actions only (``q`` holds ``-inf`` at
    masked ones). Whatever share of the greedy mass each tied maximiser gets,
    the expectation is the maximum, so this is the expected value under
    tdkit's uniform tie-breaking.
    """
    best = q.max(axis=1)
    if epsilon == 0.0:
        return best
    total = q.sum(axis=1) if masks is None else np.where(masks, q, 0.0).sum(axis=1)
    return (1.0 - epsilon) * best + epsilon * (total / counts)


def operator_name(epsilon: float) -> str:
    return "optimality" if epsilon == 0.0 else f"epsilon-greedy({epsilon!r})"


def greedy_policy(q: Any, *, atol: float = 1e-9) -> GreedyPolicy:
    """Greedy policy of action values, with ties reported.

    Parameters
    ----------
    q : array_like, shape (S, A)
        Finite values, or ``-inf`` for actions that may not be taken (masked
        actions in a :class:`Solution`); every row needs a finite entry.
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
    excluded = array == _NEG_INF
    if excluded.all(axis=1).any():
        s = int(np.argmax(excluded.all(axis=1)))
        raise InvalidParameterError(
            f"{owner}: q[{s}, :] is -inf everywhere; every state needs a finite action value."
        )
    require_values(owner, "q", np.where(excluded, 0.0, array), array.shape)
    atol = require_in_range(owner, "atol", atol, 0.0, math.inf)
    maximisers = array >= array.max(axis=1, keepdims=True) - atol
    return GreedyPolicy(np.argmax(maximisers, axis=1), maximisers)


def finish_solution(
    mdp: FiniteMDP,
    v: np.ndarray,
    iterations: int,
    *,
    epsilon: float = 0.0,
    method: str,
    error_bound: float,
    q: np.ndarray | None = None,
) -> Solution:
    """Package ``v`` as a read-only :class:`Solution`.

    ``q`` defaults to the look-ahead of ``v``; ``residual`` is always that of
    ``v`` under the operator of ``epsilon``.
    """
    look = look_ahead(mdp, v)
    backed_up = policy_backup(look, mdp.masks, epsilon, allowed_counts(mdp))
    residual = float(np.max(np.abs(backed_up - v)))
    if q is not None:
        look = q
    look.flags.writeable = False
    v = v.copy()
    v.flags.writeable = False
    policy = greedy_policy(look).policy
    policy.flags.writeable = False
    return Solution(
        q=look,
        v=v,
        policy=policy,
        iterations=iterations,
        residual=residual,
        operator=operator_name(epsilon),
        exploration=float(epsilon),
        method=method,
        error_bound=float(error_bound),
    )

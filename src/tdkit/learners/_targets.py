r"""Bootstrap values of the one-step TD targets, written once.

A one-step control target is :math:`G_t = R_{t+1} + \gamma\, B(S_{t+1})`
(:math:`G_t = R_{t+1}` when :math:`S_{t+1}` is terminal). This module is the
one definition of the bootstrap value :math:`B` and of the random choices it
depends on:

==========================  ==================================================
``greedy_max``              :math:`\max_{a \in \mathcal A} q(a)` (Q-learning)
``expected_epsilon_greedy`` :math:`\sum_a \pi_\varepsilon(a)\, q(a)` (Expected SARSA)
``expected_softmax``        :math:`\sum_a \pi_\tau(a)\, q(a)` (Expected SARSA, soft-max)
``double_value``            :math:`q^B(\arg\max_a q^A(a))` (Double Q-learning)
``double_coin``             which of its two tables Double Q-learning updates
``sampled_value``           :math:`q(A_{t+1})` (SARSA)
``greedy_index``            an argmax, ties shared uniformly (:func:`tdkit._greedy.greedy_pick`)
``epsilon_greedy_index``    an ε-greedy draw
``softmax_index``           a soft-max (Boltzmann) draw
==========================  ==================================================

:math:`\mathcal A` is the set of allowed actions (all of them without a mask).

Three callers share these functions:

* the scalar learners, in CPython, on one row ``values`` of A floats (a list
  or a 1-D array) and ``allowed``, a sequence of allowed action indices in
  increasing order (``range(A)`` without a mask). The functions are plain
  Python loops over the row: for the handful of actions of a tabular problem
  they are faster than numpy calls on a tiny array;
* the compiled kernels of :mod:`tdkit.batch`, which apply ``numba.njit`` to
  the very same functions (``allowed`` is then an int64 array); nothing here
  imports numba;
* the numpy batch path, through the ``*_rows`` versions, which compute the
  same quantities for a ``(K, A)`` array of rows with an optional ``(K, A)``
  boolean mask, in the same order of floating-point operations, so they agree
  with the row versions bit for bit (checked by hypothesis in
  ``tests/unit/learners/test_targets.py``).

Random choices take their uniform numbers ``u`` in [0, 1) from the caller
(drawn from the caller's own ``numpy.random.Generator``), so two paths given
the same numbers make the same choices. Ties: the :math:`k` tied greedy
actions are ranked in index order and ``u`` picks tie
:math:`\lfloor u k \rfloor`, each with probability :math:`1/k`. That rule is
defined once, in the kernel: ``greedy_index`` and ``greedy_index_rows`` are
:func:`tdkit._greedy.greedy_pick` and :func:`tdkit._greedy.greedy_pick_rows`
under the names this module's callers use (the learners' per-step
:func:`tdkit._greedy.greedy_index` is an adapter over the same function). An
ε-greedy choice takes one number (see :func:`epsilon_greedy_index`).

Closed form of the ε-greedy expectation. With :math:`n = |\mathcal A|` and
the greedy set :math:`G = \arg\max_{a \in \mathcal A} q(a)`, the policy is
:math:`\pi(a) = \varepsilon / n + (1 - \varepsilon)[a \in G]/|G|`; every
:math:`a \in G` has the value :math:`\max q`, so however the ties share the
greedy mass,

.. math::
    \sum_a \pi(a)\, q(a) = \varepsilon\, \bar q + (1 - \varepsilon) \max_{a \in \mathcal A} q(a),
    \qquad \bar q = \frac1n \sum_{a \in \mathcal A} q(a).

Soft-max: :math:`\pi_\tau(a) \propto \exp(q(a)/\tau)` over allowed actions,
computed as :math:`w_a = \exp(q(a)/\tau - m)` with :math:`m = \max_a
q(a)/\tau` (no overflow); sums run over allowed actions in index order.

References
----------
.. [1] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
   Introduction, 2nd ed. MIT Press. Eqs. 6.7 (SARSA), 6.8 (Q-learning), 6.9
   (Expected SARSA); Section 6.7 (Double Q-learning); Section 2.8 and Eq. 13.2
   (soft-max).
.. [2] van Seijen, H., van Hasselt, H., Whiteson, S. & Wiering, M. (2009).
   A theoretical and empirical analysis of Expected Sarsa. IEEE ADPRL.
.. [3] van Hasselt, H. (2010). Double Q-learning. NIPS 23.

Examples
--------
>>> from tdkit.learners import _targets as T
>>> q = [1.0, 3.0, 3.0, 0.0]
>>> T.greedy_max(q, range(4)), T.greedy_max(q, (0, 3))
(3.0, 1.0)
>>> T.expected_epsilon_greedy(q, range(4), 0.5)    # 0.5 * 7/4 + 0.5 * 3
2.375
>>> T.greedy_index(q, range(4), 0.49), T.greedy_index(q, range(4), 0.5)   # two ties
(1, 2)
>>> T.double_value(q, [10.0, 20.0, 30.0, 40.0], range(4), 0.7)
30.0
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from .._greedy import greedy_pick as greedy_index
from .._greedy import greedy_pick_rows as greedy_index_rows

__all__ = [
    "double_coin",
    "double_coin_rows",
    "double_value",
    "double_value_rows",
    "epsilon_greedy_index",
    "epsilon_greedy_index_rows",
    "expected_epsilon_greedy",
    "expected_epsilon_greedy_rows",
    "expected_softmax",
    "expected_softmax_rows",
    "greedy_index",
    "greedy_index_rows",
    "greedy_max",
    "greedy_max_rows",
    "sampled_value",
    "softmax_index",
    "softmax_index_rows",
    "uniform_index",
]

# The row versions below must stay numba-compilable (numba.njit is applied to them by
# tdkit.batch's kernel module): no keyword-only arguments, no None, no Python objects,
# only loops, arithmetic, math.* and indexing.


# --------------------------------------------------------------------------- one row
def greedy_max(values: Sequence[float], allowed: Sequence[int]) -> float:
    r""":math:`\max_{a \in \mathcal A} q(a)` (``-inf`` if every allowed value is ``-inf``)."""
    top = -math.inf
    for a in allowed:
        v = values[a]
        if v > top:
            top = v
    return top


def uniform_index(allowed: Sequence[int], u: float) -> int:
    r"""Allowed action :math:`\lfloor u n \rfloor` (in index order) of the :math:`n` allowed."""
    n = len(allowed)
    i = int(u * n)
    if i >= n:  # pragma: no cover - only if u >= 1
        i = n - 1
    return allowed[i]


def epsilon_greedy_index(
    values: Sequence[float], allowed: Sequence[int], epsilon: float, u: float
) -> int:
    r"""ε-greedy from one uniform number: explore when :math:`u < \varepsilon`.

    Exploring, :math:`u / \varepsilon` picks the uniform allowed action;
    otherwise :math:`(u - \varepsilon) / (1 - \varepsilon)` picks among the
    greedy ties. Both are uniform on [0, 1) given the branch, so one number
    does the work of three.
    """
    if u < epsilon:
        return uniform_index(allowed, u / epsilon)
    return greedy_index(values, allowed, (u - epsilon) / (1.0 - epsilon))


def softmax_index(
    values: Sequence[float], allowed: Sequence[int], temperature: float, u: float
) -> int:
    r"""A draw from :math:`\pi_\tau(a) \propto \exp(q(a)/\tau)`: the first allowed action whose
    cumulative weight exceeds :math:`u \sum_a w_a`. Returns -1 on NaN values."""
    m = -math.inf
    for a in allowed:
        z = values[a] / temperature
        if z != z:
            return -1
        if z > m:
            m = z
    total = 0.0
    for a in allowed:
        total += math.exp(values[a] / temperature - m)
    threshold = u * total
    cumulative = 0.0
    last = -1
    for a in allowed:
        w = math.exp(values[a] / temperature - m)
        cumulative += w
        if w > 0.0:
            last = a
            if cumulative > threshold:
                return a
    return last  # pragma: no cover - only when rounding leaves u * total at the total


def expected_epsilon_greedy(
    values: Sequence[float], allowed: Sequence[int], epsilon: float
) -> float:
    r""":math:`\varepsilon\,\bar q + (1 - \varepsilon)\max q` over allowed actions (see module)."""
    top = greedy_max(values, allowed)
    if epsilon == 0.0:
        return top
    total = 0.0
    n = 0
    for a in allowed:
        total += values[a]
        n += 1
    return epsilon * (total / n) + (1.0 - epsilon) * top


def expected_softmax(
    values: Sequence[float], allowed: Sequence[int], temperature: float
) -> float:
    r""":math:`\sum_a \pi_\tau(a)\, q(a)` with soft-max weights over allowed actions."""
    m = -math.inf
    for a in allowed:
        z = values[a] / temperature
        if z > m:
            m = z
    total = 0.0
    weighted = 0.0
    for a in allowed:
        w = math.exp(values[a] / temperature - m)
        total += w
        weighted += w * values[a]
    return weighted / total


def double_value(
    select: Sequence[float], evaluate: Sequence[float], allowed: Sequence[int], u: float
) -> float:
    r""":math:`q^B(\arg\max_a q^A(a))`: argmax of ``select`` (ties by ``u``) read in ``evaluate``.

    NaN when ``select`` holds NaN.
    """
    best = greedy_index(select, allowed, u)
    if best < 0:
        return math.nan
    return evaluate[best]


def double_coin(u: float) -> tuple[int, float]:
    r"""Double Q-learning's fair coin and the tie number of its argmax, from one uniform.

    Returns ``(table, u_tie)``: the table to update (0 when :math:`u < 1/2`)
    and :math:`2u - \text{table}`, uniform on [0, 1) given the coin (exact in
    floating point).
    """
    table = 0 if u < 0.5 else 1
    return table, 2.0 * u - table


def sampled_value(values: Sequence[float], action: int) -> float:
    r""":math:`q(A_{t+1})` for the next action actually drawn (SARSA)."""
    return values[action]


# --------------------------------------------------------------------------- (K, A) rows
def _masked(rows: np.ndarray, mask: np.ndarray | None, fill: float) -> np.ndarray:
    return rows if mask is None else np.where(mask, rows, fill)


def _allowed_counts(rows: np.ndarray, mask: np.ndarray | None) -> np.ndarray:
    if mask is None:
        return np.full(rows.shape[0], rows.shape[1], dtype=np.int64)
    return mask.sum(axis=1)


def greedy_max_rows(rows: np.ndarray, mask: np.ndarray | None) -> np.ndarray:
    """:func:`greedy_max` of every row of ``rows`` (K, A); ``mask`` (K, A) bool or None."""
    return _masked(rows, mask, -np.inf).max(axis=1)


def _uniform_index_rows(mask: np.ndarray | None, n_actions: int, u: np.ndarray) -> np.ndarray:
    if mask is None:
        return np.minimum((u * n_actions).astype(np.intp), n_actions - 1)
    rank = mask.cumsum(axis=1)
    pick = np.minimum((u * rank[:, -1]).astype(np.intp), rank[:, -1] - 1)
    return (rank > pick[:, None]).argmax(axis=1)


def epsilon_greedy_index_rows(
    rows: np.ndarray, mask: np.ndarray | None, epsilon: float, u: np.ndarray
) -> np.ndarray:
    """:func:`epsilon_greedy_index` of every row."""
    if epsilon <= 0.0:
        return greedy_index_rows(rows, mask, u)  # (u - 0) / 1 == u
    if epsilon >= 1.0:
        return _uniform_index_rows(mask, rows.shape[1], u)  # u / 1 == u
    # Each row uses one of the two rescaled numbers; the other is computed and ignored.
    greedy = greedy_index_rows(rows, mask, (u - epsilon) / (1.0 - epsilon))
    explore = u < epsilon
    if not explore.any():
        return greedy
    # Rows that do not explore divide 0 instead of their u: u / epsilon can exceed any
    # integer there (a tiny epsilon), and its cast would warn about a number never used.
    uniform = _uniform_index_rows(mask, rows.shape[1], np.where(explore, u, 0.0) / epsilon)
    return np.where(explore, uniform, greedy)


def _softmax_weights(
    rows: np.ndarray, mask: np.ndarray | None, temperature: float
) -> tuple[np.ndarray, np.ndarray]:
    z = _masked(rows / temperature, mask, -np.inf)
    m = z.max(axis=1, keepdims=True)
    with np.errstate(invalid="ignore"):
        w = np.exp(z - m)  # masked: exp(-inf) = 0
    if mask is not None:
        w = np.where(mask, w, 0.0)
    return w, np.isnan(z).any(axis=1)


def softmax_index_rows(
    rows: np.ndarray, mask: np.ndarray | None, temperature: float, u: np.ndarray
) -> np.ndarray:
    """:func:`softmax_index` of every row (-1 for rows with NaN)."""
    w, bad = _softmax_weights(rows, mask, temperature)
    k, n = w.shape
    total = np.zeros(k)
    for j in range(n):  # sequential sums, in the row version's order
        total += w[:, j]
    threshold = u * total
    cumulative = np.zeros(k)
    choice = np.full(k, -1, dtype=np.intp)
    last = np.full(k, -1, dtype=np.intp)
    for j in range(n):
        cumulative += w[:, j]
        positive = w[:, j] > 0.0
        last[positive] = j
        hit = positive & (choice < 0) & (cumulative > threshold)
        choice[hit] = j
    choice = np.where(choice < 0, last, choice)
    if bad.any():
        choice[bad] = -1
    return choice


def expected_epsilon_greedy_rows(
    rows: np.ndarray, mask: np.ndarray | None, epsilon: float
) -> np.ndarray:
    """:func:`expected_epsilon_greedy` of every row."""
    top = greedy_max_rows(rows, mask)
    if epsilon == 0.0:
        return top
    values = _masked(rows, mask, 0.0)
    total = np.zeros(rows.shape[0])
    for j in range(rows.shape[1]):  # sequential, as the row version (x + 0.0 == x)
        total += values[:, j]
    return epsilon * (total / _allowed_counts(rows, mask)) + (1.0 - epsilon) * top


def expected_softmax_rows(
    rows: np.ndarray, mask: np.ndarray | None, temperature: float
) -> np.ndarray:
    """:func:`expected_softmax` of every row."""
    w, _ = _softmax_weights(rows, mask, temperature)
    values = _masked(rows, mask, 0.0)
    total = np.zeros(rows.shape[0])
    weighted = np.zeros(rows.shape[0])
    for j in range(rows.shape[1]):
        total += w[:, j]
        weighted += w[:, j] * values[:, j]
    return weighted / total


def double_coin_rows(u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """:func:`double_coin` of every entry of ``u``."""
    table = np.where(u < 0.5, 0, 1)
    return table, 2.0 * u - table


def double_value_rows(
    select: np.ndarray, evaluate: np.ndarray, mask: np.ndarray | None, u: np.ndarray
) -> np.ndarray:
    """:func:`double_value` of every row (NaN where ``select`` holds NaN)."""
    best = greedy_index_rows(select, mask, u)
    out = evaluate[np.arange(select.shape[0]), np.maximum(best, 0)]
    return np.where(best < 0, np.nan, out)

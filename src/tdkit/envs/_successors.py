r"""Sampling a :class:`~tdkit.envs.finite.FiniteMDP`, written once.

Every sampler of a finite model -- the gymnasium env of
:meth:`FiniteMDP.to_env` (:mod:`tdkit.envs.model_env`) and the lockstep
learners of :mod:`tdkit.batch` (numpy and compiled) -- draws next states and
start states the same way, from the tables built here:

* each pair :math:`(s, a)` has successor slots :math:`j = 0 .. B-1` with
  next states, probabilities and per-outcome rewards (the model's
  :attr:`~FiniteMDP.successors`);
* one uniform number :math:`u \in [0, 1)` selects slot :math:`j` = the number
  of cumulative probabilities :math:`\le u` (inverse transform sampling),
  clipped to the last slot. The cumulative row is divided by its last entry,
  so it ends exactly at 1 (trailing zero-probability slots share that value)
  and :math:`u < 1` never lands on a zero-probability slot;
* start states are drawn from ``mdp.initial`` the same way.

:func:`sample_slot` is the one-row rule (plain code that ``numba.njit``
compiles as it is), :func:`sample_slots` the same for many rows at once.

Examples
--------
>>> import numpy as np
>>> from tdkit.envs.finite import FiniteMDP
>>> P = np.zeros((2, 1, 2)); P[0, 0] = [0.25, 0.75]; P[1, 0, 1] = 1.0
>>> tables = successor_tables(FiniteMDP(P, np.zeros((2, 1)), gamma=0.9))
>>> tables.cumulative[0, 0], tables.next_states[0, 0]
(array([0.25, 1.  ]), array([0, 1]))
>>> [sample_slot(tables.cumulative[0, 0], u) for u in (0.0, 0.2499, 0.25, 0.9)]
[0, 0, 1, 1]
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from .finite import FiniteMDP

__all__ = ["SuccessorTables", "sample_slot", "sample_slots", "successor_tables"]


@dataclass(frozen=True, eq=False)
class SuccessorTables:
    """Arrays to sample a finite model from uniform numbers.

    Attributes
    ----------
    cumulative : ndarray, shape (S, A, B)
        Cumulative successor probabilities, each row ending exactly at 1.
    next_states : ndarray of intp, shape (S, A, B)
    rewards : ndarray of float64, shape (S, A, B)
        Per-outcome rewards (the expected reward repeated where the model has
        only expected rewards).
    start_cumulative : ndarray, shape (S,)
        Cumulative start distribution, ending exactly at 1.
    terminal : ndarray of bool, shape (S,)
    """

    cumulative: np.ndarray
    next_states: np.ndarray
    rewards: np.ndarray
    start_cumulative: np.ndarray
    terminal: np.ndarray


def _normalised_cumsum(probs: np.ndarray) -> np.ndarray:
    cumulative = np.cumsum(probs, axis=-1)
    cumulative /= cumulative[..., -1:]
    return cumulative


def successor_tables(mdp: FiniteMDP) -> SuccessorTables:
    """Build the sampling tables of ``mdp`` (see the module docstring)."""
    next_states, probs, rewards = mdp.successors
    return SuccessorTables(
        cumulative=_normalised_cumsum(np.asarray(probs, dtype=np.float64)),
        next_states=np.ascontiguousarray(next_states, dtype=np.intp),
        rewards=np.ascontiguousarray(rewards, dtype=np.float64),
        start_cumulative=_normalised_cumsum(np.asarray(mdp.initial, dtype=np.float64)),
        terminal=np.asarray(mdp.terminal, dtype=bool),
    )


def sample_slot(cumulative: np.ndarray, u: float) -> int:
    """Slot drawn by ``u``: the number of entries of the 1-D ``cumulative`` that are <= ``u``,
    clipped to the last slot."""
    last = cumulative.shape[0] - 1
    j = 0
    while j < last and cumulative[j] <= u:
        j += 1
    return j


def sample_slots(cumulative: np.ndarray, u: np.ndarray) -> np.ndarray:
    """:func:`sample_slot` of every row of ``cumulative`` (K, B) with ``u`` (K,), or of one
    shared 1-D ``cumulative`` row (such as the start distribution) for every ``u``."""
    last = cumulative.shape[-1] - 1
    if cumulative.ndim == 1:
        return np.minimum(np.searchsorted(cumulative, u, side="right"), last)
    if last == 0:
        return np.zeros(cumulative.shape[0], dtype=np.intp)
    slot = (cumulative <= u[:, None]).sum(axis=1)
    return np.minimum(slot, last)

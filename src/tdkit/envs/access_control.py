r"""The access-control queuing task, a continuing task with an exact model.

Sutton & Barto (2018), Example 10.2 (Section 10.3), parameters recalled from
memory: ``n_servers = 10`` servers; customers wait in one queue that never
empties, and the priority of the customer at its head is equally likely to be
any of four, paying 1, 2, 4 or 8 when served. Each step the agent accepts
(action 1) or rejects (action 0) that customer: accepting with a free server
pays the priority and makes one server busy; rejecting pays 0; with no free
server every customer is rejected (both actions pay 0 and change nothing).
Then every busy server frees with probability ``p_free = 0.06``,
independently, and the next customer comes to the head of the queue.

States are ``free * n_priorities + priority`` with ``free`` the number of
free servers (0..n_servers) and ``priority`` the index of the head
customer's payment (0 pays 1, ..., 3 pays 8). The task never ends: the model
has no terminal state, and its environment never terminates (give the
training loop a step budget, or a time limit that it bootstraps through).

The order within a step (decide, pay, then servers free, including the one
just taken) and the uniform start over priorities with every server free are
this module's reading of the example.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .._errors import InvalidParameterError
from .._validation import require_in_range, require_positive_int
from .finite import FiniteMDP
from .model_env import FiniteMDPEnv

__all__ = ["ACCEPT", "REJECT", "access_control", "access_control_env", "decode_state"]

REJECT = 0
"""Action index: reject the customer at the head of the queue."""
ACCEPT = 1
"""Action index: accept the customer (served if a server is free)."""


def _binomial_pmf(n: int, p: float) -> np.ndarray:
    k = np.arange(n + 1)
    return np.array([math.comb(n, int(i)) for i in k]) * p**k * (1.0 - p) ** (n - k)


def access_control(
    *,
    n_servers: int = 10,
    payments: tuple[float, ...] = (1.0, 2.0, 4.0, 8.0),
    p_free: float = 0.06,
    gamma: float = 0.99,
) -> FiniteMDP:
    r"""The access-control queuing task as a :class:`FiniteMDP` (Sutton & Barto 2018, Ex. 10.2).

    Parameters
    ----------
    n_servers : int, default 10
    payments : tuple of float, default (1, 2, 4, 8)
        Reward for serving a customer of each priority; priorities are
        equally likely.
    p_free : float, default 0.06
        Probability that a busy server frees on a step, in [0, 1].
    gamma : float, default 0.99
        Only for a discounted view; the average-reward solvers
        (:func:`tdkit.relative_value_iteration`) ignore it.

    Returns
    -------
    FiniteMDP
        ``(n_servers + 1) * len(payments)`` states, 2 actions (0 reject,
        1 accept), no terminal state; starts with every server free.

    Raises
    ------
    InvalidParameterError
        On a non-positive ``n_servers``, empty or non-finite ``payments``, or
        ``p_free`` / ``gamma`` outside [0, 1].

    References
    ----------
    .. [1] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
       Introduction, 2nd ed., MIT Press. Example 10.2 (access-control queuing
       task; recalled from memory), after Carlström, J. & Nordström, E. (1997),
       Control of self-similar ATM call traffic by reinforcement learning.

    Examples
    --------
    >>> from tdkit import relative_value_iteration
    >>> mdp = access_control()
    >>> mdp.n_states, mdp.n_actions
    (44, 2)
    >>> sol = relative_value_iteration(mdp)
    >>> free, priority = decode_state(int(mdp.initial.argmax()))
    >>> free, priority
    (10, 0)
    """
    owner = "access_control"
    n_servers = require_positive_int(owner, "n_servers", n_servers)
    pay = np.asarray(payments, dtype=np.float64) if _is_sequence(payments) else None
    if pay is None or pay.ndim != 1 or pay.size == 0 or not np.isfinite(pay).all():
        raise InvalidParameterError(
            f"{owner}: payments must be a non-empty sequence of finite rewards, one per "
            f"priority; got {payments!r}."
        )
    p_free = require_in_range(owner, "p_free", p_free, 0.0, 1.0)
    gamma = require_in_range(owner, "gamma", gamma, 0.0, 1.0)
    n_pri = pay.size
    n_states = (n_servers + 1) * n_pri
    P = np.zeros((n_states, 2, n_states))
    R = np.zeros((n_states, 2))
    for free in range(n_servers + 1):
        for pri in range(n_pri):
            s = free * n_pri + pri
            for action in (REJECT, ACCEPT):
                served = action == ACCEPT and free > 0
                busy = n_servers - free + (1 if served else 0)
                R[s, action] = pay[pri] if served else 0.0
                freed = _binomial_pmf(busy, p_free)
                for k, p in enumerate(freed):
                    nxt_free = n_servers - busy + k
                    P[s, action, nxt_free * n_pri: (nxt_free + 1) * n_pri] += p / n_pri
    initial = np.zeros(n_states)
    initial[n_servers * n_pri: (n_servers + 1) * n_pri] = 1.0 / n_pri
    return FiniteMDP(P, R, gamma=gamma, initial=initial)


def _is_sequence(value: Any) -> bool:
    return isinstance(value, (list, tuple, np.ndarray))


def decode_state(state: int, *, n_priorities: int = 4) -> tuple[int, int]:
    """``(free servers, priority index)`` of a state index of :func:`access_control`.

    Examples
    --------
    >>> decode_state(13)
    (3, 1)
    """
    return divmod(int(state), n_priorities)


def access_control_env(
    *,
    n_servers: int = 10,
    payments: tuple[float, ...] = (1.0, 2.0, 4.0, 8.0),
    p_free: float = 0.06,
    max_steps: int | None = None,
) -> FiniteMDPEnv:
    """The access-control task as a gymnasium environment that never terminates.

    Parameters
    ----------
    n_servers, payments, p_free
        As for :func:`access_control`.
    max_steps : int, optional
        A time limit (``truncated``); by default none, so the one episode runs
        until the training loop's step budget stops it.

    Returns
    -------
    FiniteMDPEnv
        ``env.unwrapped.mdp`` is the exact model.

    Examples
    --------
    >>> env = access_control_env()
    >>> obs, _ = env.reset(seed=0)
    >>> decode_state(obs)[0]
    10
    >>> _, reward, terminated, truncated, _ = env.step(ACCEPT)
    >>> reward > 0, terminated, truncated
    (True, False, False)
    """
    mdp = access_control(n_servers=n_servers, payments=payments, p_free=p_free)
    return mdp.to_env(max_episode_steps=max_steps)

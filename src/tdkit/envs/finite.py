"""Finite Markov decision processes held as arrays.

A :class:`FiniteMDP` stores transition probabilities, expected rewards, a
discount, an optional terminal mask and a start distribution, in one of two
equivalent forms:

* **dense**: ``P`` of shape ``(S, A, S)``, for small models;
* **sparse successor form**: every state-action pair has at most ``K``
  successors, given as ``next_states`` and ``probs`` of shape ``(S, A, K)``,
  for models with 10^5-10^6 states.

Both forms answer the one question every exact solver asks,
:meth:`FiniteMDP.expected_next`, so the Bellman mathematics in
:mod:`tdkit.dp` is written once and gives the same answers for both.

Terminal states are absorbing with zero reward: whatever rows ``P`` and ``R``
hold for them are replaced by a self-loop with reward 0, so their value is 0.
"""

from __future__ import annotations

import numbers
import warnings
from typing import TYPE_CHECKING, Any

import numpy as np

from .._errors import EnvironmentProtocolError, InvalidParameterError
from .._validation import (
    PROBABILITY_TOLERANCE,
    require_float_array,
    require_in_range,
    require_probability_rows,
)

if TYPE_CHECKING:
    from .model_env import FiniteMDPEnv

__all__ = ["FiniteMDP"]


_REMOVAL = "0.3.0"
"""Version that removes the deprecated keyword spellings."""

_CHUNK_ENTRIES = 2**19
"""Successor slots per block of :meth:`FiniteMDP.expected_next` on large sparse models."""

_DENSE_LIMIT = 2**26
"""Largest number of entries (S * A * S) a sparse model expands to as dense ``P``."""


_UNSET: Any = object()
"""Marks a deprecated keyword that was not passed."""


def _read_action_masks(env: Any, shape: tuple[int, int]) -> np.ndarray | None:
    """Call ``env.unwrapped.action_mask(s)`` for every env state, if the env has it.

    Rows beyond the env's states (the sink state ``from_gymnasium`` may add)
    allow every action. Returns None when the env has no such method.
    """
    base = getattr(env, "unwrapped", env)
    method = getattr(base, "action_mask", None)
    if not callable(method):
        return None
    n_env_states = int(base.observation_space.n)
    masks = np.ones(shape, dtype=bool)
    for s in range(n_env_states):
        row = np.asarray(method(s))
        if row.shape != (shape[1],):
            raise EnvironmentProtocolError(
                f"FiniteMDP.from_gymnasium: env.unwrapped.action_mask({s}) must return "
                f"{shape[1]} entries (one per action); got shape {row.shape}."
            )
        masks[s] = row.astype(bool)
    return masks


def _readonly(array: np.ndarray) -> np.ndarray:
    array.flags.writeable = False
    return array


def _as_float_array(owner: str, name: str, value: Any) -> np.ndarray:
    array = require_float_array(owner, name, value, copy=True)
    bad = ~np.isfinite(array)
    if bad.any():
        index = tuple(int(i) for i in np.argwhere(bad)[0])
        raise InvalidParameterError(
            f"{owner}: {name}{list(index)} = {float(array[index])!r} is not finite; "
            "every entry must be a finite real number."
        )
    return array


def _require_shape(owner: str, name: str, array: np.ndarray, expected: tuple, text: str) -> None:
    if array.shape != expected:
        raise InvalidParameterError(
            f"{owner}: {name} must have shape {text} = {expected}; got shape {array.shape}."
        )


def _reward_arrays(
    owner: str, name: str, rewards: Any, probs: np.ndarray, terminal: np.ndarray, last: str
) -> tuple[np.ndarray, np.ndarray | None]:
    """``(expected (S, A), outcome rewards or None)`` from ``rewards`` of shape (S, A) or
    ``probs.shape``; terminal states get reward 0.

    ``probs`` (S, A, X) holds the outcome probabilities (X next states or
    successor slots, named ``last`` in messages); the expected reward is
    their probability-weighted sum over the last axis.
    """
    r = _as_float_array(owner, name, rewards)
    n_states, n_actions = probs.shape[:2]
    if r.shape == probs.shape:
        outcome: np.ndarray | None = r
        expected = np.einsum("sax,sax->sa", probs, r)
    elif r.shape == (n_states, n_actions):
        outcome, expected = None, r
    else:
        raise InvalidParameterError(
            f"{owner}: {name} must have shape (S, A) = {(n_states, n_actions)} or "
            f"(S, A, {last}) = {probs.shape}; got shape {r.shape}."
        )
    if terminal.any():
        expected = expected.copy()
        expected[terminal] = 0.0
        if outcome is not None:
            outcome[terminal] = 0.0
    return expected, outcome


def _terminal_mask(owner: str, terminal: Any, n_states: int) -> np.ndarray:
    if terminal is None:
        return np.zeros(n_states, dtype=bool)
    mask = np.asarray(terminal)
    if mask.shape != (n_states,):
        raise InvalidParameterError(
            f"{owner}: terminal must be a boolean mask of shape (S,) = ({n_states},); "
            f"got shape {mask.shape}. Pass terminal=None if no state is terminal."
        )
    if mask.dtype != bool:
        if not np.isin(mask, (0, 1)).all():
            raise InvalidParameterError(
                f"{owner}: terminal must hold booleans (or 0/1); got {terminal!r:.80}."
            )
        mask = mask.astype(bool)
    return mask.copy()


def _action_masks(
    owner: str, masks: Any, shape: tuple[int, int], terminal: np.ndarray
) -> np.ndarray | None:
    """Validate an ``(S, A)`` action mask; rows of terminal states become all True."""
    if masks is None:
        return None
    array = np.asarray(masks)
    if array.shape != shape:
        raise InvalidParameterError(
            f"{owner}: masks must be a boolean array of shape (S, A) = {shape}; got shape "
            f"{array.shape}. Pass masks=None if every action is allowed everywhere."
        )
    if array.dtype != bool:
        if array.dtype.kind not in "biu" or not np.isin(array, (0, 1)).all():
            raise InvalidParameterError(
                f"{owner}: masks must hold booleans (or 0/1 integers); got {masks!r:.80}."
            )
    array = array.astype(bool)  # a copy: the caller's array is never kept
    array[terminal] = True
    empty = ~array.any(axis=1)
    if empty.any():
        s = int(np.argmax(empty))
        raise InvalidParameterError(
            f"{owner}: masks[{s}, :] allows no action in non-terminal state {s}; every "
            "non-terminal state needs at least one allowed action (or mark it terminal)."
        )
    return array


def _initial_distribution(
    owner: str, initial: Any, terminal: np.ndarray
) -> np.ndarray:
    n_states = terminal.shape[0]
    if initial is None:
        if terminal.all():
            raise InvalidParameterError(
                f"{owner}: every state is terminal, so there is no state to start in; "
                "leave at least one state non-terminal."
            )
        start = (~terminal).astype(np.float64)
        return start / start.sum()
    start = _as_float_array(owner, "initial", initial)
    _require_shape(owner, "initial", start, (n_states,), "(S,)")
    if (start < 0).any():
        s = int(np.argmax(start < 0))
        raise InvalidParameterError(
            f"{owner}: initial[{s}] = {float(start[s])!r} is negative; a start distribution "
            "has entries >= 0 that sum to 1."
        )
    total = start.sum()
    if abs(total - 1.0) > PROBABILITY_TOLERANCE:
        raise InvalidParameterError(
            f"{owner}: initial sums to {float(total)!r}; it must sum to 1. "
            "Normalise it, e.g. initial = initial / initial.sum()."
        )
    on_terminal = terminal & (start > 0)
    if on_terminal.any():
        s = int(np.argmax(on_terminal))
        raise InvalidParameterError(
            f"{owner}: initial[{s}] = {float(start[s])!r} puts start probability on terminal "
            f"state {s}; episodes must start in non-terminal states."
        )
    return start / total


class FiniteMDP:
    r"""A finite MDP: transitions, expected rewards, discount, terminal states.

    Parameters
    ----------
    P : array_like, shape (S, A, S)
        ``P[s, a, s2]`` is the probability of moving to ``s2`` after taking
        action ``a`` in state ``s``. Each row ``P[s, a, :]`` must be >= 0 and
        sum to 1 (within 1e-8; rows are then renormalised exactly).
    R : array_like, shape (S, A) or (S, A, S)
        Expected reward of taking ``a`` in ``s``, or reward of the transition
        ``(s, a, s2)``; in the latter case the expected reward is
        :math:`\sum_{s'} P(s' \mid s, a) R(s, a, s')` and :meth:`to_env`
        pays the per-transition reward.
    gamma : float
        Discount in [0, 1]. ``gamma=1`` is meaningful for models where the
        policies of interest reach a terminal state with probability 1.
    terminal : array_like of bool, shape (S,), optional
        Terminal states. They are absorbing with zero reward: their rows of
        ``P`` and ``R`` are not checked and are replaced by a self-loop with
        reward 0, so every terminal state has value 0.
    initial : array_like, shape (S,), optional
        Start distribution used by :meth:`to_env`. Default: uniform over the
        non-terminal states. It may not put mass on terminal states.
    masks : array_like of bool, shape (S, A), optional
        Allowed actions: ``masks[s, a]`` is False when action ``a`` may not be
        taken in state ``s`` (as gymnasium's Taxi reports in
        ``info["action_mask"]``). Every non-terminal state needs at least one
        allowed action; rows of terminal states are set to all True. The
        solvers of :mod:`tdkit.dp` never let a masked action enter a maximum
        or an expectation and report its action value as ``-inf``;
        :meth:`to_env` reports the row of the current state as
        ``info["action_mask"]``. Default: every action allowed.

    Attributes
    ----------
    n_states, n_actions : int
    gamma : float
    terminal : ndarray of bool, shape (S,)
    initial : ndarray, shape (S,)
    R : ndarray, shape (S, A)
        Expected one-step rewards (zero on terminal rows).
    masks : ndarray of bool, shape (S, A), or None
        Allowed actions, or None when every action is allowed.
    is_sparse : bool
        Whether the model is held in the sparse successor form.

    All arrays are stored read-only.

    Raises
    ------
    InvalidParameterError
        On wrong shapes, non-finite entries, negative probabilities or rows
        that do not sum to 1 (naming the state and action), ``gamma`` outside
        [0, 1], a malformed terminal mask or start distribution.

    See Also
    --------
    FiniteMDP.from_successors : the sparse form for large models.
    FiniteMDP.from_gymnasium : read gymnasium's discrete environments.
    tdkit.dp : exact solvers.

    References
    ----------
    Puterman, M. L. (1994). Markov Decision Processes: Discrete Stochastic
    Dynamic Programming. Wiley. Chapter 2.

    Examples
    --------
    A two-state chain: action 1 moves from state 0 to the terminal state 1
    and pays 1.

    >>> import numpy as np
    >>> P = np.zeros((2, 2, 2))
    >>> P[0, 0, 0] = 1.0          # action 0 stays in state 0
    >>> P[0, 1, 1] = 1.0          # action 1 ends the episode
    >>> R = np.array([[0.0, 1.0], [0.0, 0.0]])
    >>> mdp = FiniteMDP(P, R, gamma=0.9, terminal=[False, True])
    >>> mdp
    FiniteMDP(n_states=2, n_actions=2, gamma=0.9, form='dense', n_terminal=1)
    >>> mdp.expected_next(np.array([5.0, 7.0]))
    array([[5., 7.],
           [7., 7.]])
    """

    # Instances are built by __init__ or _build; every attribute is set there.
    _P: np.ndarray | None
    _P_flat: np.ndarray | None
    _next: np.ndarray | None
    _probs: np.ndarray | None
    _outcome_rewards: np.ndarray | None

    def __init__(
        self,
        P: Any,
        R: Any,
        *,
        gamma: float,
        terminal: Any = None,
        initial: Any = None,
        masks: Any = None,
    ) -> None:
        owner = "FiniteMDP"
        probs = _as_float_array(owner, "P", P)
        if probs.ndim != 3 or probs.shape[0] != probs.shape[2] or probs.shape[0] < 1:
            raise InvalidParameterError(
                f"{owner}: P must have shape (S, A, S) with S >= 1 and A >= 1; "
                f"got shape {probs.shape}."
            )
        n_states, n_actions = probs.shape[0], probs.shape[1]
        if n_actions < 1:
            raise InvalidParameterError(
                f"{owner}: P must have at least one action; got shape {probs.shape}."
            )
        gamma = require_in_range(owner, "gamma", gamma, 0.0, 1.0)
        term = _terminal_mask(owner, terminal, n_states)
        probs = require_probability_rows(
            owner, "P", probs, skip=term, axes=("state", "action", "next state")
        )
        expected, outcome_rewards = _reward_arrays(owner, "R", R, probs, term, "S")
        start = _initial_distribution(owner, initial, term)
        allowed = _action_masks(owner, masks, (n_states, n_actions), term)
        if term.any():
            idx = np.flatnonzero(term)
            probs[idx] = 0.0
            probs[idx, :, idx] = 1.0
        self._set_common(gamma, term, start, expected, allowed)
        self._P = _readonly(probs)
        self._P_flat = probs.reshape(n_states * n_actions, n_states)
        self._next = self._probs = None
        self._outcome_rewards = None if outcome_rewards is None else _readonly(outcome_rewards)

    def _set_common(
        self,
        gamma: float,
        terminal: np.ndarray,
        initial: np.ndarray,
        rewards: np.ndarray,
        masks: np.ndarray | None = None,
    ) -> None:
        self._gamma = float(gamma)
        self._masks = None if masks is None else _readonly(masks)
        self._terminal = _readonly(terminal)
        self._initial = _readonly(initial)
        self._R = _readonly(np.ascontiguousarray(rewards, dtype=np.float64))
        self._n_states, self._n_actions = rewards.shape
        self._dense_cache: np.ndarray | None = None
        self._successor_cache: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None

    # ------------------------------------------------------------------ builders
    @classmethod
    def from_successors(
        cls,
        next_states: Any,
        probs: Any,
        rewards: Any,
        *,
        gamma: float,
        terminal: Any = None,
        initial: Any = None,
        masks: Any = None,
    ) -> FiniteMDP:
        """Build a model in the sparse successor form.

        Parameters
        ----------
        next_states : array_like of int, shape (S, A, K)
            ``next_states[s, a, k]`` is the k-th possible successor of
            ``(s, a)``. Entries may repeat; pad unused slots with any valid
            index and probability 0.
        probs : array_like, shape (S, A, K)
            Probability of each successor slot; rows sum to 1.
        rewards : array_like, shape (S, A) or (S, A, K)
            Expected reward of ``(s, a)``, or the reward of each successor slot.
        gamma, terminal, initial, masks
            As for :class:`FiniteMDP`.

        Returns
        -------
        FiniteMDP
            A model with ``is_sparse`` true. It gives the same answers as the
            dense model with ``P[s, a, s2] = sum of probs[s, a, k] over the
            slots k with next_states[s, a, k] == s2``.

        Raises
        ------
        InvalidParameterError
            On wrong shapes, out-of-range successor indices, negative
            probabilities or rows not summing to 1 (naming state and action).

        Examples
        --------
        >>> import numpy as np
        >>> nxt = np.array([[[0, 1]], [[1, 1]]])        # S=2, A=1, K=2
        >>> p = np.array([[[0.25, 0.75]], [[1.0, 0.0]]])
        >>> mdp = FiniteMDP.from_successors(nxt, p, np.ones((2, 1)), gamma=0.5)
        >>> mdp.expected_next(np.array([4.0, 8.0]))
        array([[7.],
               [8.]])
        >>> mdp.P[0, 0]
        array([0.25, 0.75])
        """
        owner = "FiniteMDP.from_successors"
        nxt = np.asarray(next_states)
        if nxt.ndim != 3 or min(nxt.shape) < 1:
            raise InvalidParameterError(
                f"{owner}: next_states must have shape (S, A, K) with S, A, K >= 1; "
                f"got shape {nxt.shape}."
            )
        if not np.issubdtype(nxt.dtype, np.integer):
            raise InvalidParameterError(
                f"{owner}: next_states must hold integers; got dtype {nxt.dtype}."
            )
        n_states, n_actions, _ = nxt.shape
        out = (nxt < 0) | (nxt >= n_states)
        if out.any():
            s, a, k = (int(i) for i in np.argwhere(out)[0])
            raise InvalidParameterError(
                f"{owner}: next_states[{s}, {a}, {k}] = {int(nxt[s, a, k])!r} is out of "
                f"range for {n_states} states; indices must be in [0, {n_states})."
            )
        p = _as_float_array(owner, "probs", probs)
        _require_shape(owner, "probs", p, nxt.shape, "(S, A, K)")
        gamma = require_in_range(owner, "gamma", gamma, 0.0, 1.0)
        term = _terminal_mask(owner, terminal, n_states)
        p = require_probability_rows(
            owner, "probs", p, skip=term, axes=("state", "action", "successor slot")
        )
        expected, outcome_rewards = _reward_arrays(owner, "rewards", rewards, p, term, "K")
        start = _initial_distribution(owner, initial, term)
        allowed = _action_masks(owner, masks, (n_states, n_actions), term)
        nxt = np.array(nxt, dtype=np.intp)
        if term.any():
            idx = np.flatnonzero(term)
            nxt[idx] = idx[:, None, None]
            p[idx] = 0.0
            p[idx, :, 0] = 1.0
        return cls._build_sparse(gamma, term, start, expected, nxt, p, outcome_rewards, allowed)

    @classmethod
    def _build_sparse(
        cls,
        gamma: float,
        terminal: np.ndarray,
        initial: np.ndarray,
        rewards: np.ndarray,
        next_states: np.ndarray,
        probs: np.ndarray,
        outcome_rewards: np.ndarray | None,
        masks: np.ndarray | None = None,
    ) -> FiniteMDP:
        """Assemble a sparse model from arrays that are already validated."""
        mdp = cls.__new__(cls)
        mdp._set_common(gamma, terminal, initial, rewards, masks)
        mdp._P = mdp._P_flat = None
        mdp._next = _readonly(np.ascontiguousarray(next_states, dtype=np.intp))
        mdp._probs = _readonly(np.ascontiguousarray(probs, dtype=np.float64))
        mdp._outcome_rewards = (
            None if outcome_rewards is None else _readonly(np.ascontiguousarray(outcome_rewards))
        )
        return mdp

    @classmethod
    def from_gymnasium(cls, env: Any, gamma: float = 0.99) -> FiniteMDP:
        """Read the transition table ``env.unwrapped.P`` of a discrete gymnasium env.

        Works for gymnasium's toy-text environments (FrozenLake, CliffWalking,
        Taxi) and any env whose ``unwrapped.P[s][a]`` is a list of
        ``(probability, next_state, reward, terminated)`` outcomes.

        Outcomes that repeat a next state with the same reward are merged
        (probabilities summed); the same next state with different rewards
        keeps one successor slot per reward, so :meth:`to_env` pays
        gymnasium's rewards. Termination comes from each outcome's
        ``terminated`` flag, not from the table's own rows (a goal cell need
        not be absorbing in ``P``):

        * if every transition into a state is flagged ``terminated`` and every
          flagged transition goes to such a state, those states are marked
          terminal (FrozenLake's holes and goal, CliffWalking's goal); the
          state indices equal the env's observations;
        * otherwise one extra absorbing sink state with index ``S`` (the env's
          number of states) is added, every flagged outcome goes to it and it
          is the only terminal state (Taxi, where a successful drop-off lands
          in a state that is also entered without ending the episode).

        Transitions out of a state that is only entered by terminating
        outcomes are never taken by the env and are ignored. The start
        distribution is ``env.unwrapped.initial_state_distrib`` when present,
        else uniform over non-terminal states.

        Action masks: when the env has a method ``action_mask(state)`` (Taxi:
        gymnasium computes it from the taxi's position, walls and the
        passenger's place, the same array it returns as
        ``info["action_mask"]``), it is called for every state and the model
        carries the result as :attr:`masks` (the added sink allows every
        action). Solvers then respect it, :meth:`to_env` reports it, and
        :func:`tdkit.agent_policy` passes it to the agent.

        Parameters
        ----------
        env : gymnasium.Env
            The environment (wrappers are looked through via ``unwrapped``).
        gamma : float, default 0.99
            Discount of the returned model.

        Returns
        -------
        FiniteMDP
            In the sparse successor form, with per-outcome rewards.

        Raises
        ------
        EnvironmentProtocolError
            If the env has no discrete spaces or no readable table ``P``.
        """
        from ._gym_tables import read_transition_table

        owner = "FiniteMDP.from_gymnasium"
        table = read_transition_table(env)
        gamma = require_in_range(owner, "gamma", gamma, 0.0, 1.0)
        shape = table.probs.shape[:2]
        masks = _action_masks(owner, _read_action_masks(env, shape), shape, table.terminal)
        return cls._build_sparse(
            gamma,
            table.terminal,
            table.initial,
            np.einsum("sak,sak->sa", table.probs, table.rewards),
            table.next_states,
            table.probs,
            table.rewards,
            masks,
        )

    # ------------------------------------------------------------------ accessors
    @property
    def n_states(self) -> int:
        """Number of states ``S``."""
        return self._n_states

    @property
    def n_actions(self) -> int:
        """Number of actions ``A``."""
        return self._n_actions

    @property
    def gamma(self) -> float:
        """Discount factor in [0, 1]."""
        return self._gamma

    @property
    def terminal(self) -> np.ndarray:
        """Read-only boolean mask ``(S,)`` of terminal (absorbing, zero-value) states."""
        return self._terminal

    @property
    def initial(self) -> np.ndarray:
        """Read-only start distribution ``(S,)``."""
        return self._initial

    @property
    def R(self) -> np.ndarray:
        """Read-only expected rewards ``(S, A)``; rows of terminal states are 0."""
        return self._R

    @property
    def masks(self) -> np.ndarray | None:
        """Read-only allowed actions ``(S, A)`` (all True on terminal rows), or None."""
        return self._masks

    @property
    def is_sparse(self) -> bool:
        """True for the sparse successor form, False for the dense form."""
        return self._P is None

    @property
    def P(self) -> np.ndarray:
        """Read-only dense transition array ``(S, A, S)``.

        For a sparse model it is built on first use and cached; models with
        more than 2**26 entries raise instead (use :attr:`successors`).
        """
        if self._P is not None:
            return self._P
        if self._dense_cache is None:
            n, m = self._n_states, self._n_actions
            if n * m * n > _DENSE_LIMIT:
                raise InvalidParameterError(
                    f"FiniteMDP.P: this sparse model has S={n}, A={m}; its dense form "
                    f"would hold {n * m * n} entries (limit {_DENSE_LIMIT}). "
                    "Use mdp.successors or mdp.expected_next instead."
                )
            dense = np.zeros((n * m, n))
            rows = np.repeat(np.arange(n * m), self._next.shape[2])
            np.add.at(dense, (rows, self._next.ravel()), self._probs.ravel())
            self._dense_cache = _readonly(dense.reshape(n, m, n))
        return self._dense_cache

    @property
    def successors(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Sparse view ``(next_states, probs, rewards)``, each ``(S, A, K)``, read-only.

        ``rewards`` is the per-outcome reward (the expected reward repeated
        when only ``(S, A)`` rewards were given). For a dense model ``K`` is
        the largest number of positive-probability successors of any pair;
        the view is built on first use and cached.
        """
        if self._successor_cache is None:
            if self._P is None:
                nxt, probs = self._next, self._probs
                rewards = self._outcome_rewards
            else:
                nonzero = self._P > 0
                k = max(int(nonzero.sum(axis=2).max()), 1)
                order = np.argsort(~nonzero, axis=2, kind="stable")[:, :, :k]
                nxt = order.astype(np.intp)
                probs = np.take_along_axis(self._P, order, axis=2)
                rewards = (
                    None
                    if self._outcome_rewards is None
                    else np.take_along_axis(self._outcome_rewards, order, axis=2)
                )
            if rewards is None:
                rewards = np.broadcast_to(self._R[:, :, None], nxt.shape)
            self._successor_cache = (
                _readonly(np.asarray(nxt)),
                _readonly(np.asarray(probs)),
                _readonly(np.array(rewards)),
            )
        return self._successor_cache

    def _successor_arrays(self) -> tuple[np.ndarray, np.ndarray]:
        """``(next_states, probs)`` of :attr:`successors` without building the rewards.

        For a sparse model these are the stored arrays (no copy), so solvers
        of 10^6-state models do not materialise an (S, A, K) reward array.
        """
        if self._next is not None and self._probs is not None:
            return self._next, self._probs
        next_states, probs, _ = self.successors
        return next_states, probs

    # ------------------------------------------------------------------ algebra
    def expected_next(self, v: np.ndarray) -> np.ndarray:
        r"""Return :math:`\sum_{s'} P(s' \mid s, a)\, v(s')` for every pair, shape ``(S, A)``.

        This is the one operation the exact solvers use; it works for the
        dense form (a matrix-vector product) and the sparse form (a gather
        and a weighted sum over the ``K`` successor slots), with no Python
        loop over states. Terminal rows return ``v`` of the terminal state
        itself (they are self-loops); :func:`tdkit.dp.action_values` zeroes
        them.

        Parameters
        ----------
        v : ndarray, shape (S,)
            A value for every state. Not validated here (hot path); the public
            solvers validate their inputs.

        Returns
        -------
        ndarray, shape (S, A)
        """
        if self._P_flat is not None:
            return (self._P_flat @ v).reshape(self._n_states, self._n_actions)
        nxt, probs = self._next, self._probs
        n, m, k = nxt.shape
        rows = max(1, _CHUNK_ENTRIES // (m * k))
        if rows >= n:
            return np.einsum("sak,sak->sa", probs, np.take(v, nxt))
        # Blocks of states keep the gathered (rows, A, K) temporary in cache:
        # 2-3x faster than one pass at 10^5-10^6 states (benchmarks/bench_dp.py).
        out = np.empty((n, m))
        for start in range(0, n, rows):
            block = slice(start, start + rows)
            np.einsum("sak,sak->sa", probs[block], np.take(v, nxt[block]), out=out[block])
        return out

    # ------------------------------------------------------------------ conversions
    def to_dense(self) -> FiniteMDP:
        """Return the model in the dense form (``self`` if it already is dense)."""
        if not self.is_sparse:
            return self
        rewards: np.ndarray = self._R
        if self._outcome_rewards is not None:
            # Per-transition rewards R(s, a, s2): probability-weighted mean over the
            # slots that share a next state, so expectations are unchanged.
            n, m, _ = self._next.shape
            weighted = np.zeros((n * m, n))
            rows = np.repeat(np.arange(n * m), self._next.shape[2])
            np.add.at(
                weighted,
                (rows, self._next.ravel()),
                (self._probs * self._outcome_rewards).ravel(),
            )
            dense_p = self.P.reshape(n * m, n)
            rewards = np.divide(
                weighted, dense_p, out=np.zeros_like(weighted), where=dense_p > 0
            ).reshape(n, m, n)
        return FiniteMDP(
            self.P,
            rewards,
            gamma=self._gamma,
            terminal=self._terminal,
            initial=self._initial,
            masks=self._masks,
        )

    def to_sparse(self) -> FiniteMDP:
        """Return the model in the sparse successor form (``self`` if already sparse)."""
        if self.is_sparse:
            return self
        nxt, probs, rewards = self.successors
        outcome = None if self._outcome_rewards is None else rewards
        return FiniteMDP._build_sparse(
            self._gamma, self._terminal, self._initial, self._R, nxt, probs, outcome, self._masks
        )

    def with_gamma(self, gamma: float) -> FiniteMDP:
        """Return the same model with another discount (arrays are shared, not copied)."""
        gamma = require_in_range("FiniteMDP.with_gamma", "gamma", gamma, 0.0, 1.0)
        clone = FiniteMDP.__new__(FiniteMDP)
        clone.__dict__.update(self.__dict__)
        clone._gamma = gamma
        return clone

    def to_env(
        self, max_episode_steps: int | None = None, *, max_steps: Any = _UNSET
    ) -> FiniteMDPEnv:
        """Return a :class:`gymnasium.Env` that samples this model.

        Parameters
        ----------
        max_episode_steps : int, optional
            Episodes are truncated (``truncated=True``) after this many steps.
        max_steps : int, optional
            Deprecated spelling of ``max_episode_steps`` (a ``FutureWarning``;
            removed in tdkit 0.3.0).

        Returns
        -------
        FiniteMDPEnv
            ``Discrete(S)`` observations and ``Discrete(A)`` actions; it
            samples with its own ``np_random`` (seeded by ``reset(seed=...)``),
            starts from :attr:`initial`, reports ``terminated=True`` on entering
            a terminal state; ``env.unwrapped.gamma`` and ``env.unwrapped.mdp``
            give the model. When the model has :attr:`masks`, ``info`` holds
            ``"action_mask"``, the boolean row of the current state.

        Examples
        --------
        >>> import numpy as np
        >>> P = np.zeros((2, 1, 2)); P[:, 0, 1] = 1.0
        >>> env = FiniteMDP(P, np.ones((2, 1)), gamma=1.0, terminal=[False, True]).to_env()
        >>> env.reset(seed=0)
        (0, {})
        >>> env.step(0)
        (1, 1.0, True, False, {})
        """
        from .model_env import FiniteMDPEnv

        owner = "FiniteMDP.to_env"
        if max_steps is not _UNSET:
            if max_episode_steps is not None:
                raise InvalidParameterError(
                    f"{owner}: got both max_episode_steps={max_episode_steps!r} and the "
                    f"deprecated max_steps={max_steps!r}; pass max_episode_steps only."
                )
            warnings.warn(
                f"{owner}: max_steps= is deprecated and will be removed in tdkit {_REMOVAL}; "
                "use max_episode_steps= (the name train() uses).",
                FutureWarning,
                stacklevel=2,
            )
            max_episode_steps = max_steps
        if max_episode_steps is not None and not (
            isinstance(max_episode_steps, numbers.Integral)
            and not isinstance(max_episode_steps, bool)
            and max_episode_steps >= 1
        ):
            raise InvalidParameterError(
                f"{owner}: max_episode_steps must be a positive integer or None; "
                f"got {max_episode_steps!r}."
            )
        limit = None if max_episode_steps is None else int(max_episode_steps)
        return FiniteMDPEnv(self, max_episode_steps=limit)

    def __repr__(self) -> str:
        return (
            f"FiniteMDP(n_states={self._n_states}, n_actions={self._n_actions}, "
            f"gamma={self._gamma!r}, form={'sparse' if self.is_sparse else 'dense'!r}, "
            f"n_terminal={int(self._terminal.sum())}"
            + ("" if self._masks is None else ", masked=True")
            + ")"
        )

"""Greedy choice with uniform random tie-breaking, masked maxima, and action sets.

These few functions are the single place where "greedy" is defined; every
learner, exploration rule and verifier goes through them.

Tie-breaking draws one uniform number ``u`` in [0, 1) and picks tie
``floor(u * k)`` among the ``k`` tied actions, so each tied action has
probability 1/k (to within 2**-53).

Two forms of each rule exist: the numpy form (``greedy_action``,
``masked_max``, ...) for array rows, and the pure-Python form
(``greedy_index``, ``row_max``) for a row read as a tuple of floats, which is
what the learners' per-step path uses (a numpy scalar costs several times a
Python float). Both forms draw the same random numbers in the same order and
pick the same action. A mask enters the pure-Python form as an
:class:`ActionSet`, built once per distinct mask by :func:`action_set` and
then reused, so masks cost no array work per step.
"""

from __future__ import annotations

import operator
from collections.abc import Callable, Sequence
from typing import NamedTuple

import numpy as np

from ._errors import InvalidParameterError

__all__ = [
    "ActionSet",
    "ActionSets",
    "check_mask",
    "greedy_action",
    "greedy_index",
    "greedy_rows",
    "masked_max",
    "masked_mean",
    "row_max",
    "uniform_action",
]

_NEG_INF = float("-inf")


def check_mask(mask: object, n_actions: int, *, name: str = "mask") -> np.ndarray:
    """Return ``mask`` as a boolean array of shape ``(n_actions,)`` or raise.

    Boolean arrays of the right shape (the common case on the hot path) cost
    one ``any()``; integer 0/1 masks, as some gymnasium envs return, are
    converted.
    """
    if type(mask) is np.ndarray and mask.dtype == np.bool_ and mask.shape == (n_actions,):
        if mask.any():
            return mask
        arr = mask
    else:
        arr = np.asarray(mask)
        if arr.shape != (n_actions,):
            raise InvalidParameterError(
                f"{name} must be a boolean array of shape ({n_actions},); got shape {arr.shape}."
            )
        if arr.dtype != np.bool_:
            if arr.dtype.kind not in "biu" or arr.min() < 0 or arr.max() > 1:
                raise InvalidParameterError(
                    f"{name} must hold booleans (or 0/1 integers); got {arr!r}."
                )
            arr = arr.astype(bool)
        if arr.any():
            return arr
    raise InvalidParameterError(
        f"{name} allows no action; at least one entry must be True. Got {arr!r}."
    )


def _tied_pick(ties: np.ndarray | list[int], rng: np.random.Generator) -> int:
    k = len(ties)
    if k == 1:
        return int(ties[0])
    return int(ties[int(rng.random() * k)])


def greedy_action(values: np.ndarray, mask: np.ndarray | None, rng: np.random.Generator) -> int:
    """Index of a maximal entry of ``values`` (restricted to ``mask``), ties uniform.

    Raises
    ------
    FloatingPointError
        If the candidate values contain NaN, which would make "greedy" undefined.
    """
    if mask is not None:
        values = np.where(mask, values, _NEG_INF)
    ties = (values == values.max()).nonzero()[0]
    if ties.size == 0:
        raise FloatingPointError(
            f"greedy choice is undefined: action values contain NaN ({values!r}). "
            "Check rewards and step sizes for overflow."
        )
    return _tied_pick(ties, rng)


def uniform_action(n_actions: int, mask: np.ndarray | None, rng: np.random.Generator) -> int:
    """A uniformly random allowed action."""
    if mask is None:
        return int(rng.random() * n_actions)
    allowed = np.flatnonzero(mask)
    return int(allowed[int(rng.random() * allowed.size)])


def masked_max(values: np.ndarray, mask: np.ndarray | None) -> float:
    """``max_a values[a]`` over allowed actions."""
    if mask is None:
        return float(values.max())
    return float(values[mask].max())


def masked_mean(values: np.ndarray, mask: np.ndarray | None) -> float:
    """Mean of ``values`` over allowed actions."""
    if mask is None:
        return float(values.mean())
    return float(values[mask].mean())


def greedy_rows(rows: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Greedy action of each row of ``rows`` (shape (K, A)), ties broken uniformly.

    Row ``i`` picks tie ``floor(u[i] * k_i)`` (in index order) of its ``k_i``
    maximal entries, the rule of :func:`greedy_action` applied
    to every row at once, so each tied action has probability ``1 / k_i``.

    Raises
    ------
    FloatingPointError
        If a row contains NaN (greedy is then undefined).
    """
    ties = rows == rows.max(axis=1, keepdims=True)
    rank = ties.cumsum(axis=1)  # rank[i, j]: maximal entries among rows[i, :j + 1]
    counts = rank[:, -1]
    if not counts.all():
        bad = int(np.argmin(counts))
        raise FloatingPointError(
            f"greedy choice is undefined for learner {bad}: its action values "
            f"contain NaN ({rows[bad]!r}). Check rewards and step sizes for overflow."
        )
    pick = (u * counts).astype(np.intp)
    return (rank > pick[:, None]).argmax(axis=1)


class ActionSet(NamedTuple):
    """The actions one mask allows, prepared once and reused for every step that has it.

    Attributes
    ----------
    indices : tuple of int
        Allowed actions in increasing order (never empty).
    mask : numpy.ndarray
        The same set as a read-only boolean array (for numpy code and
        exploration rules).
    take : callable
        ``take(row)`` returns the values of the allowed actions of a row (a
        tuple, in index order).
    """

    indices: tuple[int, ...]
    mask: np.ndarray
    take: Callable[[Sequence[float]], tuple[float, ...]]


def _make_action_set(mask: np.ndarray) -> ActionSet:
    indices = tuple(int(i) for i in np.flatnonzero(mask))
    frozen = np.array(mask, dtype=bool)
    frozen.flags.writeable = False
    if len(indices) == 1:
        only = indices[0]
        return ActionSet(indices, frozen, lambda row: (row[only],))
    return ActionSet(indices, frozen, operator.itemgetter(*indices))


class ActionSets:
    """A learner's cache of :class:`ActionSet`: each distinct mask is checked and converted once.

    :meth:`get` takes a mask as given to ``act`` or ``observe`` (boolean or
    0/1 integer array of shape ``(n_actions,)``); a numpy mask seen before
    costs one ``tobytes`` and one dict look-up. :meth:`of` takes back the
    read-only boolean array of a set this cache returned (the form
    transitions carry), by identity, and converts any other boolean array.
    At most ``limit`` masks are kept.

    Examples
    --------
    >>> sets = ActionSets(3)
    >>> allowed = sets.get(np.array([0, 1, 1], dtype=np.int8))
    >>> allowed.indices, allowed.take([5.0, 6.0, 7.0])
    ((1, 2), (6.0, 7.0))
    >>> sets.get(np.array([0, 1, 1], dtype=np.int8)) is allowed   # seen before: a look-up
    True
    >>> sets.of(allowed.mask) is allowed
    True
    """

    __slots__ = ("_by_bytes", "_by_id", "limit", "n_actions")

    def __init__(self, n_actions: int, *, limit: int = 4096) -> None:
        self.n_actions = n_actions
        self.limit = limit
        self._by_bytes: dict[bytes, tuple[np.dtype, ActionSet]] = {}
        self._by_id: dict[int, ActionSet] = {}

    def get(self, mask: object, name: str = "mask") -> ActionSet:
        """The set ``mask`` allows.

        Raises
        ------
        InvalidParameterError
            If ``mask`` has the wrong shape, values other than 0/1, or allows
            no action (see :func:`check_mask`).
        """
        if type(mask) is np.ndarray and mask.ndim == 1:
            key = mask.tobytes()
            hit = self._by_bytes.get(key)
            if hit is not None and hit[0] is mask.dtype:
                return hit[1]
            entry = _make_action_set(check_mask(mask, self.n_actions, name=name))
            if len(self._by_bytes) >= self.limit:
                self._by_bytes.clear()
                self._by_id.clear()
            self._by_bytes[key] = (mask.dtype, entry)
            self._by_id[id(entry.mask)] = entry
            return entry
        return _make_action_set(check_mask(mask, self.n_actions, name=name))

    def of(self, mask: np.ndarray | None) -> ActionSet | None:
        """The set of a boolean ``mask`` (None for None); cached arrays are found by identity."""
        if mask is None:
            return None
        hit = self._by_id.get(id(mask))
        if hit is not None and hit.mask is mask:
            return hit
        return self.get(mask)


def _nan_error(row: Sequence[float]) -> FloatingPointError:
    return FloatingPointError(
        f"greedy choice is undefined: action values contain NaN ({list(row)!r}). "
        "Check rewards and step sizes for overflow."
    )


def greedy_index(
    row: Sequence[float], allowed: ActionSet | None, draw: Callable[[], float]
) -> int:
    """:func:`greedy_action` for a row of Python floats: same choice, same draws.

    ``draw`` returns a uniform number in [0, 1) (a generator's bound
    ``random``); it is called only when there are ties.

    Raises
    ------
    FloatingPointError
        If the maximum is NaN. (A NaN that is not the maximum of a tuple
        cannot be seen by ``max``; the learners' TD step never writes a
        non-finite value, so their tables hold none.)

    Examples
    --------
    >>> greedy_index((1.0, 3.0, 2.0), None, lambda: 0.5)
    1
    >>> greedy_index((3.0, 1.0, 3.0), None, lambda: 0.7)   # ties (0, 2): floor(0.7 * 2) = 1
    2
    """
    if allowed is None:
        top = max(row)
        if top != top:
            raise _nan_error(row)
        if row.count(top) == 1:
            return row.index(top)
        ties = [a for a, v in enumerate(row) if v == top]
        return ties[int(draw() * len(ties))]
    values = allowed.take(row)
    top = max(values)
    if top != top:
        raise _nan_error(values)
    indices = allowed.indices
    if values.count(top) == 1:
        return indices[values.index(top)]
    ties = [a for a, v in zip(indices, values, strict=True) if v == top]
    return ties[int(draw() * len(ties))]


def row_max(row: Sequence[float], allowed: ActionSet | None) -> float:
    """:func:`masked_max` for a row of Python floats."""
    return max(row) if allowed is None else max(allowed.take(row))

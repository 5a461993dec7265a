"""Greedy choice with uniform random tie-breaking, masked maxima, and action sets.

These few functions are the single place where "greedy" is defined; every
learner, exploration rule, verifier and the batch kernels go through them.

Tie-breaking takes one uniform number ``u`` in [0, 1) and picks tie
``floor(u * k)`` (in index order) among the ``k`` tied actions, so each tied
action has probability 1/k (to within 2**-53). A single maximum takes no
number.

The rule is written once per representation of the values:

* :func:`greedy_pick`, the definition, on one row (a tuple, list or 1-D array)
  and a sequence of allowed indices, with ``u`` given; plain Python loops, so
  numba compiles it unchanged for :mod:`tdkit.batch` (it is
  :func:`tdkit.learners._targets.greedy_index`); a NaN gives -1;
* :func:`greedy_pick_rows`, the same for a ``(K, A)`` array of rows, bit for
  bit (it is :func:`tdkit.learners._targets.greedy_index_rows`);
* :func:`greedy_action`, the numpy form for one array row, drawing ``u`` from
  a generator (the exploration rules).

:func:`greedy_index` (the learners' per-step path: a row read as a tuple of
floats, a mask as an :class:`ActionSet`, ``u`` from a ``draw`` callable) and
:func:`greedy_rows` are thin adapters over the first two that raise on NaN.
All forms pick the same action from the same numbers, and draw a number only
when there is a tie. A mask enters the per-step form as an :class:`ActionSet`,
built once per distinct mask by :class:`ActionSets` and then reused, so masks
cost no array work per step.
"""

from __future__ import annotations

import operator
from collections.abc import Callable, Sequence
from typing import Any, NamedTuple

import numpy as np

from ._errors import InvalidParameterError

__all__ = [
    "ActionSet",
    "ActionSets",
    "require_mask",
    "greedy_action",
    "greedy_index",
    "greedy_pick",
    "greedy_pick_rows",
    "greedy_rows",
    "immutable_mask",
    "masked_max",
    "masked_mean",
    "row_max",
    "uniform_action",
]

_NEG_INF = float("-inf")


def require_mask(mask: object, n_actions: int, *, name: str = "mask") -> np.ndarray:
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

    :func:`greedy_pick_rows` without a mask, refusing NaN: row ``i`` picks tie
    ``floor(u[i] * k_i)`` (in index order) of its ``k_i`` maximal entries.

    Raises
    ------
    FloatingPointError
        If a row contains NaN (greedy is then undefined).
    """
    best = greedy_pick_rows(rows, None, u)
    undefined = best < 0
    if undefined.any():
        bad = int(np.argmax(undefined))
        raise FloatingPointError(
            f"greedy choice is undefined for learner {bad}: its action values "
            f"contain NaN ({rows[bad]!r}). Check rewards and step sizes for overflow."
        )
    return best


# The two definitions of the tie rule below must stay numba-compilable (tdkit.batch's
# kernel module applies numba.njit to greedy_pick): no keyword-only arguments, no None
# inside the loops, no Python objects, only loops, arithmetic and indexing.
def greedy_pick(values: Sequence[float], allowed: Sequence[int], u: float) -> int:
    r"""An allowed action of maximal value: tie :math:`\lfloor u k \rfloor` of the :math:`k` ties.

    ``allowed`` lists the allowed actions in increasing order (``range(A)``
    without a mask). Returns -1 when an allowed value is NaN (greedy is then
    undefined; the caller raises). One pass finds the maximum, its first
    action and the number of ties; a second pass runs only when there is a
    tie. ``u`` is read only when there is a tie.

    Examples
    --------
    >>> greedy_pick([1.0, 3.0, 3.0, 0.0], range(4), 0.49), greedy_pick([1.0, 3.0, 3.0], (0, 2), 0.0)
    (1, 2)
    """
    best = allowed[0]
    top = values[best]
    k = 1
    for j in range(1, len(allowed)):
        a = allowed[j]
        v = values[a]
        if v > top:
            top = v
            best = a
            k = 1
        elif v == top:
            k += 1
        elif v != v:
            return -1
    if top != top:
        return -1
    if k == 1:
        return best
    pick = int(u * k)
    if pick >= k:  # a rescaled u may round up to 1
        pick = k - 1
    for a in allowed:
        if values[a] == top:
            if pick == 0:
                return a
            pick -= 1
    return -1  # pragma: no cover - only if u >= 1


def greedy_pick_rows(rows: np.ndarray, mask: np.ndarray | None, u: np.ndarray) -> np.ndarray:
    """:func:`greedy_pick` of every row of ``rows`` (K, A); ``mask`` (K, A) bool or None.

    ``u`` has shape (K,); rows with NaN give -1. Same choices as the row form,
    bit for bit.
    """
    candidates = rows if mask is None else np.where(mask, rows, _NEG_INF)
    ties = candidates == candidates.max(axis=1, keepdims=True)  # a NaN max: no ties
    if mask is not None:
        ties &= mask  # an all -inf row: only allowed actions tie
    rank = ties.cumsum(axis=1)  # rank[i, j]: ties among rows[i, :j + 1]
    counts = rank[:, -1]
    pick = np.minimum((u * counts).astype(np.intp), counts - 1)
    best = (rank > pick[:, None]).argmax(axis=1)
    if not counts.all():
        best[counts == 0] = -1
    return best


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


def immutable_mask(mask: Any) -> np.ndarray:
    """``mask`` as a boolean array over a ``bytes`` buffer: read-only for good.

    numpy refuses to make such an array writeable again (its memory belongs to
    an immutable ``bytes``), so its identity stands for its contents:
    :class:`ActionSets` recognises it by ``id`` alone. Any array whose base is
    a ``bytes`` object has that property, whoever made it.

    Examples
    --------
    >>> frozen = immutable_mask(np.array([1, 0, 1], dtype=np.int8))
    >>> frozen.tolist(), frozen.flags.writeable, type(frozen.base) is bytes
    ([True, False, True], False, True)
    """
    return np.frombuffer(np.asarray(mask, dtype=bool).tobytes(), dtype=np.bool_)


def _make_action_set(mask: np.ndarray) -> ActionSet:
    indices = tuple(int(i) for i in np.flatnonzero(mask))
    frozen = immutable_mask(mask)
    if len(indices) == 1:
        only = indices[0]
        return ActionSet(indices, frozen, lambda row: (row[only],))
    return ActionSet(indices, frozen, operator.itemgetter(*indices))


#: Placeholders of :class:`ActionSets`' memo before any immutable mask was seen: no mask
#: given to ``get`` or ``of`` is either of these objects.
_NO_MASK = object()
_NO_SET = ActionSet((), immutable_mask(()), tuple)


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

    __slots__ = ("_by_bytes", "_by_id", "_last_mask", "_last_set", "limit", "n_actions")

    def __init__(self, n_actions: int, *, limit: int = 4096) -> None:
        self.n_actions = n_actions
        self.limit = limit
        self._by_bytes: dict[bytes, tuple[np.dtype, ActionSet]] = {}
        # id -> (array, set) for immutable arrays (the sets' own masks and any array over a
        # bytes buffer): the array is held, so its id cannot be reused while it is here.
        self._by_id: dict[int, tuple[np.ndarray, ActionSet]] = {}
        # The set found last, and the immutable array it was found by (if any): a run hands
        # the same mask over and over (act, then observe, then the target), so one `is`
        # usually answers. Only arrays whose contents cannot change are ever trusted so.
        self._last_mask: object = _NO_MASK
        self._last_set: ActionSet = _NO_SET

    def get(self, mask: object, name: str = "mask") -> ActionSet:
        """The set ``mask`` allows.

        Raises
        ------
        InvalidParameterError
            If ``mask`` has the wrong shape, values other than 0/1, or allows
            no action (see :func:`require_mask`).
        """
        if mask is self._last_mask or mask is self._last_set.mask:
            return self._last_set
        if type(mask) is np.ndarray:
            known = self._by_id.get(id(mask))
            if known is not None and known[0] is mask:  # an immutable mask seen before
                self._last_mask, self._last_set = mask, known[1]
                return known[1]
            if mask.ndim == 1:
                key = mask.tobytes()
                hit = self._by_bytes.get(key)
                if hit is not None and hit[0] is mask.dtype:
                    entry = hit[1]
                else:
                    entry = _make_action_set(require_mask(mask, self.n_actions, name=name))
                    if len(self._by_bytes) >= self.limit:
                        self._by_bytes.clear()
                        self._by_id.clear()
                        self._last_mask, self._last_set = _NO_MASK, _NO_SET
                    self._by_bytes[key] = (mask.dtype, entry)
                    self._by_id[id(entry.mask)] = (entry.mask, entry)
                if type(mask.base) is bytes and len(self._by_id) < 2 * self.limit:
                    # its contents can never change: its identity is enough from now on
                    self._by_id[id(mask)] = (mask, entry)
                    self._last_mask, self._last_set = mask, entry
                else:  # a writable mask is never known by identity; the set's own mask is
                    self._last_mask, self._last_set = _NO_MASK, entry
                return entry
        return _make_action_set(require_mask(mask, self.n_actions, name=name))

    def of(self, mask: np.ndarray | None) -> ActionSet | None:
        """The set of a boolean ``mask`` (None for None); cached arrays are found by identity."""
        if mask is None:
            return None
        if mask is self._last_set.mask or mask is self._last_mask:  # get's first test, inlined
            return self._last_set
        return self.get(mask)


def _nan_error(row: Sequence[float]) -> FloatingPointError:
    return FloatingPointError(
        f"greedy choice is undefined: action values contain NaN ({list(row)!r}). "
        "Check rewards and step sizes for overflow."
    )


def greedy_index(
    row: Sequence[float], allowed: ActionSet | None, draw: Callable[[], float]
) -> int:
    """:func:`greedy_pick` for the per-step path: a row of Python floats, a mask as an ActionSet.

    ``draw`` returns a uniform number in [0, 1) (a generator's bound
    ``random``); it is called only when there are ties, so the choice and
    the numbers drawn are those of :func:`greedy_action`.

    Raises
    ------
    FloatingPointError
        If the maximum is NaN, or there are ties and an allowed value is NaN.
        (A NaN beside a single maximum cannot be seen by ``max``; the
        learners' TD step never writes a non-finite value, so their tables
        hold none.)

    Examples
    --------
    >>> greedy_index((1.0, 3.0, 2.0), None, lambda: 0.5)
    1
    >>> greedy_index((3.0, 1.0, 3.0), None, lambda: 0.7)   # ties (0, 2): floor(0.7 * 2) = 1
    2
    """
    if allowed is None:
        values = row
        indices: Sequence[int] = range(len(row))
    else:
        values = allowed.take(row)
        indices = allowed.indices
    top = max(values)
    if top != top:
        raise _nan_error(values)
    k = values.count(top)
    if k == 1:  # no tie, no draw
        return indices[values.index(top)]
    total = sum(values)
    if total - total != 0.0:  # a NaN (or an infinity) somewhere: the definition decides
        best = greedy_pick(row, indices, draw())
        if best < 0:
            raise _nan_error(values)
        return best
    # All values finite: greedy_pick's choice, found with the C-level count and index.
    pick = int(draw() * k)
    if pick >= k:  # a rescaled u may round up to 1
        pick = k - 1
    i = values.index(top)
    for _ in range(pick):
        i = values.index(top, i + 1)
    return indices[i]


def row_max(row: Sequence[float], allowed: ActionSet | None) -> float:
    """:func:`masked_max` for a row of Python floats."""
    return max(row) if allowed is None else max(allowed.take(row))

"""Observations to table rows, table columns to environment actions.

A tabular learner keeps an ``(n_states, n_actions)`` table. A *state encoder*
maps each observation to a row index in ``range(n_states)``; an *action
encoder* maps a column index to the action the environment expects and back.
Any object with these members works (they are :class:`typing.Protocol` s):

- :class:`StateEncoder`: ``n_states: int`` and ``encode(obs) -> int``;
- :class:`ActionEncoder`: ``n_actions: int``, ``to_env(index) -> action`` and
  ``to_index(action) -> int``.

Encoders here:

========================  ===================================================
:class:`IntegerEncoder`   ints in ``[0, n)`` (``Discrete(n)``); the fastest
:class:`DiscreteEncoder`  ``Discrete(n, start)``: ``obs - start``
:class:`MultiDiscreteEncoder`  integer vectors, row-major mixed radix
:class:`TupleEncoder`     tuples of ints (``Tuple`` of ``Discrete``)
:class:`BinEncoder`       real vectors through explicit bin edges (``Box``)
:class:`HashIndexEncoder` any hashable state, indexed in first-seen order
========================  ===================================================

:func:`for_space` and :func:`action_encoder_for_space` pick an encoder for a
gymnasium space. Every encoder's :meth:`describe` returns a JSON-serialisable
dict and :func:`from_description` rebuilds an equal encoder from it.

Out-of-range values are never wrapped or clipped: they raise
:class:`tdkit.InvalidParameterError` (a ``ValueError``) naming the value and
the allowed range.

Examples
--------
>>> import gymnasium as gym
>>> from tdkit.encoders import for_space
>>> enc = for_space(gym.make("Blackjack-v1").observation_space)
>>> enc
TupleEncoder(sizes=[32, 11, 2], starts=[0, 0, 0])
>>> enc.n_states, enc.encode((14, 10, 1))
(704, 329)
"""

from __future__ import annotations

import bisect
import math
import numbers
import operator
from collections.abc import Hashable, Iterable, Sequence
from typing import Any, ClassVar, Protocol, runtime_checkable

import numpy as np

from ._errors import CapacityError, InvalidParameterError
from ._text import short as _short
from ._validation import require_positive_int

__all__ = [
    "ActionEncoder",
    "BinEncoder",
    "DiscreteEncoder",
    "HashIndexEncoder",
    "IntegerEncoder",
    "MultiDiscreteEncoder",
    "StateEncoder",
    "TupleEncoder",
    "action_encoder_for_space",
    "for_space",
    "from_description",
]

# Tables are numpy arrays indexed by int64; a state count beyond this cannot be a table.
_MAX_STATES = 2**62


@runtime_checkable
class StateEncoder(Protocol):
    """Maps an observation to a table row index in ``range(n_states)``."""

    n_states: int

    def encode(self, obs: Any) -> int:
        """Return the row index of ``obs``."""
        ...


@runtime_checkable
class ActionEncoder(Protocol):
    """Maps table column indices to environment actions and back."""

    n_actions: int

    def to_env(self, index: int) -> Any:
        """Return the environment action for column ``index``."""
        ...

    def to_index(self, action: Any) -> int:
        """Return the column index of the environment action ``action``."""
        ...


class _Encoder:
    """Shared ``describe``/``__repr__``/``__eq__`` from the constructor parameters."""

    kind: ClassVar[str]

    def _params(self) -> dict[str, Any]:
        raise NotImplementedError

    def describe(self) -> dict[str, Any]:
        """Return ``{"kind": ..., **constructor arguments}``, JSON-serialisable.

        :func:`from_description` rebuilds an equal encoder from it.
        """
        return {"kind": self.kind, **self._params()}

    def __repr__(self) -> str:
        args = ", ".join(f"{k}={v!r}" for k, v in self._params().items())
        return f"{type(self).__name__}({args})"

    def __eq__(self, other: object) -> bool:
        if type(other) is not type(self):
            return NotImplemented
        return self._params() == other._params()  # type: ignore[attr-defined]

    __hash__ = None  # type: ignore[assignment]


class DiscreteEncoder(_Encoder):
    """Integers ``start, ..., start + n - 1`` (gymnasium ``Discrete(n, start)``).

    ``encode(obs) = obs - start`` and ``to_env(i) = start + i`` (a Python
    ``int``, which gymnasium's ``Discrete.contains`` accepts). Used for both
    observations and actions.

    Parameters
    ----------
    n : int
        Number of values, >= 1.
    start : int, default 0
        Smallest value.

    Raises
    ------
    InvalidParameterError
        From the constructor for a bad ``n`` or ``start``; from
        ``encode``/``to_index`` for a value that is not an integer or lies
        outside ``[start, start + n)``; from ``to_env`` for an index outside
        ``[0, n)``.

    Examples
    --------
    >>> enc = DiscreteEncoder(3, start=-1)
    >>> [enc.encode(v) for v in (-1, 0, 1)], enc.to_env(2)
    ([0, 1, 2], 1)
    """

    kind = "discrete"

    def __init__(self, n: int, start: int = 0) -> None:
        owner = type(self).__name__
        self.n_states = self.n_actions = require_positive_int(owner, "n", n)
        if isinstance(start, bool) or not isinstance(start, numbers.Integral):
            raise InvalidParameterError(f"{owner}: start must be an integer; got {start!r}.")
        self.start = int(start)

    def _params(self) -> dict[str, Any]:
        return {"n": self.n_states, "start": self.start}

    def encode(self, obs: Any) -> int:
        """Return ``obs - start``; ``obs`` must be an integer in ``[start, start + n)``."""
        index = _as_int(obs, self, "observation") - self.start
        if 0 <= index < self.n_states:
            return index
        raise _out_of_range(self, "observation", obs, self.start, self.start + self.n_states)

    def to_index(self, action: Any) -> int:
        """Return ``action - start``; the inverse of :meth:`to_env`."""
        index = _as_int(action, self, "action") - self.start
        if 0 <= index < self.n_states:
            return index
        raise _out_of_range(self, "action", action, self.start, self.start + self.n_states)

    def to_env(self, index: int) -> int:
        """Return the action ``start + index`` for a column ``index`` in ``[0, n)``."""
        i = _as_int(index, self, "index")
        if 0 <= i < self.n_states:
            return self.start + i
        raise _out_of_range(self, "index", index, 0, self.n_states)


class IntegerEncoder(DiscreteEncoder):
    """Integers ``0, ..., n - 1`` as they are: the identity, with range checks.

    The encoder of ``Discrete(n)`` spaces (``FrozenLake``, ``Taxi``,
    ``CliffWalking``). ``encode`` is on every step's path, so a Python ``int``
    in range costs one type test and one chained comparison; numpy integers
    and 0-d integer arrays go through :func:`operator.index`. Negative values
    raise (they never index the table from the end), and so do floats and
    bools.

    Parameters
    ----------
    n : int
        Number of states (and actions), >= 1.

    Examples
    --------
    >>> import numpy as np
    >>> enc = IntegerEncoder(16)
    >>> enc.encode(5), enc.encode(np.int64(5)), enc.to_env(3)
    (5, 5, 3)
    >>> enc.encode(-1)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    tdkit.InvalidParameterError: IntegerEncoder(n=16): observation -1 is outside [0, 16)...
    """

    kind = "integer"

    def __init__(self, n: int) -> None:
        super().__init__(n, 0)

    def _params(self) -> dict[str, Any]:
        return {"n": self.n_states}

    def encode(self, obs: Any) -> int:
        """Return ``obs`` itself; it must be an integer in ``[0, n)``."""
        if type(obs) is int and 0 <= obs < self.n_states:
            return obs
        return DiscreteEncoder.encode(self, obs)

    def to_index(self, action: Any) -> int:
        """Return ``action`` itself; it must be an integer in ``[0, n)``."""
        if type(action) is int and 0 <= action < self.n_states:
            return action
        return DiscreteEncoder.to_index(self, action)

    def to_env(self, index: int) -> int:
        """Return ``index`` as a Python ``int``; it must lie in ``[0, n)``."""
        if type(index) is int and 0 <= index < self.n_states:
            return index
        return DiscreteEncoder.to_env(self, index)


class _MixedRadixEncoder(_Encoder):
    """Integer vectors numbered row-major (mixed radix), the one numbering of
    :class:`MultiDiscreteEncoder` and :class:`TupleEncoder`.

    Component ``k`` lies in ``[start_k, start_k + size_k)``; the index is
    ``sum_k (v_k - start_k) * prod_{j > k} size_j``, the order of
    :func:`numpy.ravel_multi_index`. Subclasses read the components of a
    value (``_components``) and build a value from them (``to_env``).
    """

    _range_text: ClassVar[str]
    """How messages name the range of component ``k``."""

    def _set_components(self, owner: str, sizes: list[int], starts: list[int]) -> None:
        self.n_states = self.n_actions = _checked_product(owner, sizes)
        self._dims = tuple(zip(sizes, starts, strict=True))
        self._strides = tuple(math.prod(sizes[k + 1 :]) for k in range(len(sizes)))

    def encode(self, obs: Any) -> int:
        """Return the mixed-radix index of ``obs``."""
        return self._index(obs, "observation")

    def to_index(self, action: Any) -> int:
        """Return the column index of ``action``."""
        return self._index(action, "action")

    def _components(self, value: Any, what: str) -> Sequence[Any]:
        """The components of ``value`` (ints, or integers that ``_index`` converts), or
        raise naming ``what``."""
        raise NotImplementedError

    def _index(self, value: Any, what: str) -> int:
        index = 0
        for v, (size, start) in zip(self._components(value, what), self._dims, strict=False):
            digit = (v if type(v) is int else _as_int(v, self, what)) - start
            if not 0 <= digit < size:
                raise InvalidParameterError(
                    f"{_short(self)}: {what} {_short(value)} is out of range; component k must "
                    f"lie in {self._range_text}."
                )
            index = index * size + digit
        return index

    def _values(self, index: int) -> list[int]:
        """The components of the vector whose index is ``index``."""
        i = _as_int(index, self, "index")
        if not 0 <= i < self.n_states:
            raise _out_of_range(self, "index", index, 0, self.n_states)
        return [
            start + (i // stride) % size
            for (size, start), stride in zip(self._dims, self._strides, strict=True)
        ]


class MultiDiscreteEncoder(_MixedRadixEncoder):
    """Integer vectors (gymnasium ``MultiDiscrete(nvec, start=start)``).

    The row index is the row-major (C order) mixed-radix number of
    ``obs - start``: for ``nvec = (n_1, ..., n_d)``,
    ``index = sum_k (obs_k - start_k) * prod_{j > k} n_j``, the same order as
    :func:`numpy.ravel_multi_index`. ``n_states = prod(nvec)``. A
    multi-dimensional ``nvec`` is flattened in C order. ``to_env`` returns an
    ``int64`` array shaped like ``nvec``.

    Parameters
    ----------
    nvec : array_like of int
        Number of values of each component, each >= 1.
    start : array_like of int, optional
        Smallest value of each component (default all 0).

    Examples
    --------
    >>> enc = MultiDiscreteEncoder([2, 3])
    >>> [enc.encode(v) for v in ([0, 0], [0, 2], [1, 0], [1, 2])]
    [0, 2, 3, 5]
    >>> enc.to_env(4)
    array([1, 1])
    """

    kind = "multi_discrete"
    _range_text = "[start[k], start[k] + nvec[k])"

    def __init__(self, nvec: Any, start: Any = None) -> None:
        owner = type(self).__name__
        self._nvec = _int_array(owner, "nvec", nvec)
        if self._nvec.size == 0 or (self._nvec < 1).any():
            raise InvalidParameterError(
                f"{owner}: nvec must be a non-empty array of integers >= 1; got {nvec!r}."
            )
        if start is None:
            self._start = np.zeros_like(self._nvec)
        else:
            self._start = _int_array(owner, "start", start)
            if self._start.shape != self._nvec.shape:
                raise InvalidParameterError(
                    f"{owner}: start must have the shape of nvec {self._nvec.shape}; got "
                    f"{start!r} of shape {self._start.shape}."
                )
        self._set_components(owner, self._nvec.ravel().tolist(), self._start.ravel().tolist())

    @property
    def nvec(self) -> np.ndarray:
        """Number of values of each component (a copy)."""
        return self._nvec.copy()

    @property
    def start(self) -> np.ndarray:
        """Smallest value of each component (a copy)."""
        return self._start.copy()

    def _params(self) -> dict[str, Any]:
        return {"nvec": self._nvec.tolist(), "start": self._start.tolist()}

    def to_env(self, index: int) -> np.ndarray:
        """Return the integer vector (``int64`` array shaped like ``nvec``) of ``index``."""
        return np.array(self._values(index), dtype=np.int64).reshape(self._nvec.shape)

    def _components(self, value: Any, what: str) -> list[int]:
        # Python ints and a loop beat numpy's per-call overhead for the few
        # components a tabular problem has.
        a = value if type(value) is np.ndarray else np.asarray(value)
        kind = a.dtype.kind
        if a.shape != self._nvec.shape or kind not in "iub":
            raise InvalidParameterError(
                f"{_short(self)}: {what} must be an integer array of shape {self._nvec.shape}; "
                f"got {_short(value)} (shape {a.shape}, dtype {a.dtype})."
            )
        return (a.astype(np.int64) if kind == "b" else a).ravel().tolist()


class TupleEncoder(_MixedRadixEncoder):
    """Tuples of integers (gymnasium ``Tuple`` of ``Discrete`` spaces).

    Component ``k`` takes the values ``starts[k], ..., starts[k] + sizes[k] - 1``;
    the row index is their row-major mixed-radix number, as in
    :class:`MultiDiscreteEncoder`. ``Blackjack-v1`` (Sutton & Barto, 2018,
    *Reinforcement Learning: An Introduction*, 2nd ed., Example 5.1) observes
    ``(player_sum, dealer_card, usable_ace)`` in
    ``Tuple(Discrete(32), Discrete(11), Discrete(2))``. ``to_env`` returns a
    tuple of Python ints.

    Parameters
    ----------
    sizes : sequence of int
        Number of values of each component, each >= 1.
    starts : sequence of int, optional
        Smallest value of each component (default all 0).

    Examples
    --------
    >>> enc = TupleEncoder([32, 11, 2])
    >>> enc.encode((21, 10, 1)), enc.to_env(enc.encode((21, 10, 1)))
    (483, (21, 10, 1))
    """

    kind = "tuple"
    _range_text = "[starts[k], starts[k] + sizes[k])"

    def __init__(self, sizes: Sequence[int], starts: Sequence[int] | None = None) -> None:
        owner = type(self).__name__
        sizes_list = _int_list(owner, "sizes", sizes)
        if not sizes_list or min(sizes_list) < 1:
            raise InvalidParameterError(
                f"{owner}: sizes must be a non-empty sequence of integers >= 1; got {sizes!r}."
            )
        if starts is None:
            starts_list = [0] * len(sizes_list)
        else:
            starts_list = _int_list(owner, "starts", starts)
            if len(starts_list) != len(sizes_list):
                raise InvalidParameterError(
                    f"{owner}: starts must have one entry per size ({len(sizes_list)}); "
                    f"got {starts!r}."
                )
        self.sizes = tuple(sizes_list)
        self.starts = tuple(starts_list)
        self._set_components(owner, sizes_list, starts_list)

    def _params(self) -> dict[str, Any]:
        return {"sizes": list(self.sizes), "starts": list(self.starts)}

    def to_env(self, index: int) -> tuple[int, ...]:
        """Return the tuple of Python ints whose index is ``index``."""
        return tuple(self._values(index))

    def _components(self, value: Any, what: str) -> Sequence[Any]:
        try:
            if len(value) != len(self._dims):
                raise TypeError
        except TypeError:
            raise InvalidParameterError(
                f"{_short(self)}: {what} must be a sequence of {len(self._dims)} integers; got "
                f"{_short(value)}."
            ) from None
        return value


class BinEncoder(_Encoder):
    """Real vectors through explicit bins, one set of edges per dimension.

    ``edges[k]`` holds the *inner* edges of dimension ``k``, strictly
    increasing; its ``len(edges[k]) + 1`` bins are
    ``(-inf, e_0), [e_0, e_1), ..., [e_last, inf)``, so component ``x_k`` falls
    in bin ``numpy.digitize(x_k, edges[k])`` (equivalently
    ``numpy.searchsorted(edges[k], x_k, side="right")``). Bins combine
    row-major: ``n_states = prod(len(e) + 1 for e in edges)``. Values outside
    the edges land in the end bins (nothing is clipped away); NaN raises.

    There is no automatic binning of ``Box`` spaces: the resolution of the
    bins decides what a tabular learner can learn, so it is chosen by the
    user, for example ``np.linspace(low, high, k + 1)[1:-1]`` for ``k`` equal
    bins on ``[low, high]``.

    Parameters
    ----------
    edges : sequence of 1-D array_like of float
        Inner bin edges of each dimension (may be empty: one bin).

    Examples
    --------
    >>> enc = BinEncoder([[0.0], [-1.0, 1.0]])       # 2 x 3 bins
    >>> enc.n_states, enc.encode([-5.0, 0.0]), enc.encode([0.0, 1.0])
    (6, 1, 5)
    """

    kind = "bin"

    def __init__(self, edges: Sequence[Any]) -> None:
        owner = type(self).__name__
        if isinstance(edges, str | bytes) or not isinstance(edges, Iterable):
            raise InvalidParameterError(
                f"{owner}: edges must be a sequence with one 1-D array of inner bin edges per "
                f"dimension; got {edges!r}."
            )
        arrays = []
        for k, e in enumerate(edges):
            try:
                a = np.asarray(e, dtype=float)
            except (TypeError, ValueError):
                a = None
            if (
                a is None
                or a.ndim != 1
                or not np.isfinite(a).all()
                or (a.size > 1 and not (np.diff(a) > 0).all())
            ):
                raise InvalidParameterError(
                    f"{owner}: edges[{k}] must be a 1-D array of finite, strictly increasing "
                    f"floats; got {_short(e)}."
                )
            arrays.append(a)
        if not arrays:
            raise InvalidParameterError(f"{owner}: edges must name at least one dimension.")
        self._edges = tuple(arrays)
        self._edge_lists = tuple(a.tolist() for a in arrays)
        self._dims = tuple((lst, len(lst) + 1) for lst in self._edge_lists)
        self.n_states = _checked_product(owner, [n for _, n in self._dims])

    @property
    def edges(self) -> tuple[np.ndarray, ...]:
        """Inner bin edges of each dimension (copies)."""
        return tuple(a.copy() for a in self._edges)

    @property
    def bins(self) -> tuple[int, ...]:
        """Number of bins of each dimension."""
        return tuple(n for _, n in self._dims)

    def _params(self) -> dict[str, Any]:
        return {"edges": [list(lst) for lst in self._edge_lists]}

    def encode(self, obs: Any) -> int:
        """Return the row index of the bin holding the real vector ``obs``."""
        values = obs.tolist() if isinstance(obs, np.ndarray) else obs
        if not isinstance(values, list | tuple):
            values = [values]
        elif values and isinstance(values[0], list | tuple):  # a multi-dimensional Box
            values = np.ravel(values).tolist()
        if len(values) != len(self._dims):
            raise InvalidParameterError(
                f"{type(self).__name__}: observation {_short(obs)} has {len(values)} "
                f"component(s); the edges define {len(self._dims)}."
            )
        index = 0
        for x, (edges, n) in zip(values, self._dims, strict=False):  # lengths checked
            if x != x:  # NaN (a string or None fails in bisect below)
                raise InvalidParameterError(
                    f"{type(self).__name__}: observation {_short(obs)} has a NaN component; "
                    "bins need real numbers."
                )
            try:
                index = index * n + bisect.bisect_right(edges, x)
            except TypeError:
                raise InvalidParameterError(
                    f"{type(self).__name__}: observation {_short(obs)} has a non-numeric "
                    f"component {x!r}; bins need real numbers."
                ) from None
        return index


class HashIndexEncoder(_Encoder):
    """Any hashable state, numbered in first-seen order up to ``capacity``.

    The table has ``capacity`` rows (``n_states == capacity``); the first new
    state gets row 0, the next row 1, and so on. States are dictionary keys,
    so states that compare equal share a row (``1``, ``1.0`` and ``True`` are
    one state; so are ``np.int64(3)`` and ``3``). Use it for hand-written
    simulators whose states are tuples or other hashable objects.

    It also works as an action encoder over a fixed list of actions
    (``n_actions == capacity``): ``HashIndexEncoder(3, states=["left",
    "right", "stay"])`` maps columns 0, 1, 2 to those actions.

    Parameters
    ----------
    capacity : int
        Maximum number of distinct states (rows of the table), >= 1.
    states : iterable of hashable, optional
        States registered in this order before any is observed.

    Attributes
    ----------
    states : list
        The registered states in index order (a copy).

    Raises
    ------
    CapacityError
        From ``encode`` when a new state arrives and ``capacity`` states are
        already registered.
    TypeError
        From ``encode`` for an unhashable observation (a list, a numpy array).

    Examples
    --------
    >>> enc = HashIndexEncoder(3)
    >>> enc.encode((0, 1)), enc.encode("goal"), enc.encode((0, 1))
    (0, 1, 0)
    >>> enc.states
    [(0, 1), 'goal']
    """

    kind = "hash_index"

    def __init__(self, capacity: int, states: Iterable[Hashable] = ()) -> None:
        self.capacity = require_positive_int(type(self).__name__, "capacity", capacity)
        self.n_states = self.n_actions = self.capacity
        self._index: dict[Hashable, int] = {}
        self._states: list[Hashable] = []
        self.register(states)

    @property
    def states(self) -> list[Hashable]:
        """The registered states, in index order (a copy)."""
        return list(self._states)

    def __len__(self) -> int:
        """Number of registered states."""
        return len(self._states)

    def register(self, states: Iterable[Hashable]) -> list[int]:
        """Register ``states`` in order (known ones keep their index); return their indices."""
        if isinstance(states, str | bytes):
            raise InvalidParameterError(
                f"{type(self).__name__}.register: states must be an iterable of states; got the "
                f"string {states!r}. Wrap a single state in a list: register([state])."
            )
        return [self.encode(s) for s in states]

    def encode(self, obs: Hashable) -> int:
        """Return the index of ``obs``, registering it when new."""
        try:
            return self._index[obs]
        except KeyError:
            return self._add(obs)
        except TypeError:
            raise TypeError(
                f"{type(self).__name__}: observation {_short(obs)} of type "
                f"{type(obs).__name__} is not hashable, so it cannot be a table key. Convert it "
                "to a hashable value first, e.g. tuple(obs) for a list or a 1-D array "
                "(obs.tolist() first for numpy values), or use a BinEncoder for real vectors."
            ) from None

    def _add(self, obs: Hashable) -> int:
        index = len(self._states)
        if index >= self.capacity:
            raise CapacityError(
                f"{type(self).__name__}: capacity {self.capacity} is full, so the new state "
                f"{_short(obs)} gets no row. Build the encoder (and the learner's table) with "
                f"a larger capacity, e.g. HashIndexEncoder({2 * self.capacity})."
            )
        self._index[obs] = index
        self._states.append(obs)
        return index

    def to_index(self, action: Hashable) -> int:
        """Return the column of ``action`` (registering it when new, like :meth:`encode`)."""
        return self.encode(action)

    def to_env(self, index: int) -> Hashable:
        """Return the registered state (or action) with index ``index``."""
        i = _as_int(index, self, "index")
        if 0 <= i < len(self._states):
            return self._states[i]
        raise InvalidParameterError(
            f"{type(self).__name__}: index {index!r} has no registered value; "
            f"{len(self._states)} of {self.capacity} are registered. Register the actions "
            "first: HashIndexEncoder(capacity, states=[...])."
        )

    def _params(self) -> dict[str, Any]:
        return {"capacity": self.capacity, "states": list(self._states)}

    def describe(self) -> dict[str, Any]:
        """Return ``{"kind": "hash_index", "capacity": ..., "states": [...]}``.

        Tuples in states become JSON lists (:func:`from_description` turns
        them back into tuples: a list cannot be a state, being unhashable);
        numpy scalars become Python numbers, which hash the same.

        Raises
        ------
        InvalidParameterError
            If a state is not made of ``None``, bools, ints, finite floats,
            strings and tuples of these.
        """
        return {
            "kind": self.kind,
            "capacity": self.capacity,
            "states": [_state_to_json(s, s) for s in self._states],
        }

    def __repr__(self) -> str:
        return f"{type(self).__name__}(capacity={self.capacity}, registered={len(self)})"


# -- choosing encoders for gymnasium spaces --------------------------------------------------


def for_space(space: Any) -> DiscreteEncoder | MultiDiscreteEncoder | TupleEncoder:
    """Return the state encoder for a gymnasium observation space.

    ``Discrete`` -> :class:`IntegerEncoder` (``start == 0``) or
    :class:`DiscreteEncoder`; ``MultiDiscrete`` and ``MultiBinary`` ->
    :class:`MultiDiscreteEncoder`; ``Tuple`` of ``Discrete`` ->
    :class:`TupleEncoder`.

    Raises
    ------
    InvalidParameterError
        For a ``Box`` (pass a :class:`BinEncoder` with explicit edges), for
        other spaces (pass a :class:`HashIndexEncoder`), and for ``None`` or a
        non-space.

    Examples
    --------
    >>> from gymnasium.spaces import Discrete, MultiDiscrete
    >>> for_space(Discrete(16)), for_space(Discrete(3, start=-1))
    (IntegerEncoder(n=16), DiscreteEncoder(n=3, start=-1))
    >>> for_space(MultiDiscrete([3, 4])).n_states
    12
    """
    from gymnasium import spaces

    if isinstance(space, spaces.Discrete):
        return _discrete_encoder(space)
    if isinstance(space, spaces.MultiDiscrete):
        return MultiDiscreteEncoder(space.nvec, start=getattr(space, "start", None))
    if isinstance(space, spaces.MultiBinary):
        return MultiDiscreteEncoder(np.full(space.shape, 2))
    if isinstance(space, spaces.Tuple) and all(
        isinstance(s, spaces.Discrete) for s in space.spaces
    ):
        return TupleEncoder([int(s.n) for s in space.spaces], [int(s.start) for s in space.spaces])
    if isinstance(space, spaces.Box):
        raise InvalidParameterError(
            f"for_space: {space!r} is continuous and has no automatic table encoding. Pass "
            "state_encoder=BinEncoder(edges) with explicit inner bin edges per dimension, e.g. "
            "[np.linspace(lo, hi, k + 1)[1:-1] for lo, hi in zip(space.low, space.high)] for "
            "k equal bins each."
        )
    if isinstance(space, spaces.Space):
        raise InvalidParameterError(
            f"for_space: no table encoder for {_short(space)}. Pass "
            "state_encoder=HashIndexEncoder(capacity) (states must be hashable, e.g. tuples) "
            "or write an encoder with n_states and encode(obs)."
        )
    raise InvalidParameterError(
        f"for_space: expected a gymnasium.spaces.Space; got {_short(space)} of type "
        f"{type(space).__name__}. Without an observation space, pass an encoder explicitly, "
        "e.g. HashIndexEncoder(capacity)."
    )


def action_encoder_for_space(space: Any) -> DiscreteEncoder:
    """Return the action encoder for a gymnasium ``Discrete`` action space.

    Raises
    ------
    InvalidParameterError
        For any other space: tabular learners need finitely many actions
        given as ``Discrete``; use an explicit :class:`ActionEncoder` otherwise.

    Examples
    --------
    >>> from gymnasium.spaces import Discrete
    >>> action_encoder_for_space(Discrete(4))
    IntegerEncoder(n=4)
    """
    from gymnasium import spaces

    if isinstance(space, spaces.Discrete):
        return _discrete_encoder(space)
    raise InvalidParameterError(
        f"action_encoder_for_space: tabular learners need a Discrete action space; got "
        f"{_short(space)}. Pass action_encoder=... explicitly (MultiDiscreteEncoder, "
        "TupleEncoder, HashIndexEncoder(k, states=[...]) or any object with n_actions, "
        "to_env(index) and to_index(action))."
    )


def from_description(description: dict[str, Any]) -> _Encoder:
    """Rebuild an encoder from its :meth:`describe` output.

    Examples
    --------
    >>> enc = TupleEncoder([3, 2], starts=[1, 0])
    >>> from_description(enc.describe()) == enc
    True
    """
    try:
        kind = description["kind"]
        cls = _KINDS[kind]
    except (KeyError, TypeError):
        raise InvalidParameterError(
            f"from_description: expected a dict with 'kind' one of {sorted(_KINDS)}; got "
            f"{_short(description)}."
        ) from None
    params = {k: v for k, v in description.items() if k != "kind"}
    if cls is HashIndexEncoder and "states" in params:
        params["states"] = [_state_from_json(s) for s in params["states"]]
    try:
        return cls(**params)
    except TypeError as exc:
        raise InvalidParameterError(
            f"from_description: bad parameters for {cls.__name__}: {exc}."
        ) from None


_KINDS: dict[str, type[_Encoder]] = {
    cls.kind: cls
    for cls in (
        IntegerEncoder,
        DiscreteEncoder,
        MultiDiscreteEncoder,
        TupleEncoder,
        BinEncoder,
        HashIndexEncoder,
    )
}


# -- helpers ---------------------------------------------------------------------------------


def _discrete_encoder(space: Any) -> DiscreteEncoder:
    n, start = int(space.n), int(space.start)
    return IntegerEncoder(n) if start == 0 else DiscreteEncoder(n, start)


def _as_int(value: Any, owner: Any, what: str) -> int:
    """``operator.index(value)``, rejecting bools; numpy ints and 0-d int arrays pass."""
    if isinstance(value, bool | np.bool_):
        raise InvalidParameterError(
            f"{_short(owner)}: {what} must be an integer; got the bool {value!r}."
        )
    try:
        return operator.index(value)
    except TypeError:
        raise InvalidParameterError(
            f"{_short(owner)}: {what} must be an integer (int, numpy integer or 0-d integer "
            f"array); got {_short(value)} of type {type(value).__name__}."
        ) from None


def _out_of_range(owner: Any, what: str, value: Any, low: int, high: int) -> InvalidParameterError:
    return InvalidParameterError(
        f"{_short(owner)}: {what} {_short(value)} is outside [{low}, {high}). Check the "
        "environment's space, or the encoder's size."
    )


def _int_list(owner: str, name: str, values: Any) -> list[int]:
    try:
        items = list(values)
    except TypeError:
        items = None
    if items is None or any(
        isinstance(v, bool | np.bool_) or not isinstance(v, numbers.Integral) for v in items
    ):
        raise InvalidParameterError(
            f"{owner}: {name} must be a sequence of integers; got {_short(values)}."
        )
    return [int(v) for v in items]


def _int_array(owner: str, name: str, values: Any) -> np.ndarray:
    a = np.asarray(values)
    if a.size == 0 and a.ndim > 0:  # [] is a float array; let the caller say "non-empty"
        return a.astype(np.int64)
    if a.dtype.kind not in "iu" or a.ndim == 0:
        raise InvalidParameterError(
            f"{owner}: {name} must be an array of integers; got {_short(values)}."
        )
    return a.astype(np.int64)


def _checked_product(owner: str, sizes: list[int]) -> int:
    n = math.prod(sizes)
    if n > _MAX_STATES:
        raise InvalidParameterError(
            f"{owner}: {n} combinations is too many for a table (at most 2**62). Coarsen the "
            "encoding, or use HashIndexEncoder(capacity) for the states actually visited."
        )
    return n


def _state_to_json(state: Any, whole: Any) -> Any:
    if state is None or isinstance(state, bool | int | str):
        return state
    if isinstance(state, float):
        if math.isfinite(state):
            return state
    elif isinstance(state, np.generic) and state.dtype.kind in "biuf":
        return _state_to_json(state.item(), whole)
    elif isinstance(state, tuple):
        return [_state_to_json(s, whole) for s in state]
    raise InvalidParameterError(
        f"HashIndexEncoder.describe: state {_short(whole)} cannot be saved as JSON (its part "
        f"{_short(state)} of type {type(state).__name__} is not None, a bool, an int, a finite "
        "float, a str or a tuple of these). Map states to such values before encoding them."
    )


def _state_from_json(value: Any) -> Any:
    if isinstance(value, list):
        return tuple(_state_from_json(v) for v in value)
    return value

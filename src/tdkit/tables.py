"""Dense action-value tables with visit counts.

A table has one row per encoded state and one column per action. Next to the
values it keeps ``visits[s, a]``, the number of updates applied to each pair,
which per-pair step sizes (:class:`tdkit.schedules.VisitCount`) and UCB read.
"""

from __future__ import annotations

import math
import numbers
import os

import numpy as np

from ._errors import CapacityError, InvalidParameterError
from ._validation import require_positive_int

__all__ = ["ActionValueTable", "InitialValue", "available_memory", "initial_values",
           "read_only", "require_capacity"]

#: A constant (optimistic if large), or ``(low, high)`` for seeded uniform noise.
InitialValue = float | tuple[float, float]


def available_memory() -> int | None:
    """Bytes of memory available to new allocations, or None when it cannot be told.

    Reads ``MemAvailable`` from ``/proc/meminfo`` (Linux), else the physical
    memory size from :func:`os.sysconf`. One small read, at construction only.
    """
    try:
        with open("/proc/meminfo", "rb") as handle:
            for line in handle:
                if line.startswith(b"MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(os.sysconf("SC_PHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (AttributeError, OSError, ValueError):  # pragma: no cover - platform dependent
        return None


def _readable(n: int) -> str:
    for unit, size in (("TB", 1e12), ("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if n >= size:
            return f"{n / size:.3g} {unit}"
    return f"{n} B"


def require_capacity(
    owner: str, shape: tuple[int, ...], bytes_per_entry: int, *, bytes_per_row: int = 0
) -> None:
    """Raise :class:`CapacityError` if tables of ``shape`` cannot fit in available memory.

    ``bytes_per_entry`` adds up the item sizes of every array of that shape
    about to be allocated (16 for a float64 table with int64 visit counts);
    ``bytes_per_row`` adds what is allocated once per row (``shape[0]``), such
    as the 8-byte slot per state of a learner's row cache.

    Examples
    --------
    >>> require_capacity("QLearning", (10**12, 4), 16)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    tdkit.CapacityError: QLearning: a table of shape (1000000000000, 4) needs 64000000000000 ...
    """
    needed = math.prod(shape) * bytes_per_entry + (shape[0] * bytes_per_row if shape else 0)
    available = available_memory()
    if available is not None and needed > available:
        raise CapacityError(
            f"{owner}: a table of shape {shape} needs {needed} bytes ({_readable(needed)}) "
            f"but only {available} bytes ({_readable(available)}) of memory are available. "
            "Use fewer states (coarser bins, a smaller HashIndexEncoder capacity) or a machine "
            "with more memory."
        )


def initial_values(
    shape: tuple[int, ...], initial_value: InitialValue, rng: np.random.Generator, *, owner: str
) -> np.ndarray:
    """Build the starting array for ``initial_value``.

    Parameters
    ----------
    shape : tuple of int
        Shape of the table.
    initial_value : float or (float, float)
        A constant for every entry (an *optimistic* start when it exceeds the
        largest achievable return), or ``(low, high)`` for values drawn
        uniformly from ``[low, high)`` with ``rng`` (seeded, so reproducible).
    rng : numpy.random.Generator
        Used only for the random form.
    owner : str
        Name used in error messages.
    """
    require_capacity(owner, shape, 8)
    if isinstance(initial_value, numbers.Real) and not isinstance(initial_value, bool):
        value = float(initial_value)
        if not math.isfinite(value):
            raise InvalidParameterError(
                f"{owner}: initial_value must be finite; got {initial_value!r}."
            )
        return np.full(shape, value, dtype=np.float64)
    if (
        isinstance(initial_value, tuple)
        and len(initial_value) == 2
        and all(isinstance(x, numbers.Real) and math.isfinite(x) for x in initial_value)
        and initial_value[0] <= initial_value[1]
    ):
        low, high = (float(x) for x in initial_value)
        return rng.uniform(low, high, size=shape)
    raise InvalidParameterError(
        f"{owner}: initial_value must be a finite float or a (low, high) tuple with "
        f"low <= high; got {initial_value!r}."
    )


class ActionValueTable:
    """Action values ``values[s, a]`` and update counts ``visits[s, a]``.

    Parameters
    ----------
    n_states, n_actions : int
        Table shape.
    initial_value : float or (float, float)
        See :func:`initial_values`.
    rng : numpy.random.Generator
        Source for random initial values.
    owner : str
        Name used in error messages.
    bytes_per_row : int, default 0
        Memory the caller will allocate per state beside the table, counted
        in the capacity check (a learner's row cache: 8).

    Examples
    --------
    >>> import numpy as np
    >>> t = ActionValueTable(2, 3, initial_value=5.0, rng=np.random.default_rng(0))
    >>> t.values.shape, float(t.values[1, 2]), int(t.visits.sum())
    ((2, 3), 5.0, 0)
    """

    __slots__ = ("values", "visits")

    def __init__(
        self,
        n_states: int,
        n_actions: int,
        *,
        initial_value: InitialValue = 0.0,
        rng: np.random.Generator,
        owner: str = "ActionValueTable",
        bytes_per_row: int = 0,
    ) -> None:
        n_states = require_positive_int(owner, "n_states", n_states)
        n_actions = require_positive_int(owner, "n_actions", n_actions)
        # values and visits, and what the caller keeps per state
        require_capacity(owner, (n_states, n_actions), 16, bytes_per_row=bytes_per_row)
        self.values = initial_values((n_states, n_actions), initial_value, rng, owner=owner)
        self.visits = np.zeros((n_states, n_actions), dtype=np.int64)

    @property
    def shape(self) -> tuple[int, int]:
        return self.values.shape  # type: ignore[return-value]


def read_only(array: np.ndarray) -> np.ndarray:
    """A read-only view of ``array`` (no copy)."""
    view = array.view()
    view.flags.writeable = False
    return view

"""Per-episode training records with bounded memory.

:class:`History` keeps one row of aggregates per episode (return, length,
how it ended, TD-error statistics, wall-clock seconds) in typed numpy
columns, never per-step data. A row costs :data:`ROW_BYTES` (49) bytes; the
columns grow by doubling, so a run of ``E`` episodes holds at most
``2 * 49 * E`` bytes (about 98 bytes per episode) whatever the number of
steps. Reading a column returns a read-only view, not a copy, so a callback
that reads ``history.returns`` after every episode costs O(1) per call.
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np

from .._errors import InvalidParameterError

__all__ = ["COLUMNS", "EPISODE_ENDS", "ROW_BYTES", "History"]

#: How an episode ended: by a terminal state, by a time limit, or because the
#: step budget of ``train`` ran out in the middle of it.
EPISODE_ENDS = ("terminated", "truncated", "unfinished")

#: The columns of a History, in row order, with their numpy dtypes. The
#: attribute of each column is its name (``returns``, ``lengths``, ...).
COLUMNS: dict[str, np.dtype] = {
    "returns": np.dtype("<f8"),
    "lengths": np.dtype("<i8"),
    "ends": np.dtype("i1"),
    "td_counts": np.dtype("<i8"),
    "td_abs_mean": np.dtype("<f8"),
    "td_abs_max": np.dtype("<f8"),
    "seconds": np.dtype("<f8"),
}

#: Bytes of one episode's row (the sum of the column item sizes).
ROW_BYTES = sum(dtype.itemsize for dtype in COLUMNS.values())

_INITIAL_CAPACITY = 64


def _read_only(array: np.ndarray) -> np.ndarray:
    view = array.view()
    view.flags.writeable = False
    return view


class History:
    r"""Per-episode returns, lengths, TD-error statistics and wall-clock time of a run.

    Columns (read-only numpy views, one entry per episode, no copy):
    ``returns``, ``lengths``, ``ends`` (codes into :data:`EPISODE_ENDS`),
    ``td_counts`` (TD errors applied), ``td_abs_mean`` and ``td_abs_max``
    (of :math:`|\delta|` over the episode; NaN when no update happened) and
    ``seconds`` (wall-clock time of the episode). A view keeps showing the
    episodes that existed when it was taken.

    Memory: :data:`ROW_BYTES` (49) bytes per episode, at most twice that
    while the columns grow by doubling.

    Examples
    --------
    >>> h = History()
    >>> h.add_episode(ret=1.5, length=3, end="terminated", td_count=3, td_abs_sum=0.9,
    ...               td_abs_max=0.5, seconds=0.25)
    >>> len(h), float(h.returns[0]), h.to_records()[0]["end"], h.to_records()[0]["seconds"]
    (1, 1.5, 'terminated', 0.25)
    >>> h.returns.flags.writeable
    False
    """

    def __init__(self) -> None:
        self._n = 0
        self._columns = {
            name: np.empty(_INITIAL_CAPACITY, dtype=dtype) for name, dtype in COLUMNS.items()
        }
        self._last_time = time.perf_counter()

    # ------------------------------------------------------------- recording
    def add_episode(
        self,
        *,
        ret: float,
        length: int,
        end: str,
        td_count: int,
        td_abs_sum: float,
        td_abs_max: float,
        seconds: float | None = None,
    ) -> None:
        """Append one episode's aggregates.

        ``seconds`` is the episode's wall-clock duration; when omitted, the
        time since the previous episode was recorded (or since the History
        was created) is used.
        """
        now = time.perf_counter()
        if seconds is None:
            seconds = now - self._last_time
        self._last_time = now
        try:
            code = EPISODE_ENDS.index(end)
        except ValueError:
            raise InvalidParameterError(
                f"History.add_episode: end must be one of {EPISODE_ENDS}; got {end!r}."
            ) from None
        n = self._n
        cols = self._columns
        if n == cols["returns"].shape[0]:
            self._grow(2 * n)
            cols = self._columns
        cols["returns"][n] = ret
        cols["lengths"][n] = length
        cols["ends"][n] = code
        cols["td_counts"][n] = td_count
        cols["td_abs_mean"][n] = td_abs_sum / td_count if td_count else np.nan
        cols["td_abs_max"][n] = td_abs_max if td_count else np.nan
        cols["seconds"][n] = seconds
        self._n = n + 1

    def _grow(self, capacity: int) -> None:
        n = self._n
        for name, old in self._columns.items():
            new = np.empty(max(capacity, _INITIAL_CAPACITY), dtype=old.dtype)
            new[:n] = old[:n]
            self._columns[name] = new

    # ------------------------------------------------------------- reading
    def __len__(self) -> int:
        return self._n

    def __repr__(self) -> str:
        if not self._n:
            return "History(episodes=0)"
        r = self.returns
        return (
            f"History(episodes={len(self)}, steps={self.total_steps}, "
            f"mean_return={r.mean():.4g}, last_return={r[-1]:.4g})"
        )

    def _view(self, name: str) -> np.ndarray:
        return _read_only(self._columns[name][: self._n])

    @property
    def returns(self) -> np.ndarray:
        """Undiscounted return of each episode (read-only view)."""
        return self._view("returns")

    @property
    def lengths(self) -> np.ndarray:
        """Steps of each episode (read-only view)."""
        return self._view("lengths")

    @property
    def ends(self) -> np.ndarray:
        """How each episode ended, as codes into :data:`EPISODE_ENDS` (read-only view)."""
        return self._view("ends")

    @property
    def td_counts(self) -> np.ndarray:
        """TD errors applied in each episode (read-only view)."""
        return self._view("td_counts")

    @property
    def td_abs_mean(self) -> np.ndarray:
        """Mean :math:`|\\delta|` of each episode, NaN without updates (read-only view)."""
        return self._view("td_abs_mean")

    @property
    def td_abs_max(self) -> np.ndarray:
        """Largest :math:`|\\delta|` of each episode, NaN without updates (read-only view)."""
        return self._view("td_abs_max")

    @property
    def seconds(self) -> np.ndarray:
        """Wall-clock seconds of each episode (read-only view)."""
        return self._view("seconds")

    @property
    def total_steps(self) -> int:
        return int(self._columns["lengths"][: self._n].sum())

    def to_records(self) -> list[dict[str, Any]]:
        """One dict per episode, always with the same keys in the same order.

        Keys: ``episode, return, length, end, td_count, td_abs_mean, td_abs_max,
        seconds`` (``end`` as a word from :data:`EPISODE_ENDS`).
        """
        cols = {name: self._view(name).tolist() for name in COLUMNS}
        return [
            {
                "episode": i,
                "return": cols["returns"][i],
                "length": cols["lengths"][i],
                "end": EPISODE_ENDS[cols["ends"][i]],
                "td_count": cols["td_counts"][i],
                "td_abs_mean": cols["td_abs_mean"][i],
                "td_abs_max": cols["td_abs_max"][i],
                "seconds": cols["seconds"][i],
            }
            for i in range(self._n)
        ]

    def to_frame(self) -> Any:
        """The records as a pandas DataFrame indexed by episode (needs the ``frame`` extra).

        The columns are those of :meth:`to_records`, with or without episodes.
        """
        try:
            import pandas as pd
        except ImportError as exc:  # pragma: no cover - depends on the environment
            raise ImportError(
                "History.to_frame needs pandas: pip install 'tdkit[frame]'"
            ) from exc
        columns = ["episode", "return", "length", "end", "td_count", "td_abs_mean",
                   "td_abs_max", "seconds"]
        return pd.DataFrame.from_records(self.to_records(), columns=columns).set_index("episode")

    # -- persistence helpers (used by tdkit.store) --------------------------
    def to_arrays(self, start: int = 0, stop: int | None = None) -> dict[str, np.ndarray]:
        """The columns of episodes ``start:stop`` as read-only views (no copy)."""
        stop = self._n if stop is None else min(stop, self._n)
        return {name: _read_only(col[start:stop]) for name, col in self._columns.items()}

    @classmethod
    def from_arrays(cls, arrays: dict[str, np.ndarray]) -> History:
        """Inverse of :meth:`to_arrays` (a missing ``seconds`` column becomes NaN)."""
        n = len(arrays["returns"])
        h = cls()
        h._grow(n)
        for name, dtype in COLUMNS.items():
            column = arrays.get(name)
            h._columns[name][:n] = np.nan if column is None else np.asarray(column, dtype=dtype)
        h._n = n
        return h

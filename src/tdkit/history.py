"""Per-episode training records with bounded memory.

:class:`History` keeps one row of aggregates per episode (return, length,
how it ended, TD-error statistics) in compact typed arrays, never per-step
data, so a run of millions of steps costs a few bytes per *episode*.
"""

from __future__ import annotations

from array import array
from typing import Any

import numpy as np

__all__ = ["EPISODE_ENDS", "History"]

#: How an episode ended: by a terminal state, by a time limit, or because the
#: step budget of ``train`` ran out in the middle of it.
EPISODE_ENDS = ("terminated", "truncated", "unfinished")

_FIELDS = ("return", "length", "end", "td_count", "td_abs_mean", "td_abs_max")


class History:
    """Per-episode returns, lengths and TD-error statistics of a run.

    Attributes are numpy arrays (copies) with one entry per episode:
    ``returns``, ``lengths``, ``ends`` (codes into :data:`EPISODE_ENDS`),
    ``td_counts`` (TD errors applied), ``td_abs_mean`` and ``td_abs_max``
    (of :math:`|\\delta|` over the episode; NaN when no update happened).

    Examples
    --------
    >>> h = History()
    >>> h.add_episode(ret=1.5, length=3, end="terminated", td_count=3, td_abs_sum=0.9,
    ...               td_abs_max=0.5)
    >>> len(h), float(h.returns[0]), h.to_records()[0]["end"]
    (1, 1.5, 'terminated')
    """

    def __init__(self) -> None:
        self._returns = array("d")
        self._lengths = array("q")
        self._ends = array("b")
        self._td_counts = array("q")
        self._td_abs_mean = array("d")
        self._td_abs_max = array("d")

    def add_episode(
        self,
        *,
        ret: float,
        length: int,
        end: str,
        td_count: int,
        td_abs_sum: float,
        td_abs_max: float,
    ) -> None:
        """Append one episode's aggregates."""
        self._returns.append(ret)
        self._lengths.append(length)
        self._ends.append(EPISODE_ENDS.index(end))
        self._td_counts.append(td_count)
        self._td_abs_mean.append(td_abs_sum / td_count if td_count else float("nan"))
        self._td_abs_max.append(td_abs_max if td_count else float("nan"))

    def __len__(self) -> int:
        return len(self._returns)

    def __repr__(self) -> str:
        if not len(self):
            return "History(episodes=0)"
        r = self.returns
        return (
            f"History(episodes={len(self)}, steps={self.total_steps}, "
            f"mean_return={r.mean():.4g}, last_return={r[-1]:.4g})"
        )

    @property
    def returns(self) -> np.ndarray:
        return np.array(self._returns, dtype=np.float64)

    @property
    def lengths(self) -> np.ndarray:
        return np.array(self._lengths, dtype=np.int64)

    @property
    def ends(self) -> np.ndarray:
        return np.array(self._ends, dtype=np.int8)

    @property
    def td_counts(self) -> np.ndarray:
        return np.array(self._td_counts, dtype=np.int64)

    @property
    def td_abs_mean(self) -> np.ndarray:
        return np.array(self._td_abs_mean, dtype=np.float64)

    @property
    def td_abs_max(self) -> np.ndarray:
        return np.array(self._td_abs_max, dtype=np.float64)

    @property
    def total_steps(self) -> int:
        return int(sum(self._lengths))

    def to_records(self) -> list[dict[str, Any]]:
        """One dict per episode: episode, return, length, end, td_count, td_abs_mean, td_abs_max."""
        return [
            {
                "episode": i,
                "return": self._returns[i],
                "length": self._lengths[i],
                "end": EPISODE_ENDS[self._ends[i]],
                "td_count": self._td_counts[i],
                "td_abs_mean": self._td_abs_mean[i],
                "td_abs_max": self._td_abs_max[i],
            }
            for i in range(len(self))
        ]

    def to_frame(self) -> Any:
        """The records as a pandas DataFrame (needs the ``frame`` extra)."""
        try:
            import pandas as pd
        except ImportError as exc:  # pragma: no cover - depends on the environment
            raise ImportError(
                "History.to_frame needs pandas: pip install 'tdkit[frame]'"
            ) from exc
        return pd.DataFrame.from_records(self.to_records()).set_index("episode")

    # -- persistence helpers (used by tdkit.store) --------------------------
    def to_arrays(self) -> dict[str, np.ndarray]:
        """The per-episode columns as numpy arrays."""
        return {
            "returns": self.returns,
            "lengths": self.lengths,
            "ends": self.ends,
            "td_counts": self.td_counts,
            "td_abs_mean": self.td_abs_mean,
            "td_abs_max": self.td_abs_max,
        }

    @classmethod
    def from_arrays(cls, arrays: dict[str, np.ndarray]) -> History:
        """Inverse of :meth:`to_arrays`."""
        h = cls()
        h._returns.extend(np.asarray(arrays["returns"], dtype=np.float64).tolist())
        h._lengths.extend(np.asarray(arrays["lengths"], dtype=np.int64).tolist())
        h._ends.extend(np.asarray(arrays["ends"], dtype=np.int8).tolist())
        h._td_counts.extend(np.asarray(arrays["td_counts"], dtype=np.int64).tolist())
        h._td_abs_mean.extend(np.asarray(arrays["td_abs_mean"], dtype=np.float64).tolist())
        h._td_abs_max.extend(np.asarray(arrays["td_abs_max"], dtype=np.float64).tolist())
        return h

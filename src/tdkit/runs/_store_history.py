"""The History of a checkpoint: an append-only sidecar file with a chained digest.

``<checkpoint>.history`` holds a magic line and then one fixed-size row per
episode (the columns of :data:`tdkit.history.COLUMNS`, 49 bytes). Each
checkpoint of a run appends only the rows recorded since the previous one,
so the bytes written per checkpoint do not grow with the number of
episodes; the checkpoint's own file records how many rows belong to it and
the SHA-256 chained over them row by row (so the digest does not depend on
how the rows were split between checkpoints).
"""

from __future__ import annotations

import hashlib
import os
import weakref
from pathlib import Path
from typing import Any

import numpy as np

from .._errors import StoreError
from ._store_files import atomic_write, is_int, require
from .history import COLUMNS, ROW_BYTES, History

__all__ = ["append_history", "read_history"]

_HISTORY_MAGIC = b"tdkit-history 1\n"

_ROW = np.dtype([(name, dtype) for name, dtype in COLUMNS.items()])

_CHAIN_START = hashlib.sha256(b"tdkit-history").digest()

_persisted: weakref.WeakKeyDictionary[History, tuple[Path, int, bytes]] = (
    weakref.WeakKeyDictionary()
)


def _history_path(path: Path) -> Path:
    return path.with_name(path.name + ".history")


def _chain(digest: bytes, rows: bytes) -> bytes:
    """Extend the chained digest by each row of ``rows`` (independent of chunking)."""
    sha = hashlib.sha256
    for i in range(0, len(rows), ROW_BYTES):
        digest = sha(digest + rows[i:i + ROW_BYTES]).digest()
    return digest


def _rows_bytes(history: History, start: int) -> bytes:
    columns = history.to_arrays(start)
    rows = np.empty(len(columns["returns"]), dtype=_ROW)
    for name in COLUMNS:
        rows[name] = columns[name]
    return rows.tobytes()


def append_history(path: Path, history: History) -> tuple[int, bytes]:
    """Bring the sidecar file of ``path`` up to ``history``: append only the new rows."""
    sidecar = _history_path(path)
    known = _persisted.get(history)
    n = len(history)
    if (known is not None and known[0] == sidecar and known[1] <= n and sidecar.exists()
            and sidecar.stat().st_size >= len(_HISTORY_MAGIC) + known[1] * ROW_BYTES):
        _, done, digest = known
        new = _rows_bytes(history, done)
        with open(sidecar, "r+b") as handle:
            handle.truncate(len(_HISTORY_MAGIC) + done * ROW_BYTES)  # drop a torn append
            handle.seek(0, os.SEEK_END)
            handle.write(new)
            handle.flush()
            os.fsync(handle.fileno())
        digest = _chain(digest, new)
    else:  # first checkpoint of this History at this path: write it whole, atomically
        rows = _rows_bytes(history, 0)
        atomic_write(sidecar, _HISTORY_MAGIC + rows)
        digest = _chain(_CHAIN_START, rows)
    _persisted[history] = (sidecar, n, digest)
    return n, digest


def read_history(path: Path, rows: Any, digest: Any, max_bytes: int) -> History:
    sidecar = _history_path(path)
    require(is_int(rows) and rows >= 0, "history.rows", f"{rows!r:.80} is not an integer >= 0.")
    require(isinstance(digest, str) and len(digest) == 64, "history.digest",
             f"{digest!r:.80} is not a SHA-256 digest.")
    need = len(_HISTORY_MAGIC) + rows * ROW_BYTES
    require(rows * ROW_BYTES <= max_bytes, "history.rows",
             f"{rows} episodes need {rows * ROW_BYTES} bytes, above max_bytes={max_bytes}.")
    try:
        with open(sidecar, "rb") as handle:
            data = handle.read(need)
    except OSError as exc:
        raise StoreError(f"{str(sidecar)!r}: the checkpoint's History cannot be read ({exc}).") \
            from None
    require(data[:len(_HISTORY_MAGIC)] == _HISTORY_MAGIC and len(data) == need, str(sidecar),
             f"is not a tdkit History of {rows} episodes (truncated or of another kind).")
    body = data[len(_HISTORY_MAGIC):]
    chained = _chain(_CHAIN_START, body)
    require(chained.hex() == digest, str(sidecar), "was altered: it fails its SHA-256 check.")
    table = np.frombuffer(body, dtype=_ROW)
    columns = {name: table[name] for name in COLUMNS}
    for name in ("lengths", "td_counts"):
        require(bool((columns[name] >= 0).all()), f"history.{name}", "has negative entries.")
    require(bool(np.isin(columns["ends"], (0, 1, 2)).all()), "history.ends",
             "has codes outside 0, 1, 2.")
    require(not bool(np.isnan(columns["returns"]).any()), "history.returns", "has NaN.")
    history = History.from_arrays(columns)
    _persisted[history] = (sidecar, rows, chained)
    return history

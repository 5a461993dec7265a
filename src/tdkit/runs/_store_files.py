"""The file container of :mod:`tdkit.store`: atomic writes, digests, header-first reads.

A tdkit file is a numpy ``.npz`` archive of arrays plus one ``meta`` entry
of UTF-8 JSON. Writing goes through a temporary file named
``.<file>.<pid>.<random>.tmp`` in the same folder and :func:`os.replace`;
the next write to a path removes the temporaries of processes that are gone.
Reading checks every array header (dtype, shape, the bytes stored) against
``max_bytes`` before it reads the data, never unpickles, bounds the JSON
nesting and checks the SHA-256 digest of every array. The digests detect
corruption, not a deliberate edit: the content is checked by
:mod:`tdkit.runs._store_state`.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import os
import tempfile
import zipfile
from pathlib import Path
from typing import Any

import numpy as np

from .._errors import InvalidParameterError, StoreError

__all__ = [
    "DEFAULT_MAX_BYTES",
    "FORMAT_AGENT",
    "FORMAT_CHECKPOINT",
    "FORMAT_VERSION",
    "atomic_write",
    "digest",
    "is_int",
    "read",
    "require",
    "write",
]

FORMAT_AGENT = "tdkit-agent"

FORMAT_CHECKPOINT = "tdkit-checkpoint"

FORMAT_VERSION = 2  # 2: only declared state; History in an append-only sidecar

#: Largest number of bytes a load may read or allocate unless ``max_bytes`` is given.
DEFAULT_MAX_BYTES = 2**31

_MAX_JSON_DEPTH = 32

_MAX_ENTRIES = 4096

_ARRAY_DTYPES = {np.dtype(t) for t in ("<f8", "<i8", "|b1", "|u1", "|i1")}


def require(condition: bool, field: str, problem: str) -> None:
    if not condition:
        raise StoreError(f"{field}: {problem}")


def is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _require_json(value: Any, where: str) -> None:
    """Refuse JSON nested deeper than the format ever writes (iteratively: no recursion)."""
    stack = [(value, 1)]
    while stack:
        item, depth = stack.pop()
        if depth > _MAX_JSON_DEPTH:
            raise StoreError(
                f"{where}: JSON nested deeper than {_MAX_JSON_DEPTH} levels; tdkit never writes "
                "that, so the file was made or edited by something else."
            )
        if isinstance(item, dict):
            stack.extend((v, depth + 1) for v in item.values())
        elif isinstance(item, list):
            stack.extend((v, depth + 1) for v in item)


def _require_meta(meta: dict[str, Any], fmt: str) -> None:
    for key, types in (("class", str), ("params", dict), ("scalars", dict), ("rng", dict),
                       ("extra", (dict, type(None)))):
        require(key in meta, f"meta.{key}", "missing; the file is incomplete.")
        require(isinstance(meta[key], types), f"meta.{key}",
                 f"has type {type(meta[key]).__name__}, not {getattr(types, '__name__', types)}.")
    if fmt == FORMAT_CHECKPOINT:
        require(isinstance(meta.get("loop"), dict), "meta.loop", "missing or not an object.")
        require(isinstance(meta.get("history"), dict), "meta.history",
                 "missing or not an object.")


def digest(array: np.ndarray) -> str:
    arr = np.ascontiguousarray(array)
    h = hashlib.sha256()
    h.update(str(arr.dtype).encode())
    h.update(str(arr.shape).encode())
    h.update(arr.tobytes())
    return h.hexdigest()


def _remove_stale_temporaries(path: Path) -> None:
    """Delete ``.<name>.<pid>.*.tmp`` files of ``path`` whose writing process is gone."""
    directory = path.parent
    prefix = f".{path.name}."
    try:
        names = os.listdir(directory)
    except OSError:
        return
    for name in names:
        if not (name.startswith(prefix) and name.endswith(".tmp")):
            continue
        pid_text = name[len(prefix):].split(".", 1)[0]
        if not pid_text.isdigit() or int(pid_text) == os.getpid():
            continue
        try:
            os.kill(int(pid_text), 0)
        except ProcessLookupError:
            try:
                os.unlink(directory / name)
            except OSError:
                pass
        except (PermissionError, OverflowError, OSError):
            continue  # alive (someone else's) or not a pid: leave it


def atomic_write(path: Path, data: bytes) -> None:
    directory = path.parent if str(path.parent) else Path(".")
    _remove_stale_temporaries(directory / path.name)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.{os.getpid()}.", suffix=".tmp",
                               dir=directory)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def write(path: str | os.PathLike[str], fmt: str, meta: dict[str, Any],
           arrays: dict[str, np.ndarray]) -> Path:
    path = Path(path)
    meta = {
        "format": fmt,
        "format_version": FORMAT_VERSION,
        **meta,
        "digests": {k: digest(v) for k, v in arrays.items()},
    }
    payload = {k: np.ascontiguousarray(v) for k, v in arrays.items()}
    payload["meta"] = np.frombuffer(json.dumps(meta).encode("utf-8"), dtype=np.uint8)
    buffer = io.BytesIO()
    np.savez(buffer, **payload)
    atomic_write(path, buffer.getvalue())
    return path


def _read_archive(path: Path, max_bytes: int) -> dict[str, np.ndarray]:
    """Read every array of an ``.npz``, checking each header before reading its data."""
    total = 0
    contents: dict[str, np.ndarray] = {}
    with zipfile.ZipFile(path) as archive:
        members = archive.infolist()
        require(len(members) <= _MAX_ENTRIES, str(path), f"{len(members)} entries is too many.")
        for info in members:
            key = info.filename[:-4] if info.filename.endswith(".npy") else info.filename
            require(info.filename.endswith(".npy"), key, "is not a numpy array entry.")
            with archive.open(info) as member:
                version = np.lib.format.read_magic(member)
                if version == (1, 0):
                    shape, fortran, dtype = np.lib.format.read_array_header_1_0(member)
                elif version == (2, 0):
                    shape, fortran, dtype = np.lib.format.read_array_header_2_0(member)
                else:
                    raise StoreError(f"{key}: numpy format version {version} is not supported.")
                require(dtype in _ARRAY_DTYPES, key,
                         f"dtype {dtype} is not one tdkit writes (no objects are ever read).")
                count = math.prod(shape)
                nbytes = count * dtype.itemsize
                total += nbytes
                require(total <= max_bytes, key,
                         f"shape {shape} ({nbytes} bytes) takes the file past max_bytes="
                         f"{max_bytes}; refused before allocating. Pass a larger max_bytes if "
                         "you trust the file.")
                require(member.tell() + nbytes == info.file_size, key,
                         f"header says shape {shape} of {dtype}, which does not match the "
                         f"{info.file_size} bytes stored.")
                data = member.read(nbytes)
                array = np.frombuffer(data, dtype=dtype, count=count)
                contents[key] = array.reshape(shape, order="F" if fortran else "C")
    return contents


def read(path: str | os.PathLike[str], fmt: str,
          max_bytes: int) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    if not is_int(max_bytes) or max_bytes < 1:
        raise InvalidParameterError(
            f"max_bytes must be a positive integer (bytes); got {max_bytes!r}."
        )
    path = Path(path)
    if not path.exists():
        raise StoreError(f"no such file: {str(path)!r}.")
    try:
        contents = _read_archive(path, max_bytes)
    except StoreError as exc:
        raise StoreError(f"{str(path)!r}: {exc}") from None
    except Exception as exc:  # zip and npy header refusals all land here
        raise StoreError(
            f"{str(path)!r} is not a readable tdkit file (truncated, corrupted or of another "
            f"kind): {type(exc).__name__}: {exc}"
        ) from None
    if "meta" not in contents:
        raise StoreError(f"{str(path)!r} is not a tdkit file: it has no 'meta' entry.")
    try:
        meta = json.loads(contents.pop("meta").tobytes().decode("utf-8"))
    except (UnicodeDecodeError, ValueError, RecursionError) as exc:
        raise StoreError(
            f"{str(path)!r}: its metadata is not valid JSON ({type(exc).__name__}: "
            f"{str(exc)[:200]})."
        ) from None
    _require_json(meta, f"{str(path)!r}: meta")
    if not isinstance(meta, dict) or meta.get("format") != fmt:
        found = meta.get("format") if isinstance(meta, dict) else None
        raise StoreError(
            f"{str(path)!r} holds format {found!r:.80}, expected {fmt!r}."
            + (" Use tdkit.store.load_checkpoint for checkpoints." if found == FORMAT_CHECKPOINT
               else "")
        )
    if meta.get("format_version") != FORMAT_VERSION:
        raise StoreError(
            f"{str(path)!r} has format version {meta.get('format_version')!r:.40}; this tdkit "
            f"reads version {FORMAT_VERSION}."
        )
    digests = meta.get("digests")
    if not isinstance(digests, dict) or set(digests) != set(contents):
        raise StoreError(
            f"{str(path)!r} was altered: its arrays {sorted(contents)} do not match the recorded "
            f"list in meta.digests."
        )
    for key, array in contents.items():
        if digest(array) != digests[key]:
            raise StoreError(f"{str(path)!r} was altered: array {key!r} fails its SHA-256 check.")
    try:
        _require_meta(meta, fmt)
    except StoreError as exc:
        raise StoreError(f"{str(path)!r}: {exc}") from None
    return meta, contents

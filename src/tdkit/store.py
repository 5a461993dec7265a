"""Saving and loading learners and training checkpoints without pickle.

A file is a numpy ``.npz`` archive holding the learner's arrays and one entry
``meta``: UTF-8 JSON with the format name and version, the learner's class and
constructor arguments, its declared counters and random-generator state, and
a SHA-256 digest of every array. Files are written atomically (a temporary
file in the same folder, then :func:`os.replace`); temporaries left behind by
a killed process are removed by the next write to the same path. Files are
read with ``allow_pickle=False``, so a file cannot run code.

What is saved
-------------
Only what the learner's class *declares* as its saved state: each class
lists its own fields in ``_saved_state``, a tuple of ``(attribute, kind)``
pairs, and the store collects them along the class hierarchy (a subclass may
redeclare a field of its base). Everything else is rebuilt by the
constructor from the saved constructor arguments (schedules, exploration
rules and encoders through their ``describe()``). The kinds are:

========================  ==============================================================
kind                      content and check on loading
========================  ==============================================================
``values``                float64 array ``(n_states, n_actions)``, every entry finite
``state_values``          float64 array ``(n_states, 1)``, every entry finite
``counts``                int64 array ``(n_states, n_actions)``, every entry >= 0
``state_counts``          int64 array ``(n_states, 1)``, every entry >= 0
``counts<=FIELD``         as ``counts``, and no entry above the counter ``FIELD``
``counter``               an integer >= 0
``real``                  a finite float
``commitment``            None or ``(state, action, bool)`` with both indices in range
``held_transition``       None or ``(state, action, reward)``: indices in range, finite reward
``state_or_minus_one``    a state index, or -1 for none
``mask``                  a boolean array over actions allowing at least one
``mask_map``              ``{state: boolean mask over actions}``, each allowing an action
``per_episode``           not saved: must be empty (or None, or 0) when saving
``hooks``                 JSON from ``_get_extra_state()``, given back to
                          ``_set_extra_state()``; its errors become StoreError
========================  ==============================================================

Saving in the middle of an episode (a ``per_episode`` field not empty, such
as transitions observed but not yet applied, a multi-step buffer or
eligibility traces) raises :class:`tdkit.StoreError`.

What loading guarantees
-----------------------
The digests detect *corruption* (a truncated copy, a flipped bit); they do
not detect a deliberate edit, since anyone can recompute them. Loading
therefore does not trust the content either: before anything is allocated,
every array's dtype and shape (from its header) and the table size implied
by ``n_states`` and ``n_actions`` are checked against the declared kinds and
against ``max_bytes``; JSON nesting is bounded; then every value is checked
against its kind, the generator state against the generator's own format,
and only declared fields are applied. Any failure is a
:class:`tdkit.StoreError` naming the field, raised before the learner (or
the agent passed to :func:`load_state_into` / :func:`load_checkpoint`) is
changed. A file that loads gives a learner whose state is exactly what the
file declares, and whose behaviour follows from that state and the
constructor arguments alone.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import os
import tempfile
import weakref
import zipfile
from pathlib import Path
from typing import Any

import numpy as np

from ._errors import CapacityError, InvalidParameterError, StoreError
from .history import COLUMNS, ROW_BYTES, History

__all__ = [
    "DEFAULT_MAX_BYTES",
    "load",
    "load_checkpoint",
    "load_state_into",
    "save",
    "save_checkpoint",
    "saved_fields",
]

FORMAT_AGENT = "tdkit-agent"
FORMAT_CHECKPOINT = "tdkit-checkpoint"
FORMAT_VERSION = 2  # 2: only declared state; History in an append-only sidecar

#: Largest number of bytes a load may read or allocate unless ``max_bytes`` is given.
DEFAULT_MAX_BYTES = 2**31

_MAX_JSON_DEPTH = 32
_MAX_ENTRIES = 4096
_ARRAY_DTYPES = {np.dtype(t) for t in ("<f8", "<i8", "|b1", "|u1", "|i1")}
_ARRAY_KINDS = {
    "values": ("<f8", 0),
    "state_values": ("<f8", 1),
    "counts": ("<i8", 0),
    "state_counts": ("<i8", 1),
}
_SCALAR_KINDS = ("counter", "real", "commitment", "mask_map", "mask", "state_or_minus_one",
                 "held_transition")
_KINDS = (*_ARRAY_KINDS, *_SCALAR_KINDS, "per_episode", "hooks")
_ENCODERS = ("state_encoder", "action_encoder")


# ----------------------------------------------------------------- declarations
def saved_fields(cls: type) -> dict[str, str]:
    """``{attribute: kind}`` declared by ``cls`` and its bases in ``_saved_state``.

    A subclass's declaration of a field replaces its base's.

    Examples
    --------
    >>> import tdkit
    >>> saved_fields(tdkit.QLearning)["_q"], saved_fields(tdkit.TD0)["_q"]
    ('values', 'state_values')
    """
    fields: dict[str, str] = {}
    for klass in reversed(cls.__mro__):
        for name, kind in klass.__dict__.get("_saved_state", ()):
            if _base_kind(kind) not in _KINDS:
                raise TypeError(  # a programming error in the learner class, not bad input
                    f"{klass.__name__}._saved_state declares {name!r} with unknown kind "
                    f"{kind!r}; use one of {_KINDS}."
                )
            fields[name] = kind
    return fields


def _base_kind(kind: str) -> str:
    return kind.partition("<=")[0]


# ----------------------------------------------------------------- encoding
def _encode_param(name: str, value: Any, arrays: dict[str, np.ndarray]) -> Any:
    from .exploration import Exploration
    from .schedules import Schedule

    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating):
        return float(value)
    if isinstance(value, tuple) and all(isinstance(v, (int, float)) for v in value):
        return {"__tuple__": list(value)}
    if isinstance(value, Schedule):
        return {"__schedule__": value.describe()}
    if isinstance(value, Exploration):
        return {"__exploration__": value.describe()}
    if isinstance(value, np.ndarray):
        key = f"param/{name}"
        arrays[key] = value
        return {"__array__": key}
    if isinstance(value, np.random.Generator):
        return None  # the generator's state is saved separately
    if hasattr(value, "describe") and hasattr(value, "encode"):
        return {"__encoder__": value.describe()}
    raise StoreError(
        f"cannot save parameter {name}={value!r} of type {type(value).__name__}: only numbers, "
        "strings, tuples of numbers, arrays, schedules, exploration rules and tdkit encoders "
        "can be stored. Use one of those (e.g. a probability table instead of a callable)."
    )


def _encoder_shape(encoded: Any) -> Any:
    """An encoder's description without the states a growing index has collected."""
    if not isinstance(encoded, dict) or not isinstance(encoded.get("__encoder__"), dict):
        return encoded
    return {k: v for k, v in encoded["__encoder__"].items() if k != "states"}


def _decode_param(name: str, value: Any, arrays: dict[str, np.ndarray]) -> Any:
    from .encoders import from_description
    from .exploration import exploration_from_description
    from .schedules import schedule_from_description

    if name in _ENCODERS and value is not None and not (
        isinstance(value, dict) and set(value) == {"__encoder__"}
    ):
        raise StoreError(f"params.{name}: {value!r:.80} is neither null nor a saved encoder.")
    if not isinstance(value, dict):
        if isinstance(value, list):
            raise StoreError(f"params.{name}: a list {value!r:.80} is not a stored parameter.")
        return value
    if len(value) != 1:
        raise StoreError(f"params.{name}: unknown parameter encoding {value!r:.80}.")
    (tag, inner), = value.items()
    try:
        if tag == "__tuple__" and isinstance(inner, list) and all(
            isinstance(v, (int, float)) and not isinstance(v, bool) for v in inner
        ):
            return tuple(inner)
        if tag == "__schedule__" and isinstance(inner, dict):
            return schedule_from_description(inner)
        if tag == "__exploration__" and isinstance(inner, dict):
            return exploration_from_description(inner)
        if tag == "__encoder__" and isinstance(inner, dict):
            return from_description(inner)
        if tag == "__array__" and inner == f"param/{name}" and inner in arrays:
            return np.array(arrays[inner])
    except (InvalidParameterError, CapacityError, TypeError, ValueError, KeyError,
            IndexError, AttributeError) as exc:
        raise StoreError(
            f"params.{name}: {value!r:.80} does not describe a valid object "
            f"({type(exc).__name__}: {exc})."
        ) from None
    raise StoreError(f"params.{name}: unknown parameter encoding {value!r:.80}.")


def _is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _per_episode_size(value: Any) -> int:
    if value is None:
        return 0
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return 0 if value == 0 else 1
    try:
        return len(value)
    except TypeError:
        return 1


def _encode_scalar(kind: str, value: Any) -> Any:
    if kind == "counter":
        return int(value)
    if kind == "real":
        return float(value)
    if kind == "commitment":
        return None if value is None else [int(value[0]), int(value[1]), bool(value[2])]
    if kind == "held_transition":
        return None if value is None else [int(value[0]), int(value[1]), float(value[2])]
    if kind == "state_or_minus_one":
        return int(value)
    if kind == "mask":
        return [bool(x) for x in value]
    # mask_map
    return [[int(s), [bool(x) for x in mask]] for s, mask in value.items()]


def _agent_state(agent: Any) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """(meta, arrays) holding ``agent``'s declared state."""
    cls = type(agent)
    if not hasattr(agent, "get_params") or not hasattr(cls, "_saved_state"):
        raise StoreError(
            f"cannot save {cls.__name__}: tdkit.save stores tdkit learners (classes that "
            "declare _saved_state and have get_params()); save your own agent's state yourself."
        )
    fields = saved_fields(cls)
    for name, kind in fields.items():
        if kind == "per_episode":
            size = _per_episode_size(getattr(agent, name, None))
            if size:
                raise StoreError(
                    f"cannot save {cls.__name__} in the middle of an episode: {name!r} holds "
                    f"{size} item(s) of per-episode state (observed transitions not applied "
                    "yet, a multi-step buffer or eligibility traces). Call update() and save "
                    "after an episode has ended."
                )
    arrays: dict[str, np.ndarray] = {}
    params = {k: _encode_param(k, v, arrays) for k, v in agent.get_params().items()}
    scalars: dict[str, Any] = {}
    hooks = False
    for name, kind in fields.items():
        base = _base_kind(kind)
        if base in _ARRAY_KINDS:
            arrays[f"state/{name}"] = getattr(agent, name)
        elif base in _SCALAR_KINDS:
            scalars[name] = _encode_scalar(base, getattr(agent, name))
        elif base == "hooks":
            hooks = True
    meta = {
        "class": cls.__name__,
        "params": params,
        "scalars": scalars,
        "rng": agent.rng.bit_generator.state,
        "extra": agent._get_extra_state() if hooks else None,
    }
    return meta, arrays


# ----------------------------------------------------------------- validation
def _require(condition: bool, field: str, problem: str) -> None:
    if not condition:
        raise StoreError(f"{field}: {problem}")


def _check_json(value: Any, where: str) -> None:
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


def _check_meta(meta: dict[str, Any], fmt: str) -> None:
    for key, types in (("class", str), ("params", dict), ("scalars", dict), ("rng", dict),
                       ("extra", (dict, type(None)))):
        _require(key in meta, f"meta.{key}", "missing; the file is incomplete.")
        _require(isinstance(meta[key], types), f"meta.{key}",
                 f"has type {type(meta[key]).__name__}, not {getattr(types, '__name__', types)}.")
    if fmt == FORMAT_CHECKPOINT:
        _require(isinstance(meta.get("loop"), dict), "meta.loop", "missing or not an object.")
        _require(isinstance(meta.get("history"), dict), "meta.history",
                 "missing or not an object.")


def _check_array_values(name: str, kind: str, array: np.ndarray, bound: int | None) -> None:
    base = _base_kind(kind)
    field = f"state/{name}"
    if base in ("values", "state_values"):
        bad = ~np.isfinite(array)
        if bad.any():
            where = tuple(int(i) for i in np.argwhere(bad)[0])
            raise StoreError(f"{field}: entry {where} is {array[where]!r}; values must be finite.")
    else:
        if array.size and array.min() < 0:
            where = tuple(int(i) for i in np.argwhere(array < 0)[0])
            raise StoreError(f"{field}: entry {where} is {array[where]!r}; counts must be >= 0.")
        if bound is not None and array.size and array.max() > bound:
            where = tuple(int(i) for i in np.argwhere(array > bound)[0])
            raise StoreError(
                f"{field}: entry {where} is {array[where]!r}, above {kind.partition('<=')[2]}"
                f" = {bound}."
            )


def _check_scalar(name: str, kind: str, value: Any, n_states: int, n_actions: int) -> Any:
    """Return the attribute value for a declared scalar, or raise StoreError."""
    field = f"scalars.{name}"
    if kind == "counter":
        _require(_is_int(value) and value >= 0, field, f"{value!r:.80} is not an integer >= 0.")
        return value
    if kind == "real":
        _require(isinstance(value, (int, float)) and not isinstance(value, bool)
                 and math.isfinite(value), field, f"{value!r:.80} is not a finite number.")
        return float(value)
    if kind == "commitment":
        if value is None:
            return None
        _require(
            isinstance(value, list) and len(value) == 3 and _is_int(value[0])
            and _is_int(value[1]) and isinstance(value[2], bool)
            and 0 <= value[0] < n_states and 0 <= value[1] < n_actions,
            field, f"{value!r:.80} is not null or [state, action, true/false] in range.",
        )
        return (value[0], value[1], value[2])
    if kind == "held_transition":
        if value is None:
            return None
        _require(
            isinstance(value, list) and len(value) == 3 and _is_int(value[0])
            and _is_int(value[1]) and 0 <= value[0] < n_states and 0 <= value[1] < n_actions
            and isinstance(value[2], (int, float)) and not isinstance(value[2], bool)
            and math.isfinite(value[2]),
            field, f"{value!r:.80} is not null or [state, action, finite reward] in range.",
        )
        return (value[0], value[1], float(value[2]))
    if kind == "state_or_minus_one":
        _require(_is_int(value) and -1 <= value < n_states, field,
                 f"{value!r:.80} is not -1 or a state in [0, {n_states}).")
        return value
    if kind == "mask":
        _require(isinstance(value, list) and len(value) == n_actions
                 and all(isinstance(x, bool) for x in value) and any(value), field,
                 f"{value!r:.80} is not a list of {n_actions} booleans allowing an action.")
        return np.array(value, dtype=bool)
    # mask_map
    _require(isinstance(value, list) and len(value) <= n_states, field,
             f"{value!r:.80} is not a list of [state, mask] pairs.")
    masks: dict[int, np.ndarray] = {}
    for item in value:
        ok = (isinstance(item, list) and len(item) == 2 and _is_int(item[0])
              and 0 <= item[0] < n_states and isinstance(item[1], list)
              and len(item[1]) == n_actions and all(isinstance(x, bool) for x in item[1])
              and any(item[1]))
        _require(ok, field, f"entry {item!r:.80} is not [state, mask over actions allowing one].")
        masks[item[0]] = np.array(item[1], dtype=bool)
    return masks


def _check_rng(agent: Any, saved: Any) -> dict[str, Any]:
    """Validate a generator state against the structure of ``agent``'s own generator."""
    current = agent.rng.bit_generator.state

    def same_shape(a: Any, b: Any, where: str) -> None:
        if isinstance(a, dict):
            _require(isinstance(b, dict) and set(a) == set(b), where,
                     f"has keys {sorted(b) if isinstance(b, dict) else b!r:.80}, expected "
                     f"{sorted(a)}.")
            for key in a:
                same_shape(a[key], b[key], f"{where}.{key}")
        elif isinstance(a, str):
            _require(b == a, where, f"is {b!r:.80}, expected {a!r}.")
        else:
            _require(_is_int(b) and 0 <= b < 2**128, where,
                     f"is {b!r:.80}, expected an integer in [0, 2**128).")

    same_shape(current, saved, "rng")
    return saved


def _set_rng(agent: Any, state: dict[str, Any]) -> None:
    generator = agent.rng.bit_generator
    try:
        generator.state = state
    except (TypeError, ValueError, KeyError, OverflowError) as exc:
        raise StoreError(f"rng: not a valid generator state ({exc}).") from None
    if generator.state != state:
        raise StoreError("rng: the generator does not accept this state as given.")


# ----------------------------------------------------------------- files
def _digest(array: np.ndarray) -> str:
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


def _atomic_write(path: Path, data: bytes) -> None:
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


def _write(path: str | os.PathLike[str], fmt: str, meta: dict[str, Any],
           arrays: dict[str, np.ndarray]) -> Path:
    path = Path(path)
    meta = {
        "format": fmt,
        "format_version": FORMAT_VERSION,
        **meta,
        "digests": {k: _digest(v) for k, v in arrays.items()},
    }
    payload = {k: np.ascontiguousarray(v) for k, v in arrays.items()}
    payload["meta"] = np.frombuffer(json.dumps(meta).encode("utf-8"), dtype=np.uint8)
    buffer = io.BytesIO()
    np.savez(buffer, **payload)
    _atomic_write(path, buffer.getvalue())
    return path


def _read_archive(path: Path, max_bytes: int) -> dict[str, np.ndarray]:
    """Read every array of an ``.npz``, checking each header before reading its data."""
    total = 0
    contents: dict[str, np.ndarray] = {}
    with zipfile.ZipFile(path) as archive:
        members = archive.infolist()
        _require(len(members) <= _MAX_ENTRIES, str(path), f"{len(members)} entries is too many.")
        for info in members:
            key = info.filename[:-4] if info.filename.endswith(".npy") else info.filename
            _require(info.filename.endswith(".npy"), key, "is not a numpy array entry.")
            with archive.open(info) as member:
                version = np.lib.format.read_magic(member)
                if version == (1, 0):
                    shape, fortran, dtype = np.lib.format.read_array_header_1_0(member)
                elif version == (2, 0):
                    shape, fortran, dtype = np.lib.format.read_array_header_2_0(member)
                else:
                    raise StoreError(f"{key}: numpy format version {version} is not supported.")
                _require(dtype in _ARRAY_DTYPES, key,
                         f"dtype {dtype} is not one tdkit writes (no objects are ever read).")
                count = math.prod(shape)
                nbytes = count * dtype.itemsize
                total += nbytes
                _require(total <= max_bytes, key,
                         f"shape {shape} ({nbytes} bytes) takes the file past max_bytes="
                         f"{max_bytes}; refused before allocating. Pass a larger max_bytes if "
                         "you trust the file.")
                _require(member.tell() + nbytes == info.file_size, key,
                         f"header says shape {shape} of {dtype}, which does not match the "
                         f"{info.file_size} bytes stored.")
                data = member.read(nbytes)
                array = np.frombuffer(data, dtype=dtype, count=count)
                contents[key] = array.reshape(shape, order="F" if fortran else "C")
    return contents


def _read(path: str | os.PathLike[str], fmt: str,
          max_bytes: int) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    if not _is_int(max_bytes) or max_bytes < 1:
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
    _check_json(meta, f"{str(path)!r}: meta")
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
        if _digest(array) != digests[key]:
            raise StoreError(f"{str(path)!r} was altered: array {key!r} fails its SHA-256 check.")
    try:
        _check_meta(meta, fmt)
    except StoreError as exc:
        raise StoreError(f"{str(path)!r}: {exc}") from None
    return meta, contents


def _learner_class(name: str, classes: dict[str, type] | None) -> type:
    from . import learners

    table = {n: getattr(learners, n) for n in learners.__all__}
    table.update(classes or {})
    if name not in table:
        raise StoreError(
            f"meta.class: the file holds a {name!r:.80}, which is not a tdkit learner; pass "
            f"classes={{{name!r:.80}: YourClass}} to load it."
        )
    return table[name]


def _check_sizes(cls: type, meta: dict[str, Any], arrays: dict[str, np.ndarray],
                 max_bytes: int) -> tuple[int, int]:
    """Check declared arrays and the implied table size before the learner is built."""
    params = meta["params"]
    sizes = []
    for key in ("n_states", "n_actions"):
        value = params.get(key)
        _require(_is_int(value) and value >= 1, f"params.{key}",
                 f"{value!r:.80} is not an integer >= 1.")
        sizes.append(value)
    n_states, n_actions = sizes
    fields = saved_fields(cls)
    declared = {f"state/{n}" for n, k in fields.items() if _base_kind(k) in _ARRAY_KINDS}
    for key in arrays:
        if key.startswith("state/"):
            _require(key in declared, key,
                     f"is not declared saved state of {cls.__name__}; refused.")
        elif key.startswith("param/"):
            _require(params.get(key[6:]) == {"__array__": key}, key,
                     "is not referenced by the parameters; refused.")
        else:
            raise StoreError(f"{key}: unknown entry; refused.")
    needed = sum(int(a.nbytes) for a in arrays.values())
    for key in sorted(declared):
        dtype, single = _ARRAY_KINDS[_base_kind(fields[key[6:]])]
        shape = (n_states, 1 if single else n_actions)
        _require(key in arrays, key, "missing; the file is incomplete.")
        saved = arrays[key]
        _require(saved.dtype == np.dtype(dtype) and saved.shape == shape, key,
                 f"has shape {saved.shape} and dtype {saved.dtype}; params n_states="
                 f"{n_states}, n_actions={n_actions} say {shape} of {np.dtype(dtype)}.")
        needed += saved.nbytes  # the constructor allocates the same again
    _require(needed <= max_bytes, "params",
             f"n_states={n_states}, n_actions={n_actions} need {needed} bytes, above max_bytes="
             f"{max_bytes}; refused before allocating.")
    return n_states, n_actions


def _validated_state(
    agent: Any, meta: dict[str, Any], arrays: dict[str, np.ndarray]
) -> dict[str, Any]:
    """Check every declared field of the file against its kind; return the values to apply."""
    fields = saved_fields(type(agent))
    n_states, n_actions = agent.n_states, agent.n_actions
    scalars = meta["scalars"]
    undeclared = sorted(set(scalars) - {n for n, k in fields.items()
                                         if _base_kind(k) in _SCALAR_KINDS})
    _require(not undeclared, f"scalars.{undeclared[0] if undeclared else ''}",
             f"is not declared saved state of {type(agent).__name__}; refused.")
    values: dict[str, Any] = {}
    for name, kind in fields.items():
        base = _base_kind(kind)
        if base in _SCALAR_KINDS:
            _require(name in scalars, f"scalars.{name}", "missing; the file is incomplete.")
            values[name] = _check_scalar(name, base, scalars[name], n_states, n_actions)
    for name, kind in fields.items():
        if _base_kind(kind) in _ARRAY_KINDS:
            bound_name = kind.partition("<=")[2]
            bound = values.get(bound_name) if bound_name else None
            _check_array_values(name, kind, arrays[f"state/{name}"], bound)
            values[name] = arrays[f"state/{name}"]
    has_hooks = any(_base_kind(k) == "hooks" for k in fields.values())
    _require((meta["extra"] is not None) == has_hooks, "extra",
             f"{type(agent).__name__} keeps no model state, but the file has some."
             if not has_hooks else f"missing: a {type(agent).__name__} keeps model state.")
    values["rng"] = _check_rng(agent, meta["rng"])
    return values


def _apply(agent: Any, values: dict[str, Any], extra: Any) -> None:
    """Apply validated values: the generator and model hooks first (they may still refuse)."""
    fields = saved_fields(type(agent))
    old_rng = agent.rng.bit_generator.state
    _set_rng(agent, values["rng"])
    if extra is not None:
        try:
            agent._set_extra_state(extra)
        except (TypeError, ValueError, KeyError, IndexError, AttributeError) as exc:
            agent.rng.bit_generator.state = old_rng
            raise StoreError(
                f"extra: the saved {type(agent).__name__} model state is malformed "
                f"({type(exc).__name__}: {exc})."
            ) from None
    for name, kind in fields.items():
        base = _base_kind(kind)
        if base in _ARRAY_KINDS:
            np.copyto(getattr(agent, name), values[name])
        elif base in _SCALAR_KINDS:
            setattr(agent, name, values[name])


def _build(meta: dict[str, Any], arrays: dict[str, np.ndarray],
           classes: dict[str, type] | None, max_bytes: int) -> Any:
    cls = _learner_class(meta["class"], classes)
    _check_sizes(cls, meta, arrays, max_bytes)
    params = {k: _decode_param(k, v, arrays) for k, v in meta["params"].items()}
    try:
        agent = cls(**params)
    except (InvalidParameterError, CapacityError, TypeError, ValueError, AttributeError,
            KeyError, IndexError) as exc:
        raise StoreError(
            f"params: a {cls.__name__} cannot be built from the saved parameters "
            f"({type(exc).__name__}: {exc})."
        ) from None
    missing = sorted(set(agent.get_params()) - set(params))
    _require(not missing, f"params.{missing[0] if missing else ''}",
             "missing; the file is incomplete (a default is never assumed).")
    values = _validated_state(agent, meta, arrays)
    _apply(agent, values, meta["extra"])
    return agent


def _refuse_busy(agent: Any, path: Any) -> None:
    for name, kind in saved_fields(type(agent)).items():
        if kind == "per_episode" and _per_episode_size(getattr(agent, name, None)):
            raise StoreError(
                f"cannot load {str(path)!r} into this {type(agent).__name__}: it is in the "
                f"middle of an episode ({name!r} is not empty). Load into a fresh learner."
            )


def _transfer(source: Any, target: Any) -> None:
    """Copy the declared state of a validated learner into another of the same class."""
    fields = saved_fields(type(target))
    for name, kind in fields.items():
        base = _base_kind(kind)
        mine, theirs = getattr(target, name, None), getattr(source, name)
        if base in _ARRAY_KINDS and (not isinstance(mine, np.ndarray)
                                     or mine.shape != theirs.shape):
            raise StoreError(
                f"state/{name}: the file's shape {theirs.shape} does not fit this "
                f"{type(target).__name__} (has {getattr(mine, 'shape', None)}); the file "
                "belongs to a learner of another shape."
            )
    if any(_base_kind(k) == "hooks" for k in fields.values()):
        target._set_extra_state(source._get_extra_state())
    target.rng.bit_generator.state = source.rng.bit_generator.state
    for name, kind in fields.items():
        base = _base_kind(kind)
        if base in _ARRAY_KINDS:
            np.copyto(getattr(target, name), getattr(source, name))
        elif base in _SCALAR_KINDS:
            value = getattr(source, name)
            setattr(target, name, dict(value) if isinstance(value, dict) else value)


# ----------------------------------------------------------------- public
def save(agent: Any, path: str | os.PathLike[str]) -> Path:
    """Save a tdkit learner's declared state to ``path`` (an ``.npz`` file), atomically.

    Raises
    ------
    tdkit.StoreError
        If the learner is in the middle of an episode or a parameter cannot be
        stored (a callable policy, for example).

    Examples
    --------
    >>> import tempfile, os, tdkit
    >>> agent = tdkit.QLearning(4, 2, seed=0)
    >>> agent.observe(0, 1, 1.0, 2, False, False); _ = agent.update()
    >>> path = os.path.join(tempfile.mkdtemp(), "agent.npz")
    >>> _ = tdkit.save(agent, path)
    >>> again = tdkit.load(path)
    >>> bool((again.table == agent.table).all()), again.act(0) == agent.act(0)
    (True, True)
    """
    meta, arrays = _agent_state(agent)
    return _write(path, FORMAT_AGENT, meta, arrays)


def load(path: str | os.PathLike[str], *, classes: dict[str, type] | None = None,
         max_bytes: int = DEFAULT_MAX_BYTES) -> Any:
    """Load a learner saved by :func:`save`.

    Parameters
    ----------
    path : path-like
    classes : dict, optional
        Extra learner classes by name, for subclasses defined outside tdkit.
    max_bytes : int, default 2**31
        Refuse a file whose arrays, or the tables its parameters imply, need
        more bytes than this (checked before anything is allocated).

    Raises
    ------
    tdkit.StoreError
        If the file is missing, foreign, truncated, corrupted, of another
        format version, or holds anything outside the learner's declared
        state and its checks (the message names the field).
    """
    meta, arrays = _read(path, FORMAT_AGENT, max_bytes)
    try:
        return _build(meta, arrays, classes, max_bytes)
    except StoreError as exc:
        raise StoreError(f"{str(path)!r}: {exc}") from None


def load_state_into(agent: Any, path: str | os.PathLike[str], *,
                    max_bytes: int = DEFAULT_MAX_BYTES) -> None:
    """Overwrite ``agent``'s learned state with the one saved at ``path``.

    The saved learner must be of the same class and shape, and ``agent``
    must not be in the middle of an episode. Nothing changes if loading fails.
    """
    meta, arrays = _read(path, FORMAT_AGENT, max_bytes)
    if meta["class"] != type(agent).__name__:
        raise StoreError(
            f"{str(path)!r} holds a {meta['class']!r:.80}, not a {type(agent).__name__}."
        )
    _refuse_busy(agent, path)
    try:
        source = _build(meta, arrays, {type(agent).__name__: type(agent)}, max_bytes)
    except StoreError as exc:
        raise StoreError(f"{str(path)!r}: {exc}") from None
    _transfer(source, agent)


# ----------------------------------------------------------------- checkpoints
_HISTORY_MAGIC = b"tdkit-history 1\n"
_ROW = np.dtype([(name, dtype) for name, dtype in COLUMNS.items()])
_CHAIN_START = hashlib.sha256(b"tdkit-history").digest()
# History -> (sidecar path, rows already in it, chain digest after them).
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


def _append_history(path: Path, history: History) -> tuple[int, bytes]:
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
        _atomic_write(sidecar, _HISTORY_MAGIC + rows)
        digest = _chain(_CHAIN_START, rows)
    _persisted[history] = (sidecar, n, digest)
    return n, digest


def _read_history(path: Path, rows: Any, digest: Any, max_bytes: int) -> History:
    sidecar = _history_path(path)
    _require(_is_int(rows) and rows >= 0, "history.rows", f"{rows!r:.80} is not an integer >= 0.")
    _require(isinstance(digest, str) and len(digest) == 64, "history.digest",
             f"{digest!r:.80} is not a SHA-256 digest.")
    need = len(_HISTORY_MAGIC) + rows * ROW_BYTES
    _require(rows * ROW_BYTES <= max_bytes, "history.rows",
             f"{rows} episodes need {rows * ROW_BYTES} bytes, above max_bytes={max_bytes}.")
    try:
        with open(sidecar, "rb") as handle:
            data = handle.read(need)
    except OSError as exc:
        raise StoreError(f"{str(sidecar)!r}: the checkpoint's History cannot be read ({exc}).") \
            from None
    _require(data[:len(_HISTORY_MAGIC)] == _HISTORY_MAGIC and len(data) == need, str(sidecar),
             f"is not a tdkit History of {rows} episodes (truncated or of another kind).")
    body = data[len(_HISTORY_MAGIC):]
    chained = _chain(_CHAIN_START, body)
    _require(chained.hex() == digest, str(sidecar), "was altered: it fails its SHA-256 check.")
    table = np.frombuffer(body, dtype=_ROW)
    columns = {name: table[name] for name in COLUMNS}
    for name in ("lengths", "td_counts"):
        _require(bool((columns[name] >= 0).all()), f"history.{name}", "has negative entries.")
    _require(bool(np.isin(columns["ends"], (0, 1, 2)).all()), "history.ends",
             "has codes outside 0, 1, 2.")
    _require(not bool(np.isnan(columns["returns"]).any()), "history.returns", "has NaN.")
    history = History.from_arrays(columns)
    _persisted[history] = (sidecar, rows, chained)
    return history


def save_checkpoint(
    path: str | os.PathLike[str], agent: Any, loop_state: dict[str, Any], history: History,
) -> Path:
    """Write a training checkpoint: the learner, the loop's position and the History.

    The History goes to a sidecar file ``<path>.history`` to which each
    checkpoint of the same run only *appends* the episodes recorded since
    the previous one, so the bytes written per checkpoint do not grow with
    the number of episodes. The learner file is written atomically after the
    rows, and records how many rows belong to it and their chained digest.
    """
    path = Path(path)
    meta, arrays = _agent_state(agent)
    rows, digest = _append_history(path, history)
    meta["loop"] = loop_state
    meta["history"] = {"rows": rows, "digest": digest.hex()}
    return _write(path, FORMAT_CHECKPOINT, meta, arrays)


def _check_loop_state(loop: dict[str, Any]) -> dict[str, Any]:
    for key in ("episode", "total_steps"):
        _require(_is_int(loop.get(key)) and loop[key] >= 0, f"loop.{key}",
                 f"{loop.get(key)!r:.80} is not an integer >= 0.")
    entropy = loop.get("root_entropy")
    _require(isinstance(entropy, str) and entropy.isdigit() and len(entropy) <= 80,
             "loop.root_entropy", f"{entropy!r:.80} is not a decimal integer.")
    key = loop.get("root_spawn_key")
    _require(isinstance(key, list) and len(key) <= 64
             and all(_is_int(k) and 0 <= k < 2**64 for k in key), "loop.root_spawn_key",
             f"{key!r:.80} is not a list of integers in [0, 2**64).")
    return loop


def load_checkpoint(
    path: str | os.PathLike[str], agent: Any, *, max_bytes: int = DEFAULT_MAX_BYTES
) -> tuple[dict[str, Any], History]:
    """Restore ``agent`` from a checkpoint; return ``(loop_state, history)``.

    ``agent`` must be of the saved class, built with the same
    hyper-parameters, and not in the middle of an episode. Nothing changes
    if loading fails.
    """
    path = Path(path)
    meta, arrays = _read(path, FORMAT_CHECKPOINT, max_bytes)
    if meta["class"] != type(agent).__name__:
        raise StoreError(
            f"checkpoint {str(path)!r} was written by a {meta['class']!r:.80}, but the agent "
            f"to resume is a {type(agent).__name__}."
        )
    saved_params = meta["params"]
    current: dict[str, np.ndarray] = {}
    now = {k: _encode_param(k, v, current) for k, v in agent.get_params().items()}
    encoders = _ENCODERS
    differing = sorted(
        k for k in set(now) | set(saved_params)
        if k not in ("seed", *encoders) and now.get(k) != saved_params.get(k)
        and not (isinstance(now.get(k), dict) and "__array__" in now[k])
    )
    for k in encoders:  # same kind and size; a growing index brings its saved states
        if _encoder_shape(now.get(k)) != _encoder_shape(saved_params.get(k)):
            differing.append(k)
    if differing:
        raise StoreError(
            f"checkpoint {str(path)!r} was written with other hyper-parameters "
            f"({', '.join(differing)}); resume with the agent configured as before."
        )
    _refuse_busy(agent, path)
    try:
        loop = _check_loop_state(meta["loop"])
        source = _build(meta, arrays, {type(agent).__name__: type(agent)}, max_bytes)
        history = _read_history(path, meta["history"].get("rows"),
                                meta["history"].get("digest"), max_bytes)
    except StoreError as exc:
        raise StoreError(f"checkpoint {str(path)!r}: {exc}") from None
    growing = []  # encoders that index states as they meet them: bring the saved states
    for k in encoders:
        mine, saved = getattr(agent, k, None), getattr(source, k, None)
        if hasattr(mine, "register") and hasattr(saved, "states"):
            known, restored = list(mine.states), list(saved.states)
            if restored[:len(known)] != known:
                raise StoreError(
                    f"checkpoint {str(path)!r}: the agent's {k} already indexes states the "
                    "checkpoint does not know in that order; resume with a fresh encoder."
                )
            growing.append((mine, restored[len(known):]))
    _transfer(source, agent)
    for encoder, new_states in growing:
        encoder.register(new_states)
    return loop, history

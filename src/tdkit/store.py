"""Saving and loading learners and training checkpoints without pickle.

A file is a numpy ``.npz`` archive holding the learner's arrays and one entry
``meta``: UTF-8 JSON with the format name and version, the learner's class and
constructor arguments, its counters and random-generator state, and a SHA-256
digest of every array. Files are written atomically (a temporary file in the
same folder, then :func:`os.replace`), so a crash never leaves a half-written
file under the real name, and loaded with ``allow_pickle=False``, so a file
cannot run code. A foreign, truncated or tampered file raises
:class:`tdkit.StoreError`; nothing is changed when loading fails.

What is saved
-------------
Every ``numpy.ndarray`` attribute of the learner (tables, visit counts,
models), its scalar attributes (counters, committed actions), its generator
state, and its constructor arguments (schedules, exploration rules and
encoders through their ``describe()``). Learners with other internal
containers (planning models, priority queues) provide
``_get_extra_state() -> dict`` and ``_set_extra_state(dict)`` with
JSON-serialisable content. Per-episode containers (multi-step buffers,
eligibility traces) are empty between episodes and saved as such; saving in
the middle of an episode, or with transitions observed but not yet applied,
raises :class:`tdkit.StoreError`.
"""

from __future__ import annotations

import collections
import hashlib
import io
import json
import os
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from ._errors import StoreError

__all__ = ["load", "load_checkpoint", "load_state_into", "save", "save_checkpoint"]

FORMAT_AGENT = "tdkit-agent"
FORMAT_CHECKPOINT = "tdkit-checkpoint"
FORMAT_VERSION = 1

# Containers of per-episode state; they are empty between episodes.
_CONTAINERS = (collections.deque, dict, list, set)

# Instance attributes that are rebuilt from the constructor, not saved.
_REBUILT = {"_encode", "_action_index", "_env_action", "_step_size", "_explore", "_rng",
            "_pending", "_alpha_const"}


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


def _encoder_shape(encoded: dict[str, Any]) -> dict[str, Any]:
    """An encoder's description without the states a growing index has collected."""
    return {k: v for k, v in encoded["__encoder__"].items() if k != "states"}


def _decode_param(value: Any, arrays: Any) -> Any:
    from .encoders import from_description
    from .exploration import exploration_from_description
    from .schedules import schedule_from_description

    if not isinstance(value, dict):
        return value
    if "__tuple__" in value:
        return tuple(value["__tuple__"])
    if "__schedule__" in value:
        return schedule_from_description(value["__schedule__"])
    if "__exploration__" in value:
        return exploration_from_description(value["__exploration__"])
    if "__array__" in value:
        return np.array(arrays[value["__array__"]])
    if "__encoder__" in value:
        return from_description(value["__encoder__"])
    raise StoreError(f"unknown parameter encoding {value!r} in file.")


def _scalar_json(value: Any) -> Any:
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    if isinstance(value, (np.integer, np.bool_)):
        return value.item()
    if isinstance(value, np.floating):
        return float(value)
    if isinstance(value, tuple) and all(
        v is None or isinstance(v, (bool, int, float, np.integer, np.bool_)) for v in value
    ):
        return {"__tuple__": [_scalar_json(v) for v in value]}
    raise TypeError


def _scalar_from_json(value: Any) -> Any:
    if isinstance(value, dict) and "__tuple__" in value:
        return tuple(value["__tuple__"])
    return value


def _agent_state(agent: Any) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """(meta, arrays) describing ``agent`` completely."""
    if getattr(agent, "_pending", None):
        raise StoreError(
            f"cannot save {type(agent).__name__}: {len(agent._pending)} observed transition(s) "
            "are not applied yet. Call update() first."
        )
    if not hasattr(agent, "get_params"):
        raise StoreError(
            f"cannot save {type(agent).__name__}: tdkit.save stores tdkit learners (objects with "
            "get_params()); save your own agent's state yourself."
        )
    arrays: dict[str, np.ndarray] = {}
    params = {k: _encode_param(k, v, arrays) for k, v in agent.get_params().items()}
    scalars: dict[str, Any] = {}
    extra = agent._get_extra_state() if hasattr(agent, "_get_extra_state") else None
    handled = set(getattr(agent, "_extra_state_attributes", ()))
    for name, value in vars(agent).items():
        if name in _REBUILT or name in handled or (not name.startswith("_") and name in params):
            continue
        if isinstance(value, np.ndarray):
            arrays[f"state/{name}"] = value
            continue
        if isinstance(value, _CONTAINERS):
            if value:
                raise StoreError(
                    f"cannot save {type(agent).__name__} in the middle of an episode: "
                    f"{name!r} holds {len(value)} item(s) of per-episode state (a multi-step "
                    "buffer or eligibility traces). Save after an episode has ended."
                )
            scalars[name] = {"__empty__": type(value).__name__}
            continue
        if callable(value):
            continue  # functions and bound methods are rebuilt by the constructor
        try:
            scalars[name] = _scalar_json(value)
        except TypeError:
            raise StoreError(
                f"cannot save {type(agent).__name__}: attribute {name!r} holds a "
                f"{type(value).__name__}, which tdkit.save does not know how to store. The "
                "learner must provide _get_extra_state/_set_extra_state for it."
            ) from None
    meta = {
        "class": type(agent).__name__,
        "params": params,
        "scalars": scalars,
        "rng": agent.rng.bit_generator.state,
        "extra": extra,
    }
    return meta, arrays


def _apply_state(agent: Any, meta: dict[str, Any], arrays: Any) -> None:
    """Write saved state into ``agent`` (validated first, then applied)."""
    updates = {}
    for key in arrays:
        if not key.startswith("state/"):
            continue
        name = key[len("state/"):]
        current = getattr(agent, name, None)
        saved = arrays[key]
        if not isinstance(current, np.ndarray) or current.shape != saved.shape or (
            current.dtype != saved.dtype
        ):
            raise StoreError(
                f"saved array {name!r} (shape {saved.shape}, {saved.dtype}) does not fit this "
                f"{type(agent).__name__} (has {getattr(current, 'shape', None)}); the file belongs "
                "to a learner of another shape or version."
            )
        updates[name] = saved
    for name, saved in updates.items():
        np.copyto(getattr(agent, name), saved)
    for name, value in meta["scalars"].items():
        if isinstance(value, dict) and "__empty__" in value:
            getattr(agent, name).clear()
        else:
            setattr(agent, name, _scalar_from_json(value))
    agent.rng.bit_generator.state = meta["rng"]
    if meta.get("extra") is not None:
        agent._set_extra_state(meta["extra"])


# ----------------------------------------------------------------- files
def _digest(array: np.ndarray) -> str:
    arr = np.ascontiguousarray(array)
    h = hashlib.sha256()
    h.update(str(arr.dtype).encode())
    h.update(str(arr.shape).encode())
    h.update(arr.tobytes())
    return h.hexdigest()


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
    directory = path.parent if str(path.parent) else Path(".")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=directory)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(buffer.getvalue())
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path


def _read(path: str | os.PathLike[str], fmt: str) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    path = Path(path)
    if not path.exists():
        raise StoreError(f"no such file: {str(path)!r}.")
    try:
        with np.load(path, allow_pickle=False) as archive:
            contents = {k: archive[k] for k in archive.files}
    except Exception as exc:  # zip, npy header and pickle refusals all land here
        raise StoreError(
            f"{str(path)!r} is not a readable tdkit file (truncated, corrupted or of another "
            f"kind): {type(exc).__name__}: {exc}"
        ) from None
    if "meta" not in contents:
        raise StoreError(f"{str(path)!r} is not a tdkit file: it has no 'meta' entry.")
    try:
        meta = json.loads(contents.pop("meta").tobytes().decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise StoreError(f"{str(path)!r}: its metadata is not valid JSON ({exc}).") from None
    if not isinstance(meta, dict) or meta.get("format") != fmt:
        found = meta.get("format") if isinstance(meta, dict) else None
        raise StoreError(
            f"{str(path)!r} holds format {found!r}, expected {fmt!r}."
            + (" Use tdkit.store.load_checkpoint for checkpoints." if found == FORMAT_CHECKPOINT
               else "")
        )
    if meta.get("format_version") != FORMAT_VERSION:
        raise StoreError(
            f"{str(path)!r} has format version {meta.get('format_version')!r}; this tdkit reads "
            f"version {FORMAT_VERSION}."
        )
    digests = meta.get("digests", {})
    if set(digests) != set(contents):
        raise StoreError(
            f"{str(path)!r} was altered: its arrays {sorted(contents)} do not match the recorded "
            f"list {sorted(digests)}."
        )
    for key, array in contents.items():
        if _digest(array) != digests[key]:
            raise StoreError(f"{str(path)!r} was altered: array {key!r} fails its SHA-256 check.")
    return meta, contents


def _learner_class(name: str, classes: dict[str, type] | None) -> type:
    from . import learners

    table = {n: getattr(learners, n) for n in learners.__all__}
    table.update(classes or {})
    if name not in table:
        raise StoreError(
            f"the file holds a {name!r}, which is not a tdkit learner; pass "
            f"classes={{{name!r}: YourClass}} to load it."
        )
    return table[name]


def _build(meta: dict[str, Any], arrays: dict[str, np.ndarray],
           classes: dict[str, type] | None) -> Any:
    cls = _learner_class(meta["class"], classes)
    params = {k: _decode_param(v, arrays) for k, v in meta["params"].items()}
    agent = cls(**params)
    _apply_state(agent, meta, arrays)
    return agent


# ----------------------------------------------------------------- public
def save(agent: Any, path: str | os.PathLike[str]) -> Path:
    """Save a tdkit learner to ``path`` (an ``.npz`` file), atomically.

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


def load(path: str | os.PathLike[str], *, classes: dict[str, type] | None = None) -> Any:
    """Load a learner saved by :func:`save`.

    Parameters
    ----------
    path : path-like
    classes : dict, optional
        Extra learner classes by name, for subclasses defined outside tdkit.

    Raises
    ------
    tdkit.StoreError
        If the file is missing, foreign, truncated, tampered with, or of
        another format version.
    """
    meta, arrays = _read(path, FORMAT_AGENT)
    return _build(meta, arrays, classes)


def load_state_into(agent: Any, path: str | os.PathLike[str]) -> None:
    """Overwrite ``agent``'s learned state with the one saved at ``path``.

    The saved learner must be of the same class and shape.
    """
    meta, arrays = _read(path, FORMAT_AGENT)
    if meta["class"] != type(agent).__name__:
        raise StoreError(
            f"{str(path)!r} holds a {meta['class']}, not a {type(agent).__name__}."
        )
    _apply_state(agent, meta, arrays)


def save_checkpoint(
    path: str | os.PathLike[str], agent: Any, loop_state: dict[str, Any],
    history_arrays: dict[str, np.ndarray],
) -> Path:
    """Write a training checkpoint: the learner, the loop's position and the History."""
    meta, arrays = _agent_state(agent)
    meta["loop"] = loop_state
    for key, value in history_arrays.items():
        arrays[f"history/{key}"] = value
    return _write(path, FORMAT_CHECKPOINT, meta, arrays)


def load_checkpoint(
    path: str | os.PathLike[str], agent: Any
) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """Restore ``agent`` from a checkpoint; return (loop_state, history_arrays)."""
    meta, arrays = _read(path, FORMAT_CHECKPOINT)
    if meta["class"] != type(agent).__name__:
        raise StoreError(
            f"checkpoint {str(path)!r} was written by a {meta['class']}, but the agent to "
            f"resume is a {type(agent).__name__}."
        )
    saved_params = meta["params"]
    current: dict[str, np.ndarray] = {}
    now = {k: _encode_param(k, v, current) for k, v in agent.get_params().items()}
    encoders = ("state_encoder", "action_encoder")
    differing = sorted(
        k for k in now
        if k not in ("seed", *encoders) and now[k] != saved_params.get(k)
        and not (isinstance(now[k], dict) and "__array__" in now[k])
    )
    for k in encoders:  # same kind and size; a growing index brings its saved states
        mine, saved = now.get(k), saved_params.get(k)
        if (mine is None) != (saved is None) or (
            mine is not None and _encoder_shape(mine) != _encoder_shape(saved)
        ):
            differing.append(k)
    if differing:
        raise StoreError(
            f"checkpoint {str(path)!r} was written with other hyper-parameters "
            f"({', '.join(differing)}); resume with the agent configured as before."
        )
    _apply_state(agent, meta, {k: v for k, v in arrays.items() if k.startswith("state/")})
    for k in encoders:
        if saved_params.get(k) is not None:
            setattr(agent, k, _decode_param(saved_params[k], arrays))
    agent._check_encoders()
    history = {k[len("history/"):]: v for k, v in arrays.items() if k.startswith("history/")}
    return meta["loop"], history

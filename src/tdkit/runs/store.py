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

import os
from pathlib import Path
from typing import Any

from .._errors import StoreError
from ._store_files import (
    DEFAULT_MAX_BYTES,
    FORMAT_AGENT,
    FORMAT_CHECKPOINT,
    is_int,
    read,
    require,
    write,
)
from ._store_history import append_history, read_history
from ._store_state import (
    ENCODERS,
    agent_state,
    build,
    encode_param,
    encoder_shape,
    refuse_busy,
    saved_fields,
    transfer,
)
from .history import History

__all__ = [
    "DEFAULT_MAX_BYTES",
    "load",
    "load_checkpoint",
    "load_state_into",
    "save",
    "save_checkpoint",
    "saved_fields",
]


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
    meta, arrays = agent_state(agent)
    return write(path, FORMAT_AGENT, meta, arrays)


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
    meta, arrays = read(path, FORMAT_AGENT, max_bytes)
    try:
        return build(meta, arrays, classes, max_bytes)
    except StoreError as exc:
        raise StoreError(f"{str(path)!r}: {exc}") from None


def load_state_into(agent: Any, path: str | os.PathLike[str], *,
                    max_bytes: int = DEFAULT_MAX_BYTES) -> None:
    """Overwrite ``agent``'s learned state with the one saved at ``path``.

    The saved learner must be of the same class and shape, and ``agent``
    must not be in the middle of an episode. Nothing changes if loading fails.
    """
    meta, arrays = read(path, FORMAT_AGENT, max_bytes)
    if meta["class"] != type(agent).__name__:
        raise StoreError(
            f"{str(path)!r} holds a {meta['class']!r:.80}, not a {type(agent).__name__}."
        )
    refuse_busy(agent, path)
    try:
        source = build(meta, arrays, {type(agent).__name__: type(agent)}, max_bytes)
    except StoreError as exc:
        raise StoreError(f"{str(path)!r}: {exc}") from None
    transfer(source, agent)


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
    meta, arrays = agent_state(agent)
    rows, digest = append_history(path, history)
    meta["loop"] = loop_state
    meta["history"] = {"rows": rows, "digest": digest.hex()}
    return write(path, FORMAT_CHECKPOINT, meta, arrays)


def _require_loop_state(loop: dict[str, Any]) -> dict[str, Any]:
    for key in ("episode", "total_steps"):
        require(is_int(loop.get(key)) and loop[key] >= 0, f"loop.{key}",
                 f"{loop.get(key)!r:.80} is not an integer >= 0.")
    entropy = loop.get("root_entropy")
    require(isinstance(entropy, str) and entropy.isdigit() and len(entropy) <= 80,
             "loop.root_entropy", f"{entropy!r:.80} is not a decimal integer.")
    key = loop.get("root_spawn_key")
    require(isinstance(key, list) and len(key) <= 64
             and all(is_int(k) and 0 <= k < 2**64 for k in key), "loop.root_spawn_key",
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
    meta, arrays = read(path, FORMAT_CHECKPOINT, max_bytes)
    if meta["class"] != type(agent).__name__:
        raise StoreError(
            f"checkpoint {str(path)!r} was written by a {meta['class']!r:.80}, but the agent "
            f"to resume is a {type(agent).__name__}."
        )
    saved_params = meta["params"]
    current: dict[str, Any] = {}
    now = {k: encode_param(k, v, current) for k, v in agent.get_params().items()}
    encoders = ENCODERS
    differing = sorted(
        k for k in set(now) | set(saved_params)
        if k not in ("seed", *encoders) and now.get(k) != saved_params.get(k)
        and not (isinstance(now.get(k), dict) and "__array__" in now[k])
    )
    for k in encoders:  # same kind and size; a growing index brings its saved states
        if encoder_shape(now.get(k)) != encoder_shape(saved_params.get(k)):
            differing.append(k)
    if differing:
        raise StoreError(
            f"checkpoint {str(path)!r} was written with other hyper-parameters "
            f"({', '.join(differing)}); resume with the agent configured as before."
        )
    refuse_busy(agent, path)
    try:
        loop = _require_loop_state(meta["loop"])
        source = build(meta, arrays, {type(agent).__name__: type(agent)}, max_bytes)
        history = read_history(path, meta["history"].get("rows"),
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
    transfer(source, agent)
    for encoder, new_states in growing:
        encoder.register(new_states)
    return loop, history

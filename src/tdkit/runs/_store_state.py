"""The declared saved state of a learner: what :mod:`tdkit.store` writes, checks and applies.

Each learner class lists its own saved fields in ``_saved_state`` as
``(attribute, kind)`` pairs; :func:`saved_fields` collects them along the
class hierarchy. The kinds, and how each is checked when a file is loaded,
are listed in the :mod:`tdkit.store` docstring. Nothing outside the declared
fields is ever written or applied, and nothing is applied before every
field has passed its check.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .._errors import CapacityError, InvalidParameterError, StoreError
from ._store_files import is_int, require

__all__ = [
    "ENCODERS",
    "agent_state",
    "build",
    "encode_param",
    "encoder_shape",
    "refuse_busy",
    "saved_fields",
    "transfer",
]

#: Array kinds: (dtype, columns), the rows being ``n_states`` and the columns
#: ``n_actions`` ("A") or one.
_ARRAY_KINDS = {
    "values": ("<f8", "A"),
    "state_values": ("<f8", 1),
    "counts": ("<i8", "A"),
    "state_counts": ("<i8", 1),
}

_SCALAR_KINDS = ("counter", "real", "commitment", "mask_map", "mask", "state_or_minus_one",
                 "held_transition")

_KINDS = (*_ARRAY_KINDS, *_SCALAR_KINDS, "per_episode", "hooks")

ENCODERS = ("state_encoder", "action_encoder")


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


def encode_param(name: str, value: Any, arrays: dict[str, np.ndarray]) -> Any:
    from ..exploration import Exploration
    from ..schedules import Schedule

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


def encoder_shape(encoded: Any) -> Any:
    """An encoder's description without the states a growing index has collected."""
    if not isinstance(encoded, dict) or not isinstance(encoded.get("__encoder__"), dict):
        return encoded
    return {k: v for k, v in encoded["__encoder__"].items() if k != "states"}


_REBUILD_ERRORS = (InvalidParameterError, CapacityError, TypeError, ValueError, KeyError,
                   IndexError, AttributeError)
"""What rebuilding a saved object (a parameter or the learner) raises on a bad file; the
store turns them into :class:`~tdkit.StoreError` naming the field."""


def _decode_param(name: str, value: Any, arrays: dict[str, np.ndarray]) -> Any:
    from ..encoders import from_description
    from ..exploration import exploration_from_description
    from ..schedules import schedule_from_description

    if name in ENCODERS and value is not None and not (
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
    except _REBUILD_ERRORS as exc:
        raise StoreError(
            f"params.{name}: {value!r:.80} does not describe a valid object "
            f"({type(exc).__name__}: {exc})."
        ) from None
    raise StoreError(f"params.{name}: unknown parameter encoding {value!r:.80}.")


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


def agent_state(agent: Any) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
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
    params = {k: encode_param(k, v, arrays) for k, v in agent.get_params().items()}
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


def _require_array_values(name: str, kind: str, array: np.ndarray, bound: int | None) -> None:
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


def _require_scalar(name: str, kind: str, value: Any, n_states: int, n_actions: int) -> Any:
    """Return the attribute value for a declared scalar, or raise StoreError."""
    field = f"scalars.{name}"
    if kind == "counter":
        require(is_int(value) and value >= 0, field, f"{value!r:.80} is not an integer >= 0.")
        return value
    if kind == "real":
        require(isinstance(value, (int, float)) and not isinstance(value, bool)
                 and math.isfinite(value), field, f"{value!r:.80} is not a finite number.")
        return float(value)
    if kind == "commitment":
        if value is None:
            return None
        require(
            isinstance(value, list) and len(value) == 3 and is_int(value[0])
            and is_int(value[1]) and isinstance(value[2], bool)
            and 0 <= value[0] < n_states and 0 <= value[1] < n_actions,
            field, f"{value!r:.80} is not null or [state, action, true/false] in range.",
        )
        return (value[0], value[1], value[2])
    if kind == "held_transition":
        if value is None:
            return None
        require(
            isinstance(value, list) and len(value) == 3 and is_int(value[0])
            and is_int(value[1]) and 0 <= value[0] < n_states and 0 <= value[1] < n_actions
            and isinstance(value[2], (int, float)) and not isinstance(value[2], bool)
            and math.isfinite(value[2]),
            field, f"{value!r:.80} is not null or [state, action, finite reward] in range.",
        )
        return (value[0], value[1], float(value[2]))
    if kind == "state_or_minus_one":
        require(is_int(value) and -1 <= value < n_states, field,
                 f"{value!r:.80} is not -1 or a state in [0, {n_states}).")
        return value
    if kind == "mask":
        require(isinstance(value, list) and len(value) == n_actions
                 and all(isinstance(x, bool) for x in value) and any(value), field,
                 f"{value!r:.80} is not a list of {n_actions} booleans allowing an action.")
        return np.array(value, dtype=bool)
    # mask_map
    require(isinstance(value, list) and len(value) <= n_states, field,
             f"{value!r:.80} is not a list of [state, mask] pairs.")
    masks: dict[int, np.ndarray] = {}
    for item in value:
        ok = (isinstance(item, list) and len(item) == 2 and is_int(item[0])
              and 0 <= item[0] < n_states and isinstance(item[1], list)
              and len(item[1]) == n_actions and all(isinstance(x, bool) for x in item[1])
              and any(item[1]))
        require(ok, field, f"entry {item!r:.80} is not [state, mask over actions allowing one].")
        masks[item[0]] = np.array(item[1], dtype=bool)
    return masks


def _require_rng(agent: Any, saved: Any) -> dict[str, Any]:
    """Validate a generator state against the structure of ``agent``'s own generator."""
    current = agent.rng.bit_generator.state

    def same_shape(a: Any, b: Any, where: str) -> None:
        if isinstance(a, dict):
            require(isinstance(b, dict) and set(a) == set(b), where,
                     f"has keys {sorted(b) if isinstance(b, dict) else b!r:.80}, expected "
                     f"{sorted(a)}.")
            for key in a:
                same_shape(a[key], b[key], f"{where}.{key}")
        elif isinstance(a, str):
            require(b == a, where, f"is {b!r:.80}, expected {a!r}.")
        else:
            require(is_int(b) and 0 <= b < 2**128, where,
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


def _learner_class(name: str, classes: dict[str, type] | None) -> type:
    from .. import learners

    table = {n: getattr(learners, n) for n in learners.__all__}
    table.update(classes or {})
    if name not in table:
        raise StoreError(
            f"meta.class: the file holds a {name!r:.80}, which is not a tdkit learner; pass "
            f"classes={{{name!r:.80}: YourClass}} to load it."
        )
    return table[name]


def _require_sizes(cls: type, meta: dict[str, Any], arrays: dict[str, np.ndarray],
                 max_bytes: int) -> tuple[int, int]:
    """Check declared arrays and the implied table size before the learner is built."""
    params = meta["params"]
    sizes = []
    for key in ("n_states", "n_actions"):
        value = params.get(key)
        require(is_int(value) and value >= 1, f"params.{key}",
                 f"{value!r:.80} is not an integer >= 1.")
        sizes.append(value)
    n_states, n_actions = sizes
    fields = saved_fields(cls)
    declared = {f"state/{n}" for n, k in fields.items() if _base_kind(k) in _ARRAY_KINDS}
    for key in arrays:
        if key.startswith("state/"):
            require(key in declared, key,
                     f"is not declared saved state of {cls.__name__}; refused.")
        elif key.startswith("param/"):
            require(params.get(key[6:]) == {"__array__": key}, key,
                     "is not referenced by the parameters; refused.")
        else:
            raise StoreError(f"{key}: unknown entry; refused.")
    needed = sum(int(a.nbytes) for a in arrays.values())
    for key in sorted(declared):
        dtype, columns = _ARRAY_KINDS[_base_kind(fields[key[6:]])]
        shape = (n_states, n_actions if columns == "A" else columns)
        require(key in arrays, key, "missing; the file is incomplete.")
        saved = arrays[key]
        require(saved.dtype == np.dtype(dtype) and saved.shape == shape, key,
                 f"has shape {saved.shape} and dtype {saved.dtype}; params n_states="
                 f"{n_states}, n_actions={n_actions} say {shape} of {np.dtype(dtype)}.")
        needed += saved.nbytes  # the constructor allocates the same again
    require(needed <= max_bytes, "params",
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
    require(not undeclared, f"scalars.{undeclared[0] if undeclared else ''}",
             f"is not declared saved state of {type(agent).__name__}; refused.")
    values: dict[str, Any] = {}
    for name, kind in fields.items():
        base = _base_kind(kind)
        if base in _SCALAR_KINDS:
            require(name in scalars, f"scalars.{name}", "missing; the file is incomplete.")
            values[name] = _require_scalar(name, base, scalars[name], n_states, n_actions)
    for name, kind in fields.items():
        if _base_kind(kind) in _ARRAY_KINDS:
            bound_name = kind.partition("<=")[2]
            bound = values.get(bound_name) if bound_name else None
            _require_array_values(name, kind, arrays[f"state/{name}"], bound)
            values[name] = arrays[f"state/{name}"]
    has_hooks = any(_base_kind(k) == "hooks" for k in fields.values())
    require((meta["extra"] is not None) == has_hooks, "extra",
             f"{type(agent).__name__} keeps no model state, but the file has some."
             if not has_hooks else f"missing: a {type(agent).__name__} keeps model state.")
    values["rng"] = _require_rng(agent, meta["rng"])
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


def build(meta: dict[str, Any], arrays: dict[str, np.ndarray],
           classes: dict[str, type] | None, max_bytes: int) -> Any:
    cls = _learner_class(meta["class"], classes)
    _require_sizes(cls, meta, arrays, max_bytes)
    params = {k: _decode_param(k, v, arrays) for k, v in meta["params"].items()}
    try:
        agent = cls(**params)
    except _REBUILD_ERRORS as exc:
        raise StoreError(
            f"params: a {cls.__name__} cannot be built from the saved parameters "
            f"({type(exc).__name__}: {exc})."
        ) from None
    missing = sorted(set(agent.get_params()) - set(params))
    require(not missing, f"params.{missing[0] if missing else ''}",
             "missing; the file is incomplete (a default is never assumed).")
    values = _validated_state(agent, meta, arrays)
    _apply(agent, values, meta["extra"])
    return agent


def refuse_busy(agent: Any, path: Any) -> None:
    for name, kind in saved_fields(type(agent)).items():
        if kind == "per_episode" and _per_episode_size(getattr(agent, name, None)):
            raise StoreError(
                f"cannot load {str(path)!r} into this {type(agent).__name__}: it is in the "
                f"middle of an episode ({name!r} is not empty). Load into a fresh learner."
            )


def transfer(source: Any, target: Any) -> None:
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

"""Differential testing: one transition stream, two agents, the first step they disagree.

:func:`compare_updates` feeds the same transitions to a reference agent and a
candidate, through ``observe`` and ``update``, and after every step compares
the values (``q_values``, or ``values`` for prediction learners) of every
state seen so far. It returns the first :class:`Divergence`, or None.

SARSA-type agents and the next action
-------------------------------------
A SARSA target bootstraps on the action taken *next*, which only ``act`` can
tell the agent. Two modes:

* ``act=False`` (default): ``act`` is never called. Q-learning, Expected
  SARSA, tree backup and prediction learners are fully determined by the
  stream. A SARSA-type learner draws its next action inside ``update`` from
  its own policy, so the two agents agree only when that draw does
  (exploration 0 and no ties, or identical random streams).
* ``act=True``: the training loop's order is replayed: ``act(obs)`` before
  each ``observe``, so a SARSA-type learner bootstraps on the action it then
  takes (the protocol guarantees that for tdkit learners). Each agent's action
  is compared with the stream's: the reference must reproduce the stream (an
  error otherwise), and a candidate that chooses differently is reported as a
  divergence of kind ``"action"``. Streams the reference reproduces come from
  :func:`record_transitions` with an agent built like the reference and the
  same seed.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np

from .._errors import InvalidParameterError
from .._text import describe_exception as _describe
from ._driver import AgentFault, Watcher, run_episodes

__all__ = ["Divergence", "RecordedTransition", "compare_updates", "record_transitions"]

_FIELDS = ("obs", "action", "reward", "next_obs", "terminated", "truncated")


class RecordedTransition(NamedTuple):
    """One transition in ``observe``'s argument order, plus the masks.

    ``mask`` is the mask ``act`` was given in ``obs`` (used by
    ``compare_updates(..., act=True)``); ``next_mask`` goes to ``observe``.
    """

    obs: Any
    action: Any
    reward: float
    next_obs: Any
    terminated: bool
    truncated: bool
    next_mask: Any = None
    mask: Any = None


@dataclass(frozen=True)
class Divergence:
    """The first step at which the candidate disagreed with the reference.

    Attributes
    ----------
    step : int
        Index of the transition in the stream (from 0).
    kind : {"value", "action", "exception"}
        ``"value"``: a value differed after the step's update; ``"action"``:
        with ``act=True``, the candidate chose another action than the
        stream's; ``"exception"``: the candidate raised.
    state : observation
        The state whose value differed (``"value"``), or the state acted in.
    action : action or None
        The action of the differing value (None for prediction learners and
        for kinds other than ``"value"``).
    expected, seen
        The reference's and the candidate's value (or action, or the
        exception text as ``seen``).
    """

    step: int
    kind: str
    state: Any
    action: Any
    expected: Any
    seen: Any

    def __str__(self) -> str:
        if self.kind == "value":
            label = f"V({self.state!r})" if self.action is None else (
                f"Q({self.state!r}, {self.action!r})"
            )
            return (
                f"step {self.step}: {label} = {self.seen!r} in the candidate, "
                f"{self.expected!r} in the reference"
            )
        if self.kind == "action":
            return (
                f"step {self.step}: in state {self.state!r} the candidate chose "
                f"{self.seen!r}, the stream (and the reference) {self.expected!r}"
            )
        return f"step {self.step}: the candidate raised {self.seen}"


def _field(record: Any, name: str, i: int, default: Any = ...) -> Any:
    if isinstance(record, dict):
        if name in record:
            return record[name]
    elif hasattr(record, name):
        return getattr(record, name)
    if default is not ...:
        return default
    raise InvalidParameterError(
        f"compare_updates: transition {i} ({record!r:.80}) has no field {name!r}; give tuples "
        f"in observe's order {_FIELDS} or records with those fields."
    )


def _parse(transitions: Iterable[Any]) -> list[RecordedTransition]:
    out = []
    for i, record in enumerate(transitions):
        if isinstance(record, tuple) and not hasattr(record, "_fields"):
            if not 6 <= len(record) <= 8:
                raise InvalidParameterError(
                    f"compare_updates: transition {i} is a tuple of length {len(record)}; "
                    f"expected 6 to 8 entries {(*_FIELDS, 'next_mask', 'mask')}."
                )
            out.append(RecordedTransition(*record))
        elif isinstance(record, (list, str, bytes)):
            raise InvalidParameterError(
                f"compare_updates: transition {i} is a {type(record).__name__}; give tuples in "
                f"observe's order {_FIELDS} or records (dicts or objects) with those fields."
            )
        else:
            values = [_field(record, name, i) for name in _FIELDS]
            out.append(RecordedTransition(
                *values, _field(record, "next_mask", i, None), _field(record, "mask", i, None)
            ))
    return out


def _same(a: Any, b: Any) -> bool:
    try:
        return bool(a == b)
    except (ValueError, TypeError):
        return bool(np.array_equal(np.asarray(a), np.asarray(b)))


def _key(obs: Any) -> Any:
    try:
        hash(obs)
    except TypeError:
        return ("unhashable", repr(obs))
    return obs


def _reader(reference: Any, candidate: Any, obs: Any) -> str:
    for name in ("q_values", "values"):
        try:
            getattr(reference, name)(obs)
            getattr(candidate, name)(obs)
        except (AttributeError, NotImplementedError, TypeError):
            continue
        return name
    raise InvalidParameterError(
        "compare_updates: both agents need q_values(obs) (control) or values(obs) "
        "(prediction) so their values can be compared; got "
        f"{type(reference).__name__} and {type(candidate).__name__}."
    )


def _read(agent: Any, reader: str, obs: Any) -> np.ndarray:
    return np.asarray(getattr(agent, reader)(obs), dtype=np.float64).reshape(-1)


def compare_updates(
    reference: Any,
    candidate: Any,
    transitions: Iterable[Any],
    *,
    atol: float = 1e-9,
    rtol: float = 1e-9,
    act: bool = False,
) -> Divergence | None:
    """Feed one transition stream to both agents; return the first divergence or None.

    For every transition (in order) both agents get ``observe(...)`` then
    ``update()``; then the values of every state seen so far (``obs`` and
    ``next_obs`` of the transitions so far, in order of first appearance)
    are compared, action by action. Values agree when
    ``|seen - expected| <= atol + rtol * |expected|``.

    Build both agents fresh, with the same hyper-parameters and with
    exploration out of the way where it enters the update (for example
    ``exploration=0`` for Expected SARSA, whose target averages over the
    exploring policy). Multi-step learners agree step by step as long as they
    apply each update at the same step (as the protocol asks: as soon as its
    return is complete).

    Parameters
    ----------
    reference, candidate : Agent
        Fresh agents with ``q_values`` (or both with ``values``).
    transitions : iterable
        Tuples in ``observe``'s argument order ``(obs, action, reward,
        next_obs, terminated, truncated)``, optionally followed by
        ``next_mask`` and ``mask``; or records (dicts or objects such as
        :class:`RecordedTransition`) with those fields.
    atol, rtol : float
        Tolerances of the value comparison.
    act : bool, default False
        Replay the training loop's order, calling ``act(obs, mask=...)`` on
        both agents before each ``observe`` (see the module documentation:
        needed for SARSA-type agents, whose targets depend on the next action).

    Returns
    -------
    Divergence or None
        None when the agents agree after every step.

    Raises
    ------
    InvalidParameterError
        On a malformed transition, agents without comparable values, or (with
        ``act=True``) a stream the reference does not reproduce.

    Examples
    --------
    >>> import tdkit
    >>> stream = [(0, 1, 1.0, 1, False, False), (1, 0, 0.0, 2, True, False)]
    >>> ref = tdkit.QLearning(3, 2, gamma=0.9, step_size=0.5, seed=0)
    >>> cand = tdkit.QLearning(3, 2, gamma=0.9, step_size=0.5, seed=1)
    >>> compare_updates(ref, cand, stream) is None
    True
    >>> slow = tdkit.QLearning(3, 2, gamma=0.9, step_size=0.25, seed=0)
    >>> print(compare_updates(tdkit.QLearning(3, 2, gamma=0.9, step_size=0.5, seed=0), slow,
    ...                       stream))
    step 0: Q(0, 1) = 0.25 in the candidate, 0.5 in the reference
    """
    for name, value in (("atol", atol), ("rtol", rtol)):
        if (isinstance(value, bool) or not isinstance(value, numbers.Real)
                or not value >= 0 or not math.isfinite(value)):
            raise InvalidParameterError(
                f"compare_updates: {name} must be a finite number >= 0; got {value!r}."
            )
    stream = _parse(transitions)
    if not stream:
        return None
    reader = _reader(reference, candidate, stream[0].obs)
    seen: dict[Any, Any] = {}
    previous: RecordedTransition | None = None
    for i, t in enumerate(stream):
        continuing = (
            previous is not None
            and not (previous.terminated or previous.truncated)
            and _same(previous.next_obs, t.obs)
        )
        if act:
            mask = t.mask if t.mask is not None else (previous.next_mask if continuing else None)
            chosen = reference.act(t.obs, mask=mask)
            if not _same(chosen, t.action):
                raise InvalidParameterError(
                    f"compare_updates: at step {i} the reference chose action {chosen!r} in "
                    f"state {t.obs!r} but the stream took {t.action!r}. With act=True the "
                    "stream must be one the reference reproduces: record it with "
                    "record_transitions(agent, env, ...) from an agent built like the "
                    "reference with the same seed."
                )
            try:
                theirs = candidate.act(t.obs, mask=mask)
            except Exception as exc:
                return Divergence(i, "exception", t.obs, None, None, _describe(exc))
            if not _same(theirs, t.action):
                return Divergence(i, "action", t.obs, None, t.action, theirs)
        for obs in (t.obs, t.next_obs):
            seen.setdefault(_key(obs), obs)
        args = (t.obs, t.action, t.reward, t.next_obs, t.terminated, t.truncated)
        reference.observe(*args, next_mask=t.next_mask)
        reference.update()
        try:
            candidate.observe(*args, next_mask=t.next_mask)
            candidate.update()
            found = _first_difference(reference, candidate, reader, seen.values(), atol, rtol)
        except Exception as exc:
            return Divergence(i, "exception", t.obs, t.action, None, _describe(exc))
        if found is not None:
            state, action, expected, value = found
            return Divergence(i, "value", state, action, expected, value)
        previous = t
    return None


def _first_difference(
    reference: Any, candidate: Any, reader: str, states: Iterable[Any], atol: float, rtol: float
) -> tuple[Any, Any, float, float] | None:
    for obs in states:
        expected = _read(reference, reader, obs)
        value = _read(candidate, reader, obs)
        if expected.shape != value.shape:
            raise InvalidParameterError(
                f"compare_updates: {reader}({obs!r}) has shape {expected.shape} in the "
                f"reference but {value.shape} in the candidate."
            )
        close = np.abs(value - expected) <= atol + rtol * np.abs(expected)
        close |= (value == expected)  # equal infinities
        if not close.all():
            a = int(np.flatnonzero(~close)[0])
            return obs, (a if reader == "q_values" else None), float(expected[a]), float(value[a])
    return None


class _Tape(Watcher):
    def __init__(self) -> None:
        self.steps: list[RecordedTransition] = []
        self.mask: Any = None

    def before_observe(self, episode: int, step: int, transition: tuple) -> None:
        obs, action, reward, next_obs, terminated, truncated, next_mask = transition
        self.steps.append(RecordedTransition(
            obs, action, reward, next_obs, terminated, truncated, next_mask, self.mask
        ))
        self.mask = None if (terminated or truncated) else next_mask


def record_transitions(
    agent: Any, env: Any, *, episodes: int, seed: int = 0
) -> list[RecordedTransition]:
    """Train ``agent`` on ``env`` for ``episodes`` episodes and return every transition.

    The loop is :func:`tdkit.train`'s (``act``, ``step``, ``observe``,
    ``update``; masks from ``info["action_mask"]``; environment seeds derived
    from ``seed``), so an agent built the same way with the same seed and
    replayed with ``compare_updates(..., act=True)`` reproduces the stream.

    Parameters
    ----------
    agent : Agent
    env : gymnasium-style environment
        With ``reset(seed=...)``, ``step`` and an ``action_space``.
    episodes : int
    seed : int, default 0

    Returns
    -------
    list of RecordedTransition

    Raises
    ------
    InvalidParameterError
        If the agent breaks the protocol on the way (the message says where).
    """
    if isinstance(episodes, bool) or not isinstance(episodes, numbers.Integral) or episodes < 1:
        raise InvalidParameterError(
            f"record_transitions: episodes must be a positive int; got {episodes!r}."
        )
    tape = _Tape()
    try:
        run_episodes(agent, _MaskTap(env, tape), episodes=int(episodes), seed=int(seed),
                     watcher=tape)
    except AgentFault as fault:
        raise InvalidParameterError(
            f"record_transitions: {fault.message} ({fault.where})"
        ) from None
    return tape.steps


class _MaskTap:
    """Lets the tape see the mask ``reset`` reports (``act``'s first mask of an episode)."""

    def __init__(self, env: Any, tape: _Tape) -> None:
        self._env = env
        self._tape = tape
        self.action_space = env.action_space

    def reset(self, *, seed: int | None = None) -> tuple[Any, dict]:
        obs, info = self._env.reset(seed=seed)
        self._tape.mask = info.get("action_mask") if info else None
        return obs, info

    def step(self, action: Any) -> tuple:
        return self._env.step(action)

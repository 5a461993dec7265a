"""Calling an agent with every answer checked: what the verifier's runs use.

In *checked* mode the episode driver wraps ``act``, ``observe`` and ``update``
so that anything an agent does wrong (an exception, an action outside the
action space, an ``update`` that does not return floats) becomes an
:class:`AgentFault` naming the call and, once the driver adds it, the episode
and step. Training does not pay for this: unchecked runs call the agent's
bound methods directly.
"""

from __future__ import annotations

import numbers
import warnings
from collections.abc import Callable, Sequence
from typing import Any

import gymnasium
import numpy as np

from .._text import summarize_exception as describe_exception

__all__ = [
    "AgentFault",
    "check_update_result",
    "checked_calls",
    "describe_exception",
    "require_update_result",
]

_REMOVAL = "0.3.0"
"""Version that removes the deprecated ``check_update_result`` spelling."""


class AgentFault(Exception):
    """The agent broke the protocol; ``where`` says when (episode, step)."""

    def __init__(self, message: str, where: str | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.where = where

    def __str__(self) -> str:
        return f"{self.message} (at {self.where})" if self.where else self.message


def require_update_result(errors: Any, where: str | None = None) -> tuple[float, ...]:
    """Return ``update()``'s result as a tuple of floats, or raise an :class:`AgentFault`."""
    if type(errors) is tuple and all(type(e) is float for e in errors):
        return errors  # the common case, checked cheaply
    if isinstance(errors, np.ndarray):
        if errors.ndim != 1:
            raise AgentFault(
                f"update() returned an array of shape {errors.shape}; it must return a "
                "sequence of TD errors (a tuple of floats, () when nothing was applied)",
                where,
            )
        errors = errors.tolist()
    if not isinstance(errors, Sequence) or isinstance(errors, (str, bytes)):
        raise AgentFault(
            f"update() returned {errors!r:.60}; it must return a sequence of TD errors "
            "(a tuple of floats, () when nothing was applied)",
            where,
        )
    out = []
    for e in errors:
        if isinstance(e, bool) or not isinstance(e, numbers.Real):
            raise AgentFault(
                f"update() returned {errors!r:.60}, which holds the non-float {e!r:.30}", where
            )
        out.append(float(e))
    return tuple(out)


def check_update_result(errors: Any, where: str | None = None) -> tuple[float, ...]:
    """Deprecated spelling of :func:`require_update_result` (a ``FutureWarning``).

    ``check_*`` names are kept for the verifier's checks; this one validates a value.
    """
    warnings.warn(
        f"tdkit.runs.check_update_result is deprecated and will be removed in tdkit "
        f"{_REMOVAL}; use tdkit.runs.require_update_result.",
        FutureWarning,
        stacklevel=2,
    )
    return require_update_result(errors, where)


def _action_test(space: Any) -> Callable[[Any], bool]:
    """A fast membership test for ``Discrete`` spaces, ``space.contains`` otherwise."""
    if isinstance(space, gymnasium.spaces.Discrete):
        low, high = int(space.start), int(space.start + space.n)

        def valid(action: Any) -> bool:
            return (isinstance(action, (int, np.integer)) and not isinstance(action, bool)
                    and low <= action < high)

        return valid
    if space is None:
        return lambda action: True
    return space.contains


def checked_calls(agent: Any, action_space: Any) -> tuple[Callable, Callable, Callable]:
    """``act``, ``observe`` and ``update`` of ``agent``, each turning misbehaviour into a fault."""
    act, observe, update = agent.act, agent.observe, agent.update
    valid = _action_test(action_space)

    def checked_act(obs: Any, *, mask: Any = None, explore: bool = True) -> Any:
        try:
            action = act(obs, mask=mask, explore=explore)
        except AgentFault:
            raise
        except Exception as exc:
            raise AgentFault(f"act({obs!r}) raised {describe_exception(exc)}") from exc
        if not valid(action):
            raise AgentFault(
                f"act({obs!r}) returned {action!r}, which is not in the action space "
                f"{action_space}"
            )
        return action

    def checked_observe(
        obs: Any, action: Any, reward: float, next_obs: Any, terminated: bool, truncated: bool,
        *, next_mask: Any = None,
    ) -> None:
        try:
            observe(obs, action, reward, next_obs, terminated, truncated, next_mask=next_mask)
        except Exception as exc:
            raise AgentFault(
                f"observe({obs!r}, {action!r}, {reward!r}, {next_obs!r}, {terminated}, "
                f"{truncated}) raised {describe_exception(exc)}"
            ) from exc

    def checked_update() -> tuple[float, ...]:
        try:
            result = update()
        except Exception as exc:
            raise AgentFault(f"update() raised {describe_exception(exc)}") from exc
        return require_update_result(result)

    return checked_act, checked_observe, checked_update

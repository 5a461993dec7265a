"""Checking, before the first step, that an agent's table fits an environment's spaces."""

from __future__ import annotations

from typing import Any

import gymnasium

from .._errors import InvalidParameterError
from ..encoders import DiscreteEncoder

__all__ = ["require_agent_fits"]


def _discrete_size(space: Any) -> int | None:
    if isinstance(space, gymnasium.spaces.Discrete):
        return int(space.n)
    return None


def require_agent_fits(agent: Any, env: Any, *, owner: str = "train") -> None:
    """Raise if ``agent``'s table cannot hold ``env``'s discrete states or actions.

    Only agents that declare ``n_states`` / ``n_actions`` (every tdkit
    learner) are checked, and only against ``Discrete`` spaces:

    * an agent with fewer actions than ``Discrete(n)`` cannot choose some of
      them, and one with more would send invalid actions: both must match
      unless the agent has its own action encoder for another space;
    * a table with fewer rows than ``Discrete(n)`` states fails mid-run; a
      learner built with ``for_env`` for another space (its state encoder
      declares a different size) is refused too. A table with *more* rows
      and no encoder is accepted (spare rows are never visited).

    Raises
    ------
    InvalidParameterError
        Naming both sizes and the fix.

    Examples
    --------
    >>> import gymnasium as gym
    >>> from tdkit import QLearning
    >>> try:
    ...     require_agent_fits(QLearning(16, 6), gym.make("FrozenLake-v1"))
    ... except ValueError as exc:
    ...     print(str(exc)[:64])
    train: the agent has 6 actions but the environment's action spac
    """
    name = type(agent).__name__
    n_actions = getattr(agent, "n_actions", None)
    env_actions = _discrete_size(getattr(env, "action_space", None))
    if isinstance(n_actions, int) and env_actions is not None:
        encoder = getattr(agent, "action_encoder", None)
        declared = getattr(encoder, "n_actions", None) if encoder is not None else n_actions
        if declared != env_actions:
            raise InvalidParameterError(
                f"{owner}: the agent has {n_actions} actions but the environment's action "
                f"space is Discrete({env_actions}); build the agent with "
                f"n_actions={env_actions} or with {name}.for_env(env)."
            )
    n_states = getattr(agent, "n_states", None)
    env_states = _discrete_size(getattr(env, "observation_space", None))
    if isinstance(n_states, int) and env_states is not None:
        encoder = getattr(agent, "state_encoder", None)
        if encoder is None and n_states < env_states:
            raise InvalidParameterError(
                f"{owner}: the agent's table has {n_states} states but the environment's "
                f"observation space is Discrete({env_states}); build the agent with "
                f"n_states={env_states} or with {name}.for_env(env)."
            )
        if encoder is not None and _built_for_discrete(encoder) and n_states != env_states:
            raise InvalidParameterError(
                f"{owner}: the agent was built for {n_states} states (its state encoder) but "
                f"the environment's observation space is Discrete({env_states}); build it "
                f"with {name}.for_env(env) on this environment."
            )


def _built_for_discrete(encoder: Any) -> bool:
    """Whether a state encoder numbers the states of a ``Discrete`` space."""
    return isinstance(encoder, DiscreteEncoder)

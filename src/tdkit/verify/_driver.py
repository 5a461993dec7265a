"""Driving an agent through the protocol only, with every answer checked.

The verifier never reaches into an agent: it calls ``act``, ``observe`` and
``update`` (and reads ``q_values`` / ``values`` when the agent has them), in
the order :func:`tdkit.train` uses. Anything the agent does wrong on the way
(an exception, an action outside the action space, an ``update`` that does
not return floats) becomes an :class:`AgentFault` naming the episode and step.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import gymnasium
import numpy as np

from .._text import summarize_exception as _describe_exc
from ..loop import episode_seed

__all__ = [
    "AgentFault",
    "AgentKind",
    "RunTrace",
    "Watcher",
    "agent_kind",
    "build_agent",
    "check_errors",
    "read_q",
    "read_v",
    "run_episodes",
]


class AgentFault(Exception):
    """The agent broke the protocol; ``where`` says when (episode, step)."""

    def __init__(self, message: str, where: str | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.where = where


@dataclass(frozen=True)
class AgentKind:
    """What an agent offers beyond the three verbs, read off a built agent."""

    q_values: bool
    values: bool

    @property
    def prediction(self) -> bool:
        """A state-value learner (``values`` and no ``q_values``): act follows a fixed policy."""
        return self.values and not self.q_values

    @property
    def label(self) -> str:
        if self.prediction:
            return "prediction learner: reads values(obs)"
        if self.q_values:
            return "control learner: reads q_values(obs)"
        return "control learner: behaviour only (no q_values)"


def _answers(method: Any, obs: Any) -> bool:
    """Whether ``method(obs)`` gives an answer (``NotImplementedError`` means "not offered")."""
    if not callable(method):
        return False
    try:
        method(obs)
    except (NotImplementedError, AttributeError):
        return False
    except Exception:  # offered but broken: the protocol check reports it
        return True
    return True


def agent_kind(agent: Any, obs: Any) -> AgentKind:
    """Classify ``agent`` by the optional readers it answers for observation ``obs``.

    A reader that raises ``NotImplementedError`` (as tdkit's prediction
    learners do for ``q_values``) counts as absent.
    """
    return AgentKind(
        q_values=_answers(getattr(agent, "q_values", None), obs),
        values=_answers(getattr(agent, "values", None), obs),
    )


def build_agent(make_agent: Callable[[Any, int], Any], env: Any, seed: int) -> Any:
    """Call ``make_agent(env, seed)``; a failure becomes an :class:`AgentFault`."""
    try:
        agent = make_agent(env, seed)
    except Exception as exc:
        raise AgentFault(f"make_agent(env, {seed}) raised {_describe_exc(exc)}") from exc
    if agent is None:
        raise AgentFault(f"make_agent(env, {seed}) returned None instead of an agent")
    return agent


def check_errors(errors: Any, where: str) -> tuple[float, ...]:
    """Return ``update()``'s result as a tuple of floats, or raise an AgentFault."""
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


def read_q(agent: Any, states: Sequence[int], where: str | None = None) -> np.ndarray:
    """``q_values(s)`` for each state, as a float array ``(len(states), A)``."""
    rows = []
    for s in states:
        try:
            rows.append(np.asarray(agent.q_values(s), dtype=np.float64).reshape(-1))
        except Exception as exc:
            raise AgentFault(f"q_values({s!r}) raised {_describe_exc(exc)}", where) from exc
    if len({r.shape for r in rows}) > 1:
        raise AgentFault(f"q_values returned rows of different lengths for states {states}", where)
    return np.array(rows)


def read_v(agent: Any, states: Sequence[int], where: str | None = None) -> np.ndarray:
    """``values(s)`` for each state, as a float array ``(len(states),)``."""
    out = []
    for s in states:
        try:
            out.append(float(np.asarray(agent.values(s), dtype=np.float64).reshape(())))
        except Exception as exc:
            raise AgentFault(f"values({s!r}) raised {_describe_exc(exc)}", where) from exc
    return np.array(out)


class Watcher:
    """Hooks into :func:`run_episodes`; every method may raise :class:`AgentFault`."""

    def after_act(self, episode: int, step: int, obs: Any, action: Any) -> None:
        """Called after ``act`` returned ``action`` for ``obs``."""

    def before_observe(self, episode: int, step: int, transition: tuple) -> None:
        """Called before ``observe(*transition)``."""

    def after_update(
        self, episode: int, step: int, transition: tuple, errors: tuple[float, ...]
    ) -> None:
        """Called after ``update()`` returned ``errors``."""

    def after_episode(self, episode: int, steps: int) -> None:
        """Called when an episode ended."""


def _action_check(space: Any) -> Callable[[Any], bool]:
    """A fast membership test for ``Discrete`` spaces, ``space.contains`` otherwise."""
    if isinstance(space, gymnasium.spaces.Discrete):
        low, high = int(space.start), int(space.start + space.n)

        def valid(action: Any) -> bool:
            return (isinstance(action, (int, np.integer)) and not isinstance(action, bool)
                    and low <= action < high)

        return valid
    return space.contains


@dataclass
class RunTrace:
    """What happened in :func:`run_episodes`."""

    actions: list[Any] = field(default_factory=list)
    errors: list[tuple[float, ...]] = field(default_factory=list)
    returns: list[float] = field(default_factory=list)
    steps: int = 0


def where(episode: int, step: int) -> str:
    return f"episode {episode}, step {step}"


def run_episodes(
    agent: Any,
    env: Any,
    *,
    episodes: int,
    seed: int,
    watcher: Watcher | None = None,
    max_steps: int = 10_000,
) -> RunTrace:
    """Train ``agent`` for ``episodes`` episodes the way :func:`tdkit.train` does.

    Environment seeds are :func:`tdkit.loop.episode_seed` of ``seed``, so a run
    is reproduced by ``tdkit.train(make_agent(env, seed), env, episodes=...,
    seed=seed)``. Masks travel in ``info["action_mask"]``. An episode longer
    than ``max_steps`` is an :class:`AgentFault` (the probe environments end
    every episode well before).
    """
    watch = watcher or Watcher()
    root = np.random.SeedSequence(seed)
    space = env.action_space
    valid = _action_check(space)
    trace = RunTrace()
    for episode in range(episodes):
        obs, info = env.reset(seed=episode_seed(root, episode))
        mask = info.get("action_mask") if info else None
        ret = 0.0
        for step in range(max_steps):
            here = where(episode, step)
            try:
                action = agent.act(obs, mask=mask)
            except Exception as exc:
                raise AgentFault(f"act({obs!r}) raised {_describe_exc(exc)}", here) from exc
            if not valid(action):
                raise AgentFault(
                    f"act({obs!r}) returned {action!r}, which is not in the action space {space}",
                    here,
                )
            trace.actions.append(int(action))
            watch.after_act(episode, step, obs, action)
            next_obs, reward, terminated, truncated, info = env.step(action)
            next_mask = info.get("action_mask") if info else None
            transition = (obs, action, reward, next_obs, terminated, truncated, next_mask)
            watch.before_observe(episode, step, transition)
            try:
                agent.observe(
                    obs, action, reward, next_obs, terminated, truncated, next_mask=next_mask
                )
            except Exception as exc:
                raise AgentFault(
                    f"observe({obs!r}, {action!r}, {reward!r}, {next_obs!r}, {terminated}, "
                    f"{truncated}) raised {_describe_exc(exc)}",
                    here,
                ) from exc
            try:
                result = agent.update()
            except Exception as exc:
                raise AgentFault(f"update() raised {_describe_exc(exc)}", here) from exc
            errors = check_errors(result, here)
            trace.errors.append(errors)
            watch.after_update(episode, step, transition, errors)
            ret += reward
            trace.steps += 1
            if terminated or truncated:
                break
            obs, mask = next_obs, next_mask
        else:
            raise AgentFault(
                f"episode did not end within {max_steps} steps of a probe environment that ends "
                "every episode sooner",
                where(episode, max_steps),
            )
        trace.returns.append(ret)
        watch.after_episode(episode, step + 1)
    return trace


def all_finite(values: np.ndarray) -> bool:
    return bool(np.isfinite(values).all())


def fmt(x: Any) -> str:
    """Short text of a number or an array of numbers."""
    if isinstance(x, np.ndarray):
        return "[" + ", ".join(fmt(v) for v in x.tolist()) + "]"
    if isinstance(x, float):
        if math.isnan(x) or math.isinf(x):
            return repr(x)
        return f"{x:.4g}"
    return repr(x)

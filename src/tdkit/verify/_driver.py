"""Driving an agent through the protocol only, with every answer checked.

The verifier never reaches into an agent: it calls ``act``, ``observe`` and
``update`` (and reads ``q_values`` / ``values`` when the agent has them), in
the order :func:`tdkit.train` uses. Anything the agent does wrong on the way
(an exception, an action outside the action space, an ``update`` that does
not return floats) becomes an :class:`AgentFault` naming the episode and step.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..runs import (
    AgentFault,
    EpisodeHooks,
    MaskReader,
    describe_exception,
    episode_seed,
    root_sequence,
    run_episode,
)

__all__ = [
    "AgentFault",
    "AgentKind",
    "RunTrace",
    "Watcher",
    "agent_kind",
    "build_agent",
    "read_q",
    "read_v",
    "run_episodes",
]


@dataclass(frozen=True)
class AgentKind:
    """What an agent offers beyond the three verbs, read off a built agent."""

    q_values: bool
    values: bool
    average_reward: bool = False

    @property
    def prediction(self) -> bool:
        """A state-value learner (``values`` and no ``q_values``): act follows a fixed policy."""
        return self.values and not self.q_values

    @property
    def label(self) -> str:
        if self.average_reward:
            return "average-reward learner: reads average_reward"
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
        average_reward=hasattr(agent, "average_reward"),
    )


def build_agent(make_agent: Callable[[Any, int], Any], env: Any, seed: int) -> Any:
    """Call ``make_agent(env, seed)``; a failure becomes an :class:`AgentFault`."""
    try:
        agent = make_agent(env, seed)
    except Exception as exc:
        raise AgentFault(f"make_agent(env, {seed}) raised {describe_exception(exc)}") from exc
    if agent is None:
        raise AgentFault(f"make_agent(env, {seed}) returned None instead of an agent")
    return agent


def read_row(agent: Any, state: Any, where: str | None = None) -> np.ndarray:
    """``q_values(state)`` as a new 1-D float array (a copy: later updates leave it as read)."""
    try:
        return np.array(agent.q_values(state), dtype=np.float64).reshape(-1)
    except Exception as exc:
        raise AgentFault(f"q_values({state!r}) raised {describe_exception(exc)}", where) from exc


def read_q(agent: Any, states: Sequence[int], where: str | None = None) -> np.ndarray:
    """``q_values(s)`` for each state, as a float array ``(len(states), A)``."""
    rows = [read_row(agent, s, where) for s in states]
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
            raise AgentFault(f"values({s!r}) raised {describe_exception(exc)}", where) from exc
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


@dataclass
class RunTrace:
    """What happened in :func:`run_episodes`."""

    actions: list[Any] = field(default_factory=list)
    errors: list[tuple[float, ...]] = field(default_factory=list)
    returns: list[float] = field(default_factory=list)
    steps: int = 0


def where(episode: int, step: int) -> str:
    return f"episode {episode}, step {step}"


class _Tap(EpisodeHooks):
    """Feeds one episode's steps to a :class:`Watcher` and into a :class:`RunTrace`."""

    def __init__(self, watcher: Watcher, trace: RunTrace, episode: int) -> None:
        self.watcher, self.trace, self.episode = watcher, trace, episode

    def after_act(self, step: int, obs: Any, action: Any) -> None:
        self.trace.actions.append(int(action))
        self.watcher.after_act(self.episode, step, obs, action)

    def before_observe(self, step: int, transition: tuple) -> None:
        self.watcher.before_observe(self.episode, step, transition)

    def after_update(self, step: int, transition: tuple, errors: tuple[float, ...]) -> None:
        self.trace.errors.append(errors)
        self.watcher.after_update(self.episode, step, transition, errors)


def run_episodes(
    agent: Any,
    env: Any,
    *,
    episodes: int,
    seed: int | np.random.SeedSequence,
    watcher: Watcher | None = None,
    max_steps: int = 10_000,
    max_episode_steps: int | None = None,
    cut_after: int | None = None,
) -> RunTrace:
    """Train ``agent`` for ``episodes`` episodes through tdkit's one episode driver.

    Each episode is :func:`tdkit.runs.run_episode` in checked mode, exactly
    as :func:`tdkit.train` runs it (environment seeds are
    :func:`tdkit.runs.episode_seed` of ``seed``, masks from
    ``info["action_mask"]``, both flags at a time limit), so a finding is
    reproduced by ``tdkit.train(make_agent(env, seed), env, episodes=...,
    seed=seed, max_episode_steps=...)``. An episode longer than ``max_steps``
    is an :class:`AgentFault` (the probe environments end every episode well
    before), unless ``cut_after`` is given: then every episode stops after
    ``cut_after`` steps at most, as ``tdkit.train(..., episodes=1,
    steps=cut_after)`` stops it (the driver settles it with the agent's
    ``end_episode()``).
    """
    watch = watcher or Watcher()
    root = root_sequence(seed, owner="run_episodes")
    budget = max_steps if cut_after is None else cut_after
    trace = RunTrace()
    read_mask = MaskReader()  # as train reads masks: once per distinct mask and run
    for episode in range(episodes):
        result = run_episode(
            agent, env, env_seed=episode_seed(root, episode), checked=True,
            hooks=_Tap(watch, trace, episode), max_episode_steps=max_episode_steps,
            step_budget=budget, episode_index=episode, read_mask=read_mask,
        )
        if result.end == "unfinished" and cut_after is None:
            raise AgentFault(
                f"episode did not end within {max_steps} steps of a probe environment that ends "
                "every episode sooner",
                where(episode, max_steps),
            )
        trace.steps += result.length
        trace.returns.append(result.total_reward)
        watch.after_episode(episode, result.length)
    return trace


def fmt(x: Any) -> str:
    """Short text of a number or an array of numbers."""
    if isinstance(x, np.ndarray):
        return "[" + ", ".join(fmt(v) for v in x.tolist()) + "]"
    if isinstance(x, float):
        if math.isnan(x) or math.isinf(x):
            return repr(x)
        return f"{x:.4g}"
    return repr(x)

"""The one episode driver: every episode tdkit runs goes through :func:`run_episode`.

Training (:func:`tdkit.train`), greedy evaluation (:func:`tdkit.evaluate`),
every verifier check and every comparison or sweep run drive episodes here,
so what the verifier checks is exactly what ``train`` does:

* the environment is reset with the episode's own seed;
* action masks are read from ``info["action_mask"]`` (booleans, or integers
  where nonzero means allowed, as gymnasium's Taxi gives them) and passed as
  ``mask`` to ``act`` and ``next_mask`` to ``observe``;
* rewards must be finite real numbers (a NaN or infinite reward raises
  before the agent sees it);
* a time limit (``max_episode_steps``) sets ``truncated=True`` on the step
  that reaches it, *keeping* ``terminated``: an episode that terminates
  exactly at the limit hands the agent both flags, and ``terminated`` wins;
* an episode that stops without either flag (a step budget, a callback, an
  exception from the environment or the agent) is settled in a ``finally``
  block by the agent's ``end_episode()`` when it has one: a time-limit
  truncation at the last observed transition, so nothing of the episode
  reaches the next.
"""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Callable
from typing import Any, NamedTuple

import numpy as np

from .._errors import EnvironmentProtocolError
from .._greedy import immutable_mask
from .faults import AgentFault, checked_calls

__all__ = [
    "EndlessEpisodeWarning", "EpisodeHooks", "EpisodeResult", "MaskReader", "bad_reward",
    "info_mask", "run_episode",
]

_INF = math.inf


class EndlessEpisodeWarning(UserWarning):
    """An episode under an ``episodes=`` budget has run for a very long time."""


class EpisodeResult(NamedTuple):
    """What one episode gave.

    Attributes
    ----------
    total_reward : float
        Undiscounted sum of the rewards.
    length : int
        Environment steps taken.
    end : str
        ``"terminated"``, ``"truncated"`` (by the environment or the time
        limit) or ``"unfinished"`` (cut by the step budget or an error).
    td_count : int
        TD errors the agent reported.
    td_abs_sum, td_abs_max : float
        Sum and maximum of their absolute values.
    seconds : float
        Wall-clock time of the episode.
    """

    total_reward: float
    length: int
    end: str
    td_count: int
    td_abs_sum: float
    td_abs_max: float
    seconds: float


class EpisodeHooks:
    """Optional per-step observers of :func:`run_episode` (the verifier's probes).

    Every method is a no-op here; override the ones you need. A hook may raise
    :class:`~tdkit.runs.AgentFault` to stop the run with a finding.
    """

    def after_act(self, step: int, obs: Any, action: Any) -> None:
        """Called after ``act`` returned ``action`` for ``obs``."""

    def before_observe(self, step: int, transition: tuple) -> None:
        """Called before ``observe``; ``transition`` is
        ``(obs, action, reward, next_obs, terminated, truncated, next_mask)``."""

    def after_update(self, step: int, transition: tuple, errors: tuple[float, ...]) -> None:
        """Called after ``update()`` returned ``errors``."""


def info_mask(info: dict[str, Any] | None) -> np.ndarray | None:
    """The action mask in ``info`` as a boolean array (None when absent).

    Examples
    --------
    >>> info_mask({"action_mask": np.array([1, 0, 1], dtype=np.int8)}).tolist()
    [True, False, True]
    >>> info_mask({}) is None
    True
    """
    if not info:
        return None
    mask = info.get("action_mask")
    if mask is None or (type(mask) is np.ndarray and mask.dtype == np.bool_):
        return mask
    arr = np.asarray(mask)
    if arr.dtype.kind in "iu":  # gymnasium's int8 masks: nonzero means allowed
        return arr != 0
    return arr  # let the agent's own check report anything stranger


_BOOL = np.dtype(np.bool_)


class MaskReader:
    """:func:`info_mask` for a run: each distinct integer mask is converted once.

    gymnasium's Taxi hands a new int8 ``action_mask`` every step;
    :func:`info_mask` turns it into a new boolean array (about 2 µs). A
    reader keeps the boolean form of each 1-D integer mask it has seen, keyed
    by its dtype and bytes, and hands that same array out again (one
    ``tobytes`` and one look-up). The array is immutable (numpy cannot make
    it writeable again, see :func:`tdkit._greedy.immutable_mask`), so a tdkit
    learner recognises it by identity alone. Boolean numpy masks pass through as
    they are, and anything else goes to :func:`info_mask`, so the values are
    always those of :func:`info_mask`. At most ``limit`` masks are kept.

    Examples
    --------
    >>> read = MaskReader()
    >>> first = read({"action_mask": np.array([1, 0, 1], dtype=np.int8)})
    >>> first.tolist(), first.flags.writeable
    ([True, False, True], False)
    >>> read({"action_mask": np.array([1, 0, 1], dtype=np.int8)}) is first
    True
    """

    __slots__ = ("_by_bytes", "limit")

    def __init__(self, limit: int = 4096) -> None:
        self.limit = limit
        self._by_bytes: dict[bytes, tuple[np.dtype, np.ndarray]] = {}

    def __call__(self, info: Any) -> np.ndarray | None:
        """The mask of ``info`` as :func:`info_mask` gives it (None without one)."""
        if not info:
            return None
        mask = info.get("action_mask")
        if type(mask) is not np.ndarray:
            return info_mask(info)
        dtype = mask.dtype
        if dtype is _BOOL or mask.ndim != 1:
            return info_mask(info)
        key = mask.tobytes()
        hit = self._by_bytes.get(key)
        if hit is not None and hit[0] is dtype:
            return hit[1]
        converted = info_mask(info)
        if type(converted) is np.ndarray and converted.dtype is _BOOL:
            converted = immutable_mask(converted)  # a learner may know it by identity
            if len(self._by_bytes) >= self.limit:
                self._by_bytes.clear()
            self._by_bytes[key] = (dtype, converted)
        return converted


def bad_reward(reward: Any, step: int) -> EnvironmentProtocolError:
    """The error for a reward that is not a finite number (the driver and vector training)."""
    return EnvironmentProtocolError(
        f"the environment returned the reward {reward!r} at step {step} of the episode; "
        "rewards must be finite real numbers. Fix the simulator (or clip its rewards)."
    )


def run_episode(
    agent: Any,
    env: Any,
    *,
    env_seed: int | None,
    learn: bool = True,
    max_episode_steps: int | None = None,
    step_budget: int | None = None,
    use_action_masks: bool = True,
    hooks: EpisodeHooks | None = None,
    checked: bool = False,
    warn_after: int | None = None,
    episode_index: int = 0,
    read_mask: MaskReader | None = None,
) -> EpisodeResult:
    """Run one episode of ``agent`` on the adapted environment ``env``.

    Each step is ``act -> env.step -> observe -> update`` when ``learn`` is
    True, and ``act(explore=False) -> env.step`` otherwise.

    Parameters
    ----------
    agent : Agent
        Any object with ``act`` (and ``observe``, ``update`` to learn).
    env : gymnasium.Env
        An environment already passed through :func:`tdkit.envs.adapt`.
    env_seed : int or None
        Seed of ``env.reset``.
    learn : bool, default True
        Learn (explore, observe, update) or act greedily without learning.
    max_episode_steps : int, optional
        Time limit: the step that reaches it is handed over with
        ``truncated=True`` (and ``terminated`` as the environment said).
    step_budget : int, optional
        Stop after this many steps even without an episode end; the episode is
        then ``"unfinished"`` and settled with the agent's ``end_episode()``.
    use_action_masks : bool, default True
        Read ``info["action_mask"]``.
    hooks : EpisodeHooks, optional
        Per-step observers.
    checked : bool, default False
        Check every answer of the agent (:func:`~tdkit.runs.faults.checked_calls`)
        and report misbehaviour as :class:`~tdkit.runs.AgentFault` naming the step.
    warn_after : int, optional
        Warn (:class:`EndlessEpisodeWarning`) when the episode reaches this
        many steps without ending.
    episode_index : int
        Named in warnings and faults.
    read_mask : MaskReader, optional
        Reads the masks (a run passes one reader to all its episodes, so each
        distinct mask is converted once per run); a new one by default.

    Returns
    -------
    EpisodeResult

    Raises
    ------
    EnvironmentProtocolError
        If the environment returns a reward that is not a finite number.
    AgentFault
        In checked mode, if the agent breaks the protocol.
    """
    started = time.perf_counter()
    if checked:
        act, observe, update = checked_calls(agent, getattr(env, "action_space", None))
    else:
        act = agent.act
        observe = agent.observe if learn else None
        update = agent.update if learn else None
    step_env = env.step
    if read_mask is None:
        read_mask = MaskReader()
    read = read_mask.__call__  # a bound method is called faster than an instance
    limit = max_episode_steps if max_episode_steps is not None else -1
    budget = step_budget if step_budget is not None else -1
    warn_at = warn_after if warn_after is not None else -1
    total = 0.0
    length = 0
    td_n = 0
    td_sum = 0.0
    td_max = 0.0
    end = "unfinished"
    settled = not learn  # a greedy run has nothing to settle
    try:
        obs, info = env.reset(seed=env_seed)
        mask = read(info) if use_action_masks else None
        while True:
            action = act(obs, mask=mask, explore=learn)
            if hooks is not None:
                hooks.after_act(length, obs, action)
            next_obs, reward, terminated, truncated, info = step_env(action)
            length += 1
            if not -_INF < reward < _INF:
                raise bad_reward(reward, length)
            if length == limit:
                truncated = True
            next_mask = read(info) if use_action_masks else None
            if learn:
                if hooks is not None:
                    hooks.before_observe(
                        length - 1,
                        (obs, action, reward, next_obs, terminated, truncated, next_mask),
                    )
                observe(obs, action, reward, next_obs, terminated, truncated, next_mask=next_mask)
                errors = update()
                for err in errors:
                    err = abs(err)
                    td_sum += err
                    if err > td_max:
                        td_max = err
                    td_n += 1
                if hooks is not None:
                    hooks.after_update(
                        length - 1,
                        (obs, action, reward, next_obs, terminated, truncated, next_mask),
                        errors,
                    )
            total += reward
            if terminated or truncated:
                end = "terminated" if terminated else "truncated"
                settled = True
                break
            if length == budget:
                break
            if length == warn_at:
                _warn_endless(episode_index, length)
            obs, mask = next_obs, next_mask
    except AgentFault as fault:
        if fault.where is None:
            fault.where = f"episode {episode_index}, step {length}"
        raise
    finally:
        if not settled:
            _settle(agent, checked, episode_index, length)
    return EpisodeResult(
        float(total), length, end, td_n, td_sum, td_max, time.perf_counter() - started
    )


def _settle(agent: Any, checked: bool, episode_index: int, length: int) -> None:
    """Call ``agent.end_episode()`` (if the agent has one) for an episode cut short."""
    end_episode: Callable[[], Any] | None = getattr(agent, "end_episode", None)
    if end_episode is None:
        return
    try:
        end_episode()
    except Exception as exc:
        if checked:
            raise AgentFault(
                f"end_episode() raised {type(exc).__name__}: {exc}",
                f"episode {episode_index}, step {length}",
            ) from exc
        raise


def _warn_endless(episode_index: int, length: int) -> None:
    warnings.warn(
        f"episode {episode_index} has run for {length} steps without terminated or "
        "truncated; the environment may never end an episode. Pass max_episode_steps=... "
        "to cut episodes with a time limit, or steps=... to budget the run in steps.",
        EndlessEpisodeWarning,
        stacklevel=4,
    )

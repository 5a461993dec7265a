"""Training and evaluation loops for any agent on any reset/step environment.

The loop is the textbook one (reset, act, step, observe, update) plus what
goes wrong around it in practice: a time limit that truncates without
terminating, action masks read from ``info["action_mask"]``, per-episode
environment seeds derived from one :class:`numpy.random.SeedSequence`, and
bounded-memory statistics.
"""

from __future__ import annotations

import logging
import os
import time
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any

import gymnasium
import numpy as np

from .._errors import InvalidParameterError
from .._progress import progress_bar
from .._validation import require_positive_int
from ..envs import adapt
from .episode import MaskReader, run_episode
from .fit import require_agent_fits
from .history import History
from .seeds import episode_seed, root_sequence
from .vector import train_vector

__all__ = ["episode_seed", "evaluate", "train"]

_log = logging.getLogger("tdkit")

#: Steps after which an episode run under an ``episodes=`` budget (no time
#: limit) triggers one :class:`~tdkit.runs.EndlessEpisodeWarning`.
_ENDLESS_STEPS = 1_000_000

#: A callback receives the History so far and the agent after each episode;
#: returning True stops training.
Callback = Callable[[History, Any], Any]




def train(
    agent: Any,
    env: Any,
    *,
    episodes: int | None = None,
    steps: int | None = None,
    seed: int | np.random.SeedSequence | None = None,
    max_episode_steps: int | None = None,
    progress: bool = False,
    callbacks: Iterable[Callback] = (),
    checkpoint: Any = None,
    resume: Any = None,
    use_action_masks: bool = True,
    checkpoint_every: int = 100,
) -> History | list[History]:
    """Train ``agent`` on ``env`` and return the per-episode :class:`History`.

    Each step runs ``act -> env.step -> observe -> update``. The action mask
    for ``act`` and ``next_mask`` for ``observe`` come from
    ``info["action_mask"]`` when the environment provides one.

    Parameters
    ----------
    agent : Agent or list of Agent
        Any object with ``act``, ``observe`` and ``update``; a list with one
        agent per sub-environment when ``env`` is a vector environment.
    env : environment
        Anything :func:`tdkit.envs.adapt` accepts (gymnasium env or id,
        legacy gym-style, dm_env-style, or a plain reset/step object), or a
        ``gymnasium.vector.VectorEnv`` (both autoreset modes, next step and
        same step; see :mod:`tdkit.runs.vector`): agent ``k`` then trains on
        sub-environment ``k`` exactly as ``train(agents[k], env,
        seed=tdkit.runs.agent_roots(seed, K)[k])`` would, and ``episodes`` and
        ``steps`` are budgets per agent.
    episodes, steps : int, optional
        Stop after this many episodes or environment steps, whichever comes
        first; at least one is required. An episode cut by ``steps`` is
        recorded with end ``"unfinished"``.
    seed : int or SeedSequence, optional
        Root of the per-episode environment seeds (see :func:`episode_seed`).
        With the agent's own seed fixed, the whole run is reproducible.
    max_episode_steps : int, optional
        Truncate episodes after this many steps (``truncated=True``, so the
        learner bootstraps): for continuing simulators without a time limit.
    progress : bool
        Show a tqdm progress bar (``progress`` extra).
    callbacks : iterable of callables
        ``callback(history, agent)`` after each episode; a truthy return stops
        training.
    checkpoint : path-like, optional
        Write a checkpoint (learner state, loop position, History) to this
        ``.npz`` file every ``checkpoint_every`` episodes and at the end, always
        at an episode boundary (an episode cut by ``steps`` is not saved).
    resume : path-like, optional
        Continue the run saved in this checkpoint: the agent (built with the
        same hyper-parameters) gets the saved state, and training continues
        with the same per-episode seeds, so the result equals that of the
        uninterrupted run. ``episodes`` and ``steps`` count the whole run.
    use_action_masks : bool, default True
        Pass ``info["action_mask"]`` to the agent. Set False to ignore masks
        an environment offers only as a hint (gymnasium's Taxi marks moves
        into walls, which are legal but useless).
    checkpoint_every : int, default 100
        Episodes between checkpoints.

    Returns
    -------
    History
        Or, for a ``gymnasium.vector.VectorEnv``, a list with one History per
        sub-environment.

    Raises
    ------
    ValueError
        If neither ``episodes`` nor ``steps`` is given, or a count is not a
        positive integer.
    """
    if episodes is None and steps is None:
        raise InvalidParameterError(
            "train: give episodes=... or steps=... (or both); got neither."
        )
    if episodes is not None:
        episodes = require_positive_int("train", "episodes", episodes)
    if steps is not None:
        steps = require_positive_int("train", "steps", steps)
    if max_episode_steps is not None:
        max_episode_steps = require_positive_int("train", "max_episode_steps", max_episode_steps)
    checkpoint_every = require_positive_int("train", "checkpoint_every", checkpoint_every)
    if isinstance(env, gymnasium.vector.VectorEnv):
        extras = {"checkpoint": checkpoint, "resume": resume, "callbacks": tuple(callbacks),
                  "progress": progress}
        given = [k for k, v in extras.items() if v not in (None, (), False)]
        if given:
            raise InvalidParameterError(
                f"train: {', '.join(given)} cannot be used with a vector environment; train "
                "each agent on its own environment for those features."
            )
        agents = [agent] if not isinstance(agent, (list, tuple)) else agent
        return train_vector(
            agents, env, episodes=episodes, steps=steps, seed=seed,
            max_episode_steps=max_episode_steps, use_action_masks=use_action_masks,
        )
    env = adapt(env)
    require_agent_fits(agent, env, owner="train")
    if checkpoint is not None:
        _require_checkpoint_folder(checkpoint)
    root = root_sequence(seed, owner="train")
    callbacks = tuple(callbacks)
    history = History()
    total = 0
    episode = 0
    if resume is not None:
        root, episode, total, history = _resume(resume, agent, root, seed)
    by_steps = steps is not None
    bar = progress_bar("train", steps if by_steps else episodes, progress,
                       unit="step" if by_steps else "episode")
    warn_after = _ENDLESS_STEPS if (not by_steps and max_episode_steps is None) else None
    end = "terminated"  # how the last episode ended
    read_mask = MaskReader()  # each distinct mask converted once per run
    started = time.perf_counter()
    try:
        while (episodes is None or episode < episodes) and (steps is None or total < steps):
            result = run_episode(
                agent, env, env_seed=episode_seed(root, episode),
                max_episode_steps=max_episode_steps,
                step_budget=None if steps is None else steps - total,
                use_action_masks=use_action_masks, warn_after=warn_after,
                episode_index=episode, read_mask=read_mask,
            )
            if warn_after is not None and result.length >= warn_after:
                warn_after = None  # warn once per run
            end = result.end
            total += result.length
            history.add_episode(
                ret=result.total_reward, length=result.length, end=end,
                td_count=result.td_count, td_abs_sum=result.td_abs_sum,
                td_abs_max=result.td_abs_max, seconds=result.seconds,
            )
            if _log.isEnabledFor(logging.DEBUG):
                _log.debug(
                    "episode %d: return %.6g, %d steps, %s, %.3g s", episode,
                    result.total_reward, result.length, end, result.seconds,
                )
            episode += 1
            if bar is not None:
                bar.update(result.length if by_steps else 1)
            # Checkpoints are taken at episode boundaries only: a resumed run then
            # starts a fresh episode exactly where the uninterrupted run would.
            if checkpoint is not None and end != "unfinished" and episode % checkpoint_every == 0:
                _checkpoint(checkpoint, agent, root, episode, total, history)
            if any([bool(cb(history, agent)) for cb in callbacks]):
                break
    except BaseException as exc:
        _attach_history(exc, history)
        raise
    finally:
        if bar is not None:
            bar.close()
    if checkpoint is not None and end != "unfinished" and episode % checkpoint_every != 0:
        _checkpoint(checkpoint, agent, root, episode, total, history)
    _log.info(
        "trained %s for %d episodes (%d steps) in %.3g s; mean return of the last %d: %.6g",
        type(agent).__name__, len(history), total, time.perf_counter() - started,
        min(len(history), 100), _recent_mean(history),
    )
    return history


def _recent_mean(history: History, window: int = 100) -> float:
    returns = history.returns
    return float(np.mean(returns[-window:])) if len(returns) else float("nan")


def _attach_history(exc: BaseException, history: History) -> None:
    """Give an exception escaping ``train`` the History of the episodes that finished."""
    try:
        exc.history = history  # type: ignore[attr-defined]
    except (AttributeError, TypeError):  # pragma: no cover - exceptions with __slots__
        return
    if hasattr(exc, "add_note"):
        exc.add_note(
            f"tdkit.train: {len(history)} episodes had finished; their History is attached "
            "to this exception as .history"
        )


def _require_checkpoint_folder(path: Any) -> None:
    folder = Path(path).expanduser().resolve().parent
    if not folder.is_dir():
        raise InvalidParameterError(
            f"train: checkpoint={str(path)!r} is in the folder {str(folder)!r}, which does not "
            "exist; create it first or choose another path."
        )
    if not os.access(folder, os.W_OK):
        raise InvalidParameterError(
            f"train: checkpoint={str(path)!r} is in the folder {str(folder)!r}, which is not "
            "writable; choose another path."
        )


def _checkpoint(
    path: Any, agent: Any, root: np.random.SeedSequence, episode: int, total: int,
    history: History,
) -> None:
    from .store import save_checkpoint

    loop_state = {
        "episode": episode,
        "total_steps": total,
        "root_entropy": str(root.entropy),
        "root_spawn_key": list(root.spawn_key),
    }
    save_checkpoint(path, agent, loop_state, history)


def _resume(
    path: Any, agent: Any, root: np.random.SeedSequence, seed: Any
) -> tuple[np.random.SeedSequence, int, int, History]:
    from .store import load_checkpoint

    loop_state, history = load_checkpoint(path, agent)
    saved_root = np.random.SeedSequence(
        int(loop_state["root_entropy"]), spawn_key=tuple(loop_state["root_spawn_key"])
    )
    if seed is not None and (saved_root.entropy, saved_root.spawn_key) != (
        root.entropy, root.spawn_key
    ):
        raise InvalidParameterError(
            f"train: resume={str(path)!r} was written by a run with another seed than "
            f"seed={seed!r}; pass the original seed or seed=None to continue it."
        )
    return (
        saved_root, int(loop_state["episode"]), int(loop_state["total_steps"]), history,
    )


def evaluate(
    agent: Any,
    env: Any,
    *,
    episodes: int = 100,
    seed: int | np.random.SeedSequence | None = None,
    max_episode_steps: int | None = None,
    use_action_masks: bool = True,
) -> np.ndarray:
    """Returns of ``episodes`` greedy episodes (``explore=False``, no learning).

    Parameters
    ----------
    agent : Agent
    env : environment
        Anything :func:`tdkit.envs.adapt` accepts.
    episodes : int, default 100
    seed : int or SeedSequence, optional
        Root of the per-episode environment seeds.
    max_episode_steps : int, optional
        Cut episodes after this many steps (a greedy policy can loop forever
        in an environment without a time limit).
    use_action_masks : bool, default True
        As for :func:`train`.

    Returns
    -------
    numpy.ndarray
        Shape ``(episodes,)``, the undiscounted return of each episode.
    """
    episodes = require_positive_int("evaluate", "episodes", episodes)
    if max_episode_steps is not None:
        max_episode_steps = require_positive_int("evaluate", "max_episode_steps", max_episode_steps)
    env = adapt(env)
    require_agent_fits(agent, env, owner="evaluate")
    root = root_sequence(seed, owner="evaluate")
    returns = np.empty(episodes)
    warn_after = _ENDLESS_STEPS if max_episode_steps is None else None
    read_mask = MaskReader()
    for episode in range(episodes):
        result = run_episode(
            agent, env, env_seed=episode_seed(root, episode), learn=False,
            max_episode_steps=max_episode_steps, use_action_masks=use_action_masks,
            warn_after=warn_after, episode_index=episode, read_mask=read_mask,
        )
        if warn_after is not None and result.length >= warn_after:
            warn_after = None
        returns[episode] = result.total_reward
    return returns

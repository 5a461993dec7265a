"""Training and evaluation loops for any agent on any reset/step environment.

The loop is the textbook one (reset, act, step, observe, update) plus what
goes wrong around it in practice: a time limit that truncates without
terminating, action masks read from ``info["action_mask"]``, per-episode
environment seeds derived from one :class:`numpy.random.SeedSequence`, and
bounded-memory statistics.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from typing import Any

import numpy as np

from ._errors import InvalidParameterError
from ._validation import check_positive_int
from .envs import adapt
from .history import History

__all__ = ["episode_seed", "evaluate", "train"]

#: A callback receives the History so far and the agent after each episode;
#: returning True stops training.
Callback = Callable[[History, Any], Any]


def episode_seed(root: np.random.SeedSequence, episode: int) -> int:
    """The environment seed of episode ``episode`` of a run seeded by ``root``.

    A pure function of the root entropy and the episode index, so a resumed run
    draws the same seeds as an uninterrupted one.
    """
    child = np.random.SeedSequence(root.entropy, spawn_key=(*root.spawn_key, episode))
    return int(child.generate_state(1, dtype=np.uint32)[0])


def _info_mask(info: dict[str, Any] | None) -> np.ndarray | None:
    """The action mask in ``info`` as a boolean array (None when absent)."""
    if not info:
        return None
    mask = info.get("action_mask")
    if mask is None or (type(mask) is np.ndarray and mask.dtype == np.bool_):
        return mask
    arr = np.asarray(mask)
    if arr.dtype.kind in "iu":  # gymnasium's int8 masks: nonzero means allowed
        return arr != 0
    return arr  # let the agent's own check report anything stranger


def _root(seed: int | np.random.SeedSequence | None) -> np.random.SeedSequence:
    if isinstance(seed, np.random.SeedSequence):
        return seed
    if seed is not None and (isinstance(seed, bool) or not isinstance(seed, (int, np.integer))):
        raise InvalidParameterError(
            f"train/evaluate: seed must be an int, a SeedSequence or None; got {seed!r}."
        )
    return np.random.SeedSequence(seed)


def _progress_bar(total: int | None, enabled: bool) -> Any:
    if not enabled:
        return None
    try:
        from tqdm.auto import tqdm
    except ImportError as exc:  # pragma: no cover - depends on the environment
        raise ImportError("progress=True needs tqdm: pip install 'tdkit[progress]'") from exc
    return tqdm(total=total, unit="episode")


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
) -> History:
    """Train ``agent`` on ``env`` and return the per-episode :class:`History`.

    Each step runs ``act -> env.step -> observe -> update``. The action mask
    for ``act`` and ``next_mask`` for ``observe`` come from
    ``info["action_mask"]`` when the environment provides one.

    Parameters
    ----------
    agent : Agent
        Any object with ``act``, ``observe`` and ``update``.
    env : environment
        Anything :func:`tdkit.envs.adapt` accepts (gymnasium env or id,
        legacy gym-style, dm_env-style, or a plain reset/step object).
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
        episodes = check_positive_int("train", "episodes", episodes)
    if steps is not None:
        steps = check_positive_int("train", "steps", steps)
    if max_episode_steps is not None:
        max_episode_steps = check_positive_int("train", "max_episode_steps", max_episode_steps)
    checkpoint_every = check_positive_int("train", "checkpoint_every", checkpoint_every)
    env = adapt(env)
    root = _root(seed)
    callbacks = tuple(callbacks)
    history = History()
    total = 0
    episode = 0
    if resume is not None:
        root, episode, total, history = _resume(resume, agent, root, seed)
    bar = _progress_bar(episodes, progress)
    end = "terminated"  # how the last episode ended
    act, observe, update, step_env = agent.act, agent.observe, agent.update, env.step
    try:
        while (episodes is None or episode < episodes) and (steps is None or total < steps):
            obs, info = env.reset(seed=episode_seed(root, episode))
            mask = _info_mask(info) if use_action_masks else None
            ret = 0.0
            length = 0
            td_n = 0
            td_sum = 0.0
            td_max = 0.0
            end = "unfinished"
            while True:
                action = act(obs, mask=mask)
                next_obs, reward, terminated, truncated, info = step_env(action)
                length += 1
                if max_episode_steps is not None and length >= max_episode_steps:
                    truncated = True
                next_mask = _info_mask(info) if use_action_masks else None
                observe(obs, action, reward, next_obs, terminated, truncated, next_mask=next_mask)
                for err in update():
                    err = abs(err)
                    td_sum += err
                    if err > td_max:
                        td_max = err
                    td_n += 1
                ret += reward
                if terminated or truncated:
                    end = "terminated" if terminated else "truncated"
                    break
                if steps is not None and total + length >= steps:
                    break
                obs, mask = next_obs, next_mask
            total += length
            history.add_episode(
                ret=float(ret), length=length, end=end, td_count=td_n, td_abs_sum=td_sum,
                td_abs_max=td_max,
            )
            episode += 1
            if bar is not None:
                bar.update(1)
            # Checkpoints are taken at episode boundaries only: a resumed run then
            # starts a fresh episode exactly where the uninterrupted run would.
            if checkpoint is not None and end != "unfinished" and episode % checkpoint_every == 0:
                _checkpoint(checkpoint, agent, root, episode, total, history)
            if any([bool(cb(history, agent)) for cb in callbacks]):
                break
    finally:
        if bar is not None:
            bar.close()
    if checkpoint is not None and end != "unfinished" and episode % checkpoint_every != 0:
        _checkpoint(checkpoint, agent, root, episode, total, history)
    return history


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
    episodes = check_positive_int("evaluate", "episodes", episodes)
    if max_episode_steps is not None:
        max_episode_steps = check_positive_int("evaluate", "max_episode_steps", max_episode_steps)
    env = adapt(env)
    root = _root(seed)
    returns = np.empty(episodes)
    for episode in range(episodes):
        obs, info = env.reset(seed=episode_seed(root, episode))
        mask = _info_mask(info) if use_action_masks else None
        ret = 0.0
        length = 0
        while True:
            obs, reward, terminated, truncated, info = env.step(
                agent.act(obs, mask=mask, explore=False)
            )
            ret += reward
            length += 1
            if terminated or truncated:
                break
            if max_episode_steps is not None and length >= max_episode_steps:
                break
            mask = _info_mask(info) if use_action_masks else None
        returns[episode] = ret
    return returns

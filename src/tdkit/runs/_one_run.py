r"""Independent training runs: the pieces shared by :mod:`tdkit.sweep` and
:func:`tdkit.verify.compare_performance`.

A *run* builds a fresh environment and agent, trains the agent and,
optionally, scores it with greedy episodes. Runs share nothing, so they can go
to any :class:`concurrent.futures.Executor`; :func:`train_run` is module level
so process pools can pickle it (the factories it receives must pickle too).

Seeds take one path (:func:`run_seeds`): a run is named by its seed and its
*stream* (the index of its setting in a sweep; 0 for agent A and 1 for agent
B in a comparison), so the same factory, seed and stream give the same run in
a sweep and in a comparison.

References
----------
.. [1] O'Neill, M. E. and the numpy developers: ``numpy.random.SeedSequence``
   (independent streams from an entropy value and a spawn key), numpy
   documentation, "Parallel random number generation".
"""

from __future__ import annotations

import numbers
from collections.abc import Callable, Iterable, Mapping
from multiprocessing.reduction import ForkingPickler
from typing import Any, NamedTuple

import numpy as np

from .._errors import InvalidParameterError
from .history import History
from .training import evaluate, train

__all__ = [
    "RunSeeds",
    "run_seeds",
    "train_run",
    "seeded_run",
    "require_callable",
    "require_executor",
    "require_picklable",
    "require_seeds",
]


class RunSeeds(NamedTuple):
    """The seeds of one run: the agent's seed and the roots of its episode seeds."""

    agent: int
    train: np.random.SeedSequence
    evaluate: np.random.SeedSequence


def run_seeds(seed: int, stream: int = 0) -> RunSeeds:
    """The seeds of the run (``seed``, ``stream``): the one seed path of every run.

    The run's root is ``SeedSequence(seed, spawn_key=(stream,))``; its three
    children give the agent seed (an int) and the roots of the training and
    evaluation episode seeds. Every run is reproducible on its own, and runs
    of different streams with one seed draw independent streams.

    Examples
    --------
    >>> seeds = run_seeds(3, 0)
    >>> seeds.agent == run_seeds(3).agent != run_seeds(3, 1).agent
    True
    """
    root = np.random.SeedSequence(seed, spawn_key=(stream,))
    agent_child, train_root, eval_root = root.spawn(3)
    return RunSeeds(int(agent_child.generate_state(1, dtype=np.uint32)[0]), train_root,
                    eval_root)


def seeded_run(
    make_agent: Callable[..., Any],
    make_env: Callable[[], Any],
    seed: int,
    stream: int,
    episodes: int | None,
    steps: int | None,
    max_episode_steps: int | None,
    eval_episodes: int,
    setting: Mapping[str, Any] | None = None,
) -> tuple[int, History, np.ndarray | None]:
    """:func:`train_run` with the seeds of :func:`run_seeds` ``(seed, stream)``.

    Returns ``(agent_seed, history, eval_returns)``. Module level, so process
    pools can pickle it.
    """
    seeds = run_seeds(seed, stream)
    history, eval_returns = train_run(
        make_agent, make_env, seeds.agent, seeds.train, seeds.evaluate, episodes, steps,
        max_episode_steps, eval_episodes, setting,
    )
    return seeds.agent, history, eval_returns


def train_run(
    make_agent: Callable[..., Any],
    make_env: Callable[[], Any],
    agent_seed: int,
    train_seed: np.random.SeedSequence,
    eval_seed: np.random.SeedSequence,
    episodes: int | None,
    steps: int | None,
    max_episode_steps: int | None,
    eval_episodes: int,
    setting: Mapping[str, Any] | None = None,
) -> tuple[History, np.ndarray | None]:
    """Train ``make_agent(env, agent_seed, **setting)`` on ``make_env()``; evaluate greedily.

    Training uses the per-episode environment seeds of ``train_seed`` and
    evaluation those of ``eval_seed`` (see :func:`tdkit.loop.episode_seed`);
    ``max_episode_steps`` limits both.

    Returns
    -------
    (History, numpy.ndarray or None)
        The training history and the returns of ``eval_episodes`` greedy
        episodes (None when ``eval_episodes`` is 0).
    """
    env = make_env()
    agent = make_agent(env, agent_seed, **(setting or {}))
    history = train(agent, env, episodes=episodes, steps=steps, seed=train_seed,
                    max_episode_steps=max_episode_steps)
    if not eval_episodes:
        return history, None
    returns = evaluate(agent, env, episodes=eval_episodes, seed=eval_seed,
                       max_episode_steps=max_episode_steps)
    return history, returns


def require_callable(owner: str, name: str, value: Any) -> None:
    """Raise naming ``owner`` and ``name`` unless ``value`` is callable."""
    if not callable(value):
        raise InvalidParameterError(f"{owner}: {name} must be callable; got {value!r:.80}.")


def require_seeds(
    owner: str, seeds: Iterable[Any], *, minimum: int = 1, distinct: bool = True
) -> tuple[int, ...]:
    """Return ``seeds`` as a tuple of non-negative ints (at least ``minimum``; distinct)."""
    try:
        seed_list = tuple(seeds)
    except TypeError:
        raise InvalidParameterError(
            f"{owner}: seeds must be an iterable of non-negative ints such as range(10); "
            f"got {seeds!r:.80}."
        ) from None
    if len(seed_list) < minimum or any(
        isinstance(s, bool) or not isinstance(s, numbers.Integral) or s < 0 for s in seed_list
    ):
        raise InvalidParameterError(
            f"{owner}: seeds must hold at least {minimum} non-negative int"
            f"{'s' if minimum > 1 else ''}; got {seed_list!r:.80}."
        )
    result = tuple(int(s) for s in seed_list)
    if distinct and len(set(result)) != len(result):
        repeated = sorted({s for s in result if result.count(s) > 1})
        raise InvalidParameterError(
            f"{owner}: seeds must be distinct (a repeated seed repeats a run exactly); "
            f"got {repeated!r} more than once."
        )
    return result


def require_executor(owner: str, executor: Any, method: str = "map") -> None:
    """Raise unless ``executor`` has a callable ``method`` (``map`` or ``submit``)."""
    if not callable(getattr(executor, method, None)):
        raise InvalidParameterError(
            f"{owner}: executor must be a concurrent.futures.Executor (or have {method}); "
            f"got {executor!r:.80}."
        )


def require_picklable(owner: str, name: str, value: Any, fix: str) -> None:
    """Raise naming ``name`` if ``value`` cannot be sent to a worker process."""
    try:
        ForkingPickler.dumps(value)  # exactly what a process pool does to send it
    except Exception as exc:  # pickling raises several types (PicklingError, AttributeError)
        raise InvalidParameterError(
            f"{owner}: {name}={value!r:.80} cannot be sent to worker processes "
            f"({type(exc).__name__}: {exc}). {fix}"
        ) from None

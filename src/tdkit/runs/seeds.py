"""The one path from a run's ``seed`` to the seed of each episode's environment.

A run is seeded by one :class:`numpy.random.SeedSequence` (its *root*); episode
``k`` resets the environment with :func:`episode_seed` of the root and ``k``,
so a resumed run, a verifier check and a sweep all draw the same environment
seeds as the uninterrupted ``train`` call with the same seed.
"""

from __future__ import annotations

import numbers
from typing import Any

import numpy as np

from .._errors import InvalidParameterError
from .._seeding import spawned_seed

__all__ = ["RunSeed", "episode_seed", "root_sequence"]

RunSeed = int | np.random.SeedSequence | np.random.Generator | None


def root_sequence(seed: Any, *, owner: str = "train") -> np.random.SeedSequence:
    """The root :class:`~numpy.random.SeedSequence` of a run seeded by ``seed``.

    Parameters
    ----------
    seed : int, SeedSequence, Generator or None
        A non-negative int or a SeedSequence reproduces the run; a Generator
        gives a root drawn from it (reproducible when the Generator is);
        ``None`` draws fresh OS entropy.
    owner : str
        Named in error messages.

    Raises
    ------
    InvalidParameterError
        If ``seed`` is negative or of another type.

    Examples
    --------
    >>> root_sequence(3).entropy
    3
    >>> root_sequence(np.random.SeedSequence(5)).entropy
    5
    """
    if seed is None:
        return np.random.SeedSequence()
    if isinstance(seed, np.random.SeedSequence):
        return seed
    if isinstance(seed, np.random.Generator):
        return np.random.SeedSequence(int(seed.integers(0, 2**63 - 1)))
    if isinstance(seed, numbers.Integral) and not isinstance(seed, bool):
        if int(seed) < 0:
            raise InvalidParameterError(
                f"{owner}: seed must be a non-negative integer; got {seed!r}. "
                "Use an int >= 0, a SeedSequence, a numpy Generator, or None."
            )
        return np.random.SeedSequence(int(seed))
    raise InvalidParameterError(
        f"{owner}: seed must be an int, a SeedSequence, a numpy Generator or None; "
        f"got {seed!r} of type {type(seed).__name__}."
    )


def episode_seed(root: np.random.SeedSequence, episode: int) -> int:
    """The environment seed of episode ``episode`` of a run seeded by ``root``.

    A pure function of the root entropy and the episode index, so a resumed run
    draws the same seeds as an uninterrupted one: the first 32-bit word of
    ``SeedSequence(root.entropy, spawn_key=(*root.spawn_key, episode))``,
    computed by :func:`tdkit._seeding.spawned_seed` (numpy's values, without
    building the object every episode).

    Examples
    --------
    >>> root = np.random.SeedSequence(0)
    >>> episode_seed(root, 4) == episode_seed(np.random.SeedSequence(0), 4)
    True
    """
    return spawned_seed(root.entropy, root.spawn_key, episode)

"""Turning the one ``seed`` argument into a :class:`numpy.random.Generator`."""

from __future__ import annotations

import numbers

import numpy as np

from ._errors import InvalidParameterError

__all__ = ["SeedLike", "as_generator"]

SeedLike = int | np.random.Generator | np.random.SeedSequence | None


def as_generator(seed: SeedLike, *, owner: str = "seed") -> np.random.Generator:
    """Return a Generator for ``seed`` (int, SeedSequence, Generator or None).

    A Generator passed in is used as is (shared, not copied), so a caller can
    drive several objects from one stream. ``None`` draws fresh OS entropy.

    Raises
    ------
    InvalidParameterError
        If ``seed`` is of another type or a negative integer.
    """
    if seed is None or isinstance(seed, np.random.SeedSequence):
        return np.random.default_rng(seed)
    if isinstance(seed, np.random.Generator):
        return seed
    if isinstance(seed, numbers.Integral) and not isinstance(seed, bool):
        if int(seed) < 0:
            raise InvalidParameterError(
                f"{owner}: seed must be a non-negative integer; got {seed!r}. "
                "Use an int >= 0, a numpy Generator, or None."
            )
        return np.random.default_rng(int(seed))
    raise InvalidParameterError(
        f"{owner}: seed must be an int, a numpy.random.Generator, a SeedSequence or None; "
        f"got {seed!r} of type {type(seed).__name__}."
    )

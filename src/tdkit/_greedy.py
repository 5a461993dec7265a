"""Greedy choice with uniform random tie-breaking, and masked maxima.

These few functions are the single place where "greedy" is defined; every
learner, exploration rule and verifier goes through them.

Tie-breaking draws one uniform number ``u`` in [0, 1) and picks tie
``floor(u * k)`` among the ``k`` tied actions, so each tied action has
probability 1/k (to within 2**-53).
"""

from __future__ import annotations

import numpy as np

from ._errors import InvalidParameterError

__all__ = [
    "allowed_indices",
    "greedy_rows",
    "check_mask",
    "greedy_action",
    "masked_max",
    "masked_mean",
    "uniform_action",
]

_NEG_INF = float("-inf")


def check_mask(mask: object, n_actions: int, *, name: str = "mask") -> np.ndarray:
    """Return ``mask`` as a boolean array of shape ``(n_actions,)`` or raise.

    Boolean arrays of the right shape (the common case on the hot path) cost
    one ``any()``; integer 0/1 masks, as some gymnasium envs return, are
    converted.
    """
    if type(mask) is np.ndarray and mask.dtype == np.bool_ and mask.shape == (n_actions,):
        if mask.any():
            return mask
        arr = mask
    else:
        arr = np.asarray(mask)
        if arr.shape != (n_actions,):
            raise InvalidParameterError(
                f"{name} must be a boolean array of shape ({n_actions},); got shape {arr.shape}."
            )
        if arr.dtype != np.bool_:
            if arr.dtype.kind not in "biu" or arr.min() < 0 or arr.max() > 1:
                raise InvalidParameterError(
                    f"{name} must hold booleans (or 0/1 integers); got {arr!r}."
                )
            arr = arr.astype(bool)
        if arr.any():
            return arr
    raise InvalidParameterError(
        f"{name} allows no action; at least one entry must be True. Got {arr!r}."
    )


def _tied_pick(ties: np.ndarray | list[int], rng: np.random.Generator) -> int:
    k = len(ties)
    if k == 1:
        return int(ties[0])
    return int(ties[int(rng.random() * k)])


def greedy_action(values: np.ndarray, mask: np.ndarray | None, rng: np.random.Generator) -> int:
    """Index of a maximal entry of ``values`` (restricted to ``mask``), ties uniform.

    Raises
    ------
    FloatingPointError
        If the candidate values contain NaN, which would make "greedy" undefined.
    """
    if mask is not None:
        values = np.where(mask, values, _NEG_INF)
    ties = (values == values.max()).nonzero()[0]
    if ties.size == 0:
        raise FloatingPointError(
            f"greedy choice is undefined: action values contain NaN ({values!r}). "
            "Check rewards and step sizes for overflow."
        )
    return _tied_pick(ties, rng)


def allowed_indices(mask: np.ndarray) -> np.ndarray:
    """Indices of the allowed actions."""
    return np.flatnonzero(mask)


def uniform_action(n_actions: int, mask: np.ndarray | None, rng: np.random.Generator) -> int:
    """A uniformly random allowed action."""
    if mask is None:
        return int(rng.random() * n_actions)
    allowed = np.flatnonzero(mask)
    return int(allowed[int(rng.random() * allowed.size)])


def masked_max(values: np.ndarray, mask: np.ndarray | None) -> float:
    """``max_a values[a]`` over allowed actions."""
    if mask is None:
        return float(values.max())
    return float(values[mask].max())


def masked_mean(values: np.ndarray, mask: np.ndarray | None) -> float:
    """Mean of ``values`` over allowed actions."""
    if mask is None:
        return float(values.mean())
    return float(values[mask].mean())


def greedy_rows(rows: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Greedy action of each row of ``rows`` (shape (K, A)), ties broken uniformly.

    Row ``i`` picks tie ``floor(u[i] * k_i)`` (in index order) of its ``k_i``
    maximal entries, the rule of :func:`greedy_action` applied
    to every row at once, so each tied action has probability ``1 / k_i``.

    Raises
    ------
    FloatingPointError
        If a row contains NaN (greedy is then undefined).
    """
    ties = rows == rows.max(axis=1, keepdims=True)
    rank = ties.cumsum(axis=1)  # rank[i, j]: maximal entries among rows[i, :j + 1]
    counts = rank[:, -1]
    if not counts.all():
        bad = int(np.argmin(counts))
        raise FloatingPointError(
            f"greedy choice is undefined for learner {bad}: its action values "
            f"contain NaN ({rows[bad]!r}). Check rewards and step sizes for overflow."
        )
    pick = (u * counts).astype(np.intp)
    return (rank > pick[:, None]).argmax(axis=1)

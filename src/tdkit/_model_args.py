"""Validating the model and policy arguments of every exact solver (written once).

:mod:`tdkit.dp`, :mod:`tdkit.dp_average` and :mod:`tdkit.dp_solve` take a
:class:`~tdkit.FiniteMDP` and, some of them, a policy as ``(S,)`` action
indices or ``(S, A)`` probabilities; these functions check both and name the
solver, the value seen and the fix.
"""

from __future__ import annotations

import numbers
from typing import Any

import numpy as np

from ._errors import InvalidParameterError
from ._validation import require_float_array, require_in_range, require_probability_rows
from .envs.finite import FiniteMDP

__all__ = [
    "policy_probabilities", "require_allowed", "require_exploration", "require_mdp",
    "require_values",
]


def require_mdp(owner: str, mdp: Any) -> FiniteMDP:
    if not isinstance(mdp, FiniteMDP):
        raise InvalidParameterError(
            f"{owner}: mdp must be a tdkit.FiniteMDP; got {type(mdp).__name__}. "
            "Build one with FiniteMDP(P, R, gamma=...) or FiniteMDP.from_gymnasium(env)."
        )
    return mdp


def require_values(owner: str, name: str, values: Any, shape: tuple[int, ...]) -> np.ndarray:
    array = require_float_array(owner, name, values)
    if array.shape != shape:
        raise InvalidParameterError(
            f"{owner}: {name} must have shape {shape}; got shape {array.shape}."
        )
    if not np.isfinite(array).all():
        raise InvalidParameterError(f"{owner}: {name} must be finite; got {values!r:.80}.")
    return array


def policy_probabilities(owner: str, mdp: FiniteMDP, policy: Any) -> np.ndarray:
    """Return ``policy`` as an (S, A) probability array, validated."""
    n, m = mdp.n_states, mdp.n_actions
    array = np.asarray(policy)
    if array.shape == (n,):
        if not np.issubdtype(array.dtype, np.integer):
            if not (np.issubdtype(array.dtype, np.floating) and (array == np.round(array)).all()):
                raise InvalidParameterError(
                    f"{owner}: a deterministic policy must hold action indices (ints); "
                    f"got dtype {array.dtype}."
                )
            array = array.astype(np.intp)
        bad = (array < 0) | (array >= m)
        if bad.any():
            s = int(np.argmax(bad))
            raise InvalidParameterError(
                f"{owner}: policy[{s}] = {int(array[s])!r} is not an action index in [0, {m})."
            )
        probs = np.zeros((n, m))
        probs[np.arange(n), array] = 1.0
        return require_allowed(owner, mdp, probs)
    if array.shape == (n, m):
        probs = require_values(owner, "policy", array, (n, m))
        return require_allowed(owner, mdp, require_probability_rows(owner, "policy", probs))
    raise InvalidParameterError(
        f"{owner}: policy must have shape (S,) = ({n},) (action indices) or (S, A) = "
        f"({n}, {m}) (probabilities); got shape {array.shape}."
    )


def require_allowed(owner: str, mdp: FiniteMDP, probs: np.ndarray) -> np.ndarray:
    """Refuse a policy that gives a masked action positive probability."""
    masks = mdp.masks
    if masks is not None:
        bad = (probs > 0) & ~masks
        if bad.any():
            s, a = (int(i) for i in np.argwhere(bad)[0])
            raise InvalidParameterError(
                f"{owner}: the policy takes action {a} in state {s} with probability "
                f"{float(probs[s, a])!r}, but the model masks that action there "
                f"(mdp.masks[{s}, {a}] is False). Use only allowed actions, e.g. "
                "tdkit.agent_policy(agent, mdp) for a learner's greedy policy."
            )
    return probs


def require_exploration(owner: str, exploration: Any) -> float:
    if isinstance(exploration, bool) or not isinstance(exploration, numbers.Real):
        raise InvalidParameterError(
            f"{owner}: exploration must be a float in [0, 1] (the ε of ε-greedy); got "
            f"{exploration!r}."
        )
    return require_in_range(owner, "exploration", float(exploration), 0.0, 1.0)

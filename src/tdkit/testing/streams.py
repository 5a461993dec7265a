"""Hypothesis strategies for transition streams, the input of :func:`tdkit.verify.compare_updates`.

Needs the ``test`` extra (hypothesis).

Examples
--------
>>> from hypothesis import given
>>> import tdkit
>>> from tdkit.verify import compare_updates
>>> @given(transition_streams(4, 2))
... def test_same_learner_same_updates(stream):
...     make = lambda: tdkit.QLearning(4, 2, gamma=0.9, step_size=0.5, seed=0)
...     assert compare_updates(make(), make(), stream) is None
>>> test_same_learner_same_updates()
"""

from __future__ import annotations

from typing import Any

import numpy as np
from hypothesis import strategies as st

from .._errors import InvalidParameterError

__all__ = ["feed", "random_transitions", "transition_streams"]


def _positive(name: str, value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise InvalidParameterError(
            f"transition_streams: {name} must be a positive int; got {value!r}."
        )
    return value


@st.composite
def _streams(
    draw: Any,
    n_states: int,
    n_actions: int,
    min_size: int,
    max_size: int,
    reward: tuple[float, float],
    end_probability: float,
    masks: bool,
) -> list[tuple]:
    size = draw(st.integers(min_size, max_size))
    stream: list[tuple] = []
    obs = draw(st.integers(0, n_states - 1))
    mask: np.ndarray | None = None
    rewards = st.floats(reward[0], reward[1], allow_nan=False, allow_infinity=False)
    mask_rows = st.lists(st.booleans(), min_size=n_actions, max_size=n_actions).filter(any)
    for _ in range(size):
        allowed = list(range(n_actions)) if mask is None else np.flatnonzero(mask).tolist()
        action = draw(st.sampled_from(allowed))
        next_obs = draw(st.integers(0, n_states - 1))
        ends = draw(st.floats(0.0, 1.0)) < end_probability
        how = draw(st.sampled_from(_ENDINGS)) if ends else ""
        terminated = how in ("terminated", "both")
        truncated = how in ("truncated", "both")
        next_mask = np.array(draw(mask_rows)) if masks else None
        record = (obs, action, draw(rewards), next_obs, terminated, truncated)
        stream.append((*record, next_mask) if masks else record)
        if ends:
            obs = draw(st.integers(0, n_states - 1))
            mask = None
        else:
            obs, mask = next_obs, next_mask
    return stream


#: How a drawn episode ends: a terminal state, a time limit, or both at once (an
#: episode that terminates exactly at its time limit, which ``train`` hands over
#: with both flags set and in which ``terminated`` wins).
_ENDINGS = ("terminated", "truncated", "both")


def transition_streams(
    n_states: int,
    n_actions: int,
    *,
    min_size: int = 1,
    max_size: int = 30,
    reward: tuple[float, float] = (-10.0, 10.0),
    end_probability: float = 0.2,
    masks: bool = False,
) -> st.SearchStrategy[list[tuple]]:
    """Lists of transitions ``(obs, action, reward, next_obs, terminated, truncated)``.

    Consecutive transitions form episodes: each starts where the previous one
    ended unless that one ended the episode (probability ``end_probability``:
    terminated, truncated, or both flags at once, each a third of the time), in
    which case a new episode starts in a random state. With ``masks=True``
    every transition carries a ``next_mask`` (at least one allowed action) as
    a 7th entry, and the next action respects it.

    Parameters
    ----------
    n_states, n_actions : int
        States are ints in ``[0, n_states)``, actions in ``[0, n_actions)``.
    min_size, max_size : int
        Length of the stream.
    reward : (float, float)
        Range of the (finite) rewards.
    end_probability : float
        Probability that a transition ends its episode.
    masks : bool
        Add ``next_mask`` arrays.
    """
    n_states = _positive("n_states", n_states)
    n_actions = _positive("n_actions", n_actions)
    min_size = _positive("min_size", min_size)
    max_size = _positive("max_size", max_size)
    if max_size < min_size:
        raise InvalidParameterError(
            f"transition_streams: max_size ({max_size}) must be >= min_size ({min_size})."
        )
    low, high = (float(x) for x in reward)
    if not (np.isfinite(low) and np.isfinite(high) and low <= high):
        raise InvalidParameterError(
            f"transition_streams: reward must be a finite (low, high) range; got {reward!r}."
        )
    if not 0.0 <= end_probability <= 1.0:
        raise InvalidParameterError(
            f"transition_streams: end_probability must be in [0, 1]; got {end_probability!r}."
        )
    return _streams(n_states, n_actions, min_size, max_size, (low, high),
                    float(end_probability), bool(masks))


def random_transitions(
    seed: int, steps: int, n_states: int, n_actions: int, *, masks: bool = False
) -> list[tuple]:
    """A reproducible stream of transitions with arbitrary (not agent-chosen) actions.

    Each tuple is in ``observe``'s argument order plus the next mask:
    ``(obs, action, reward, next_obs, terminated, truncated, next_mask)``.
    About 10% of steps terminate and 5% are cut by a time limit; a third of
    the terminating steps also carry ``truncated=True`` (an episode that ends
    exactly at its time limit: ``terminated`` wins). The next episode starts
    in a random state. With ``masks=True`` every next state
    gets a random mask allowing at least one action.

    Examples
    --------
    >>> stream = random_transitions(0, 5, n_states=3, n_actions=2)
    >>> len(stream), len(stream[0])
    (5, 7)
    """
    rng = np.random.default_rng(seed)
    out: list[tuple] = []
    s = 0
    for _ in range(steps):
        a = int(rng.integers(n_actions))
        s2 = int(rng.integers(n_states))
        terminated = bool(rng.random() < 0.1)
        truncated = bool(rng.random() < (1 / 3 if terminated else 0.05))
        mask = None
        if masks:
            mask = rng.random(n_actions) < 0.6
            mask[int(rng.integers(n_actions))] = True
        out.append((s, a, float(rng.normal()), s2, terminated, truncated, mask))
        s = int(rng.integers(n_states)) if terminated or truncated else s2
    return out


def feed(agent: Any, transitions: list[tuple]) -> list[tuple[float, ...]]:
    """``observe`` then ``update`` each transition; return the TD errors of each update."""
    errors = []
    for s, a, r, s2, terminated, truncated, mask in transitions:
        agent.observe(s, a, r, s2, terminated, truncated, next_mask=mask)
        errors.append(agent.update())
    return errors

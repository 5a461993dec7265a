"""Reading the transition table ``P`` of gymnasium's discrete environments.

gymnasium's toy-text environments (FrozenLake, CliffWalking, Taxi) expose
``env.unwrapped.P[s][a]``: a list of ``(probability, next_state, reward,
terminated)`` outcomes. This module turns that table into the arrays of the
sparse successor form of :class:`tdkit.envs.finite.FiniteMDP`, deciding from
the ``terminated`` flags which states are terminal (see
:meth:`FiniteMDP.from_gymnasium`).
"""

from __future__ import annotations

from typing import Any, NamedTuple

import numpy as np

from .._errors import EnvironmentProtocolError

__all__ = ["TransitionTable", "read_transition_table"]

_OWNER = "FiniteMDP.from_gymnasium"


class TransitionTable(NamedTuple):
    """Arrays of a model read from ``env.unwrapped.P`` (sparse successor form)."""

    next_states: np.ndarray  # (S', A, K) int
    probs: np.ndarray  # (S', A, K)
    rewards: np.ndarray  # (S', A, K) per-outcome rewards
    terminal: np.ndarray  # (S',) bool
    initial: np.ndarray  # (S',)


def _discrete_size(env: Any, name: str) -> int:
    space = getattr(env, name, None)
    n = getattr(space, "n", None)
    start = getattr(space, "start", 0)
    if n is None or int(start) != 0:
        raise EnvironmentProtocolError(
            f"{_OWNER}: env.{name} must be a gymnasium Discrete space starting at 0; "
            f"got {space!r}. Only discrete tabular envs with a table P can be read."
        )
    return int(n)


def _outcomes(table: Any, s: int, a: int) -> list[tuple[float, int, float, bool]]:
    try:
        raw = table[s][a]
        return [(float(p), int(nxt), float(r), bool(t)) for p, nxt, r, t, *_ in raw]
    except (KeyError, IndexError, TypeError, ValueError) as exc:
        raise EnvironmentProtocolError(
            f"{_OWNER}: env.unwrapped.P[{s}][{a}] must be a list of "
            f"(probability, next_state, reward, terminated) tuples; reading it failed "
            f"with {exc!r}."
        ) from None


def read_transition_table(env: Any) -> TransitionTable:
    """Read ``env.unwrapped.P`` into successor arrays with terminal states decided.

    Raises
    ------
    EnvironmentProtocolError
        If the spaces are not ``Discrete`` or the table is missing or malformed.
    """
    base = getattr(env, "unwrapped", env)
    table = getattr(base, "P", None)
    if table is None:
        raise EnvironmentProtocolError(
            f"{_OWNER}: {type(base).__name__} has no transition table "
            "env.unwrapped.P; only envs that expose P[s][a] = [(p, s2, r, terminated), ...] "
            "(FrozenLake, CliffWalking, Taxi) can be read. Build a FiniteMDP from arrays "
            "instead."
        )
    n_states = _discrete_size(base, "observation_space")
    n_actions = _discrete_size(base, "action_space")
    rows = [[_outcomes(table, s, a) for a in range(n_actions)] for s in range(n_states)]

    flagged: set[int] = set()
    for per_state in rows:
        for outcomes in per_state:
            for p, nxt, _, done in outcomes:
                if not 0 <= nxt < n_states:
                    raise EnvironmentProtocolError(
                        f"{_OWNER}: env.unwrapped.P lists next state {nxt!r}, outside "
                        f"[0, {n_states})."
                    )
                if done and p > 0:
                    flagged.add(nxt)
    # A state entered only by terminating outcomes is terminal, provided no
    # non-terminating transition (from a state that can actually be occupied,
    # i.e. not itself terminal) enters it.
    entered_otherwise = {
        nxt
        for s, per_state in enumerate(rows)
        if s not in flagged
        for outcomes in per_state
        for p, nxt, _, done in outcomes
        if p > 0 and not done
    }
    use_sink = bool(flagged & entered_otherwise)
    size = n_states + 1 if use_sink else n_states
    sink = n_states
    terminal = np.zeros(size, dtype=bool)
    if use_sink:
        terminal[sink] = True
    else:
        terminal[sorted(flagged)] = True

    # Outcomes with the same (target, reward) are merged; the same target with
    # different rewards keeps separate slots, so sampling the model pays
    # gymnasium's rewards, not their mean.
    merged: list[list[dict[tuple[int, float], float]]] = []
    width = 1
    for s, per_state in enumerate(rows):
        merged_state = []
        for outcomes in per_state:
            slots: dict[tuple[int, float], float] = {}
            if not terminal[s]:
                for p, nxt, r, done in outcomes:
                    if p <= 0:
                        continue
                    key = (sink if (use_sink and done) else nxt, r)
                    slots[key] = slots.get(key, 0.0) + p
            width = max(width, len(slots))
            merged_state.append(slots)
        merged.append(merged_state)

    next_states = np.tile(np.arange(size, dtype=np.intp)[:, None, None], (1, n_actions, width))
    probs = np.zeros((size, n_actions, width))
    rewards = np.zeros((size, n_actions, width))
    probs[terminal, :, 0] = 1.0
    for s, merged_state in enumerate(merged):
        for a, slots in enumerate(merged_state):
            if terminal[s]:
                continue
            if not slots:
                raise EnvironmentProtocolError(
                    f"{_OWNER}: env.unwrapped.P[{s}][{a}] has no outcome with positive "
                    "probability."
                )
            for k, ((target, reward), mass) in enumerate(slots.items()):
                next_states[s, a, k] = target
                probs[s, a, k] = mass
                rewards[s, a, k] = reward
            total = probs[s, a].sum()
            if abs(total - 1.0) > 1e-8:
                raise EnvironmentProtocolError(
                    f"{_OWNER}: the outcome probabilities of env.unwrapped.P[{s}][{a}] sum "
                    f"to {float(total)!r}, not 1."
                )
            probs[s, a] /= total

    initial = np.zeros(size)
    distrib = getattr(base, "initial_state_distrib", None)
    if distrib is not None and np.shape(distrib) == (n_states,):
        initial[:n_states] = np.asarray(distrib, dtype=np.float64)
        initial[terminal] = 0.0
    if initial.sum() <= 0:
        initial[~terminal] = 1.0
    initial /= initial.sum()
    return TransitionTable(next_states, probs, rewards, terminal, initial)

"""Validated inputs of a batch run, shared by the numpy and the compiled path (internal).

Both paths consume the same random numbers in the same order: the start
states (``K`` numbers), then blocks of shape ``(K, n, N_UNIFORM[learner])``
(learner, step, slot) drawn by :func:`uniform_blocks` (learner first, so the
compiled kernel, which runs one learner's ``n`` steps at a time, reads them
in memory order). The slots are

===  ==========================================================
0    next state (successor slot)
1    start state of the next episode (used when one ends)
2    behaviour (one number per ε-greedy or soft-max choice)
3    SARSA: its next action; Double Q-learning: the coin and the
     tie of the argmax (``_targets.double_coin``)
===  ==========================================================
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..._errors import InvalidParameterError
from ...envs._successors import SuccessorTables, successor_tables
from ...envs.finite import FiniteMDP
from ...exploration import EpsilonGreedy, Exploration, Softmax, as_exploration
from ...schedules import Constant, Linear, Schedule, VisitCount
from ...tables import initial_values

__all__ = [
    "LEARNERS",
    "N_UNIFORM",
    "Setup",
    "build_setup",
    "initial_tables",
    "require_exploration",
    "require_learner",
    "require_masks",
    "require_mdp",
    "schedule_values",
    "step_size_kind",
    "uniform_blocks",
]

LEARNERS = ("q_learning", "sarsa", "expected_sarsa", "double_q")
"""Names of the learners :func:`train_batch` runs (their index is the kernels' learner code)."""

N_UNIFORM = {"q_learning": 3, "sarsa": 4, "expected_sarsa": 3, "double_q": 4}
"""Uniform numbers per learner and step."""

_CHUNK_NUMBERS = 1 << 21
"""Uniform numbers drawn per call to the generator (16 MB, drawn ahead for many steps: the
kernel runs each learner through a whole block, so large blocks keep its table in cache)."""

_SCALAR_NAMES = {
    "QLearning": "q_learning",
    "Sarsa": "sarsa",
    "ExpectedSarsa": "expected_sarsa",
    "DoubleQLearning": "double_q",
}


@dataclass(frozen=True, eq=False)
class Setup:
    """Everything a run needs besides the generator (internal).

    ``mask`` is None (every action allowed) or the ``(S, A)`` boolean mask
    with terminal rows opened (no learner acts there). ``allowed[s, :n_allowed[s]]``
    lists the allowed actions of ``s`` in increasing order.
    """

    learner: str
    model: SuccessorTables
    mask: np.ndarray | None
    allowed: np.ndarray
    n_allowed: np.ndarray
    exploration: Exploration
    parameter: Schedule  # epsilon or temperature by step
    step_size: Schedule
    gamma: float
    max_episode_steps: int | None

    @property
    def softmax(self) -> bool:
        return isinstance(self.exploration, Softmax)


# --------------------------------------------------------------------------- checks
def require_learner(learner: Any) -> str:
    if isinstance(learner, str) and learner in LEARNERS:
        return learner
    hint = ""
    name = getattr(learner, "__name__", None)
    if name in _SCALAR_NAMES:
        hint = f" For {name} pass the string {_SCALAR_NAMES[name]!r}."
    raise InvalidParameterError(
        f"train_batch: learner must be one of {', '.join(map(repr, LEARNERS))}; "
        f"got {learner!r}.{hint}"
    )


def require_exploration(exploration: Any) -> tuple[Exploration, Schedule]:
    """The rule and its schedule by step (ε or τ)."""
    rule = as_exploration(exploration, owner="train_batch")
    if isinstance(rule, EpsilonGreedy):
        return rule, rule.epsilon
    if isinstance(rule, Softmax):
        return rule, rule.temperature
    raise InvalidParameterError(
        f"train_batch: exploration must be a float epsilon in [0, 1], a schedule of "
        f"epsilon, an EpsilonGreedy or a Softmax object; got {exploration!r}. Other "
        "exploration rules are not vectorised: train the scalar learners with tdkit.train "
        "instead."
    )


def require_mdp(mdp: Any) -> FiniteMDP:
    if not isinstance(mdp, FiniteMDP):
        raise InvalidParameterError(
            f"train_batch: mdp must be a tdkit.FiniteMDP; got {type(mdp).__name__} "
            f"({mdp!r:.60}). Build one with tdkit.FiniteMDP(P, R, gamma=...) or "
            "FiniteMDP.from_successors(...); for other environments use tdkit.train."
        )
    return mdp


def require_masks(
    masks: Any, mdp: FiniteMDP
) -> tuple[np.ndarray | None, np.ndarray, np.ndarray]:
    """``(mask or None, allowed, n_allowed)`` from ``masks`` (or the model's own masks)."""
    n_states, n_actions = mdp.n_states, mdp.n_actions
    if masks is None:
        masks = getattr(mdp, "masks", None)
    if masks is None:
        allowed = np.broadcast_to(np.arange(n_actions, dtype=np.int64), (n_states, n_actions))
        return None, np.ascontiguousarray(allowed), np.full(n_states, n_actions, np.int64)
    array = np.asarray(masks)
    if array.shape != (n_states, n_actions):
        raise InvalidParameterError(
            f"train_batch: masks must be a boolean array of shape (S, A) = "
            f"({n_states}, {n_actions}); got shape {array.shape}."
        )
    if array.dtype != np.bool_:
        if array.dtype.kind not in "biu" or not np.isin(array, (0, 1)).all():
            raise InvalidParameterError(
                f"train_batch: masks must hold booleans (or 0/1 integers); got dtype "
                f"{array.dtype} with values {np.unique(array)[:5]!r}."
            )
    mask = array.astype(bool)  # a copy: the caller's array is never written
    terminal = np.asarray(mdp.terminal)
    empty = ~mask.any(axis=1) & ~terminal
    if empty.any():
        s = int(np.flatnonzero(empty)[0])
        raise InvalidParameterError(
            f"train_batch: masks allow no action in state {s} (masks[{s}] = {array[s]!r}); "
            "every non-terminal state needs at least one allowed action."
        )
    mask[terminal] = True  # nobody acts in a terminal state; keeps the row arithmetic finite
    n_allowed = mask.sum(axis=1).astype(np.int64)
    order = np.argsort(~mask, axis=1, kind="stable")  # allowed first, in index order
    return mask, np.ascontiguousarray(order, dtype=np.int64), n_allowed


def initial_tables(
    initial_value: Any, shape: tuple[int, int, int], rng: np.random.Generator
) -> np.ndarray:
    """(K, S, A) starting values: a float, a (low, high) range, or an (S, A)/(K, S, A) array."""
    if isinstance(initial_value, (np.ndarray, list)):
        array = np.array(initial_value, dtype=np.float64)
        if array.shape not in (shape[1:], shape):
            raise InvalidParameterError(
                f"train_batch: an initial_value array must have shape (S, A) = {shape[1:]} "
                f"or (K, S, A) = {shape}; got shape {array.shape}."
            )
        if not np.isfinite(array).all():
            raise InvalidParameterError(
                "train_batch: initial_value array has non-finite entries; every starting "
                "value must be a finite real number."
            )
        return np.broadcast_to(array, shape).copy()  # C order: the loops use flat views
    return initial_values(shape, initial_value, rng, owner="train_batch")


def build_setup(
    mdp: FiniteMDP, learner: str, *, exploration: Any, step_size: Schedule, masks: Any,
    gamma: float, max_episode_steps: int | None,
) -> Setup:
    rule, parameter = require_exploration(exploration)
    mask, allowed, n_allowed = require_masks(masks, mdp)
    return Setup(
        learner=learner, model=successor_tables(mdp), mask=mask, allowed=allowed,
        n_allowed=n_allowed, exploration=rule, parameter=parameter, step_size=step_size,
        gamma=gamma, max_episode_steps=max_episode_steps,
    )


# --------------------------------------------------------------------------- per-step values
def schedule_values(schedule: Schedule, start: int, n: int) -> np.ndarray:
    """``[schedule.value(t) for t in range(start, start + n)]`` as float64.

    Constant and linear schedules are vectorised with the same floating-point
    operations as their ``value``; other schedules are called once per step.
    """
    if isinstance(schedule, Constant):
        return np.full(n, schedule.constant)
    if type(schedule) is Linear:
        frac = np.arange(start, start + n) / schedule.duration
        ramp = schedule.start + (schedule.end - schedule.start) * frac
        return np.where(frac >= 1.0, schedule.end, ramp)
    return np.array([schedule.value(t) for t in range(start, start + n)], dtype=np.float64)


def step_size_kind(schedule: Schedule) -> str:
    """``"constant"``, ``"by_step"``, ``"visit_count"`` (exactly VisitCount) or ``"per_visit"``."""
    if isinstance(schedule, Constant):
        return "constant"
    if not schedule.per_visit:
        return "by_step"
    if type(schedule) is VisitCount:  # a subclass might read the step
        return "visit_count"
    return "per_visit"


def uniform_blocks(
    rng: np.random.Generator, steps: int, learner: str, n_learners: int
) -> Iterator[tuple[int, np.ndarray]]:
    """Yield ``(first step, block)`` with blocks of shape (K, n, N_UNIFORM[learner])."""
    width = N_UNIFORM[learner]
    draw = max(1, _CHUNK_NUMBERS // (width * n_learners))
    for t in range(0, steps, draw):
        yield t, rng.random((n_learners, min(draw, steps - t), width))

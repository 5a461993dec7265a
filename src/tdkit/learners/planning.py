r"""Model-based planning: Dyna-Q, Dyna-Q+ and prioritized sweeping.

Each real transition is learned directly with Q-learning's update (so
``planning_steps=0`` is :class:`~tdkit.QLearning`), recorded in a learned
model, and followed by up to ``planning_steps`` simulated updates from the
model, all through the shared TD step:

.. math::
    Q(S, A) \leftarrow Q(S, A) + \alpha\,[R + \gamma \max_a Q(S', a) - Q(S, A)]

(target :math:`R` when the modelled outcome terminates; the max respects the
mask recorded with the outcome). The model is ``"last"`` (the last outcome of
each pair, the book's deterministic model) or ``"counts"`` (outcome counts
and mean rewards, for stochastic environments); see
:mod:`tdkit.learners._models`.

:meth:`update` returns only the TD error of the real transition; planning
updates are counted in ``planning_updates_`` and, like real updates, in
:attr:`visits` (so per-pair step-size schedules see them). Planning draws
from the learner's own generator, so a seed reproduces a run.
"""

from __future__ import annotations

import heapq
import math
from typing import Any, ClassVar

import numpy as np

from .._greedy import uniform_action
from .._seeding import SeedLike
from .._validation import require_in_range, require_positive_int
from ..agent import Transition
from ..exploration import Exploration
from ..schedules import Schedule
from ..tables import InitialValue
from ._models import make_model
from ._targets import greedy_max
from .one_step import QLearning

__all__ = ["DynaQ", "DynaQPlus", "PrioritizedSweeping"]


class _PlanningLearner(QLearning):
    """Direct Q-learning, a learned model, and a planning hook."""

    def __init__(
        self,
        n_states: int,
        n_actions: int,
        *,
        planning_steps: int = 5,
        model: str = "last",
        gamma: float = 0.99,
        step_size: float | Schedule = 0.1,
        exploration: float | Schedule | Exploration = 0.1,
        initial_value: InitialValue = 0.0,
        seed: SeedLike = None,
        state_encoder: Any = None,
        action_encoder: Any = None,
    ) -> None:
        name = type(self).__name__
        self.planning_steps = require_positive_int(
            name, "planning_steps", planning_steps, minimum=0
        )
        self._model = make_model(name, model)
        self.model = model
        super().__init__(
            n_states, n_actions, gamma=gamma, step_size=step_size, exploration=exploration,
            initial_value=initial_value, seed=seed, state_encoder=state_encoder,
            action_encoder=action_encoder,
        )
        #: Number of simulated (planning) updates applied so far.
        self.planning_updates_ = 0

    def _learn(self, transition: Transition) -> tuple[float, ...]:
        errors = self._q_learning_step(transition)  # direct RL on the real transition
        s, a, r, s2, terminated, _truncated, next_mask = transition
        self._model.record(s, a, r, s2, terminated, next_mask)
        self._after_real_step(s, a, s2, next_mask)
        if self.planning_steps:
            self._plan()
        return errors

    def _after_real_step(self, s: int, a: int, s2: int, next_mask: np.ndarray | None) -> None:
        """Hook run after the model has recorded a real transition."""

    def _plan(self) -> None:
        raise NotImplementedError

    # Saved by tdkit.store: the model through these hooks (it is not an array).
    _saved_state: ClassVar[tuple[tuple[str, str], ...]] = (
        ("planning_updates_", "counter"), ("_model", "hooks"),
    )

    def _get_extra_state(self) -> dict[str, Any]:
        return {"model": self._model.get_state()}

    def _set_extra_state(self, state: dict[str, Any]) -> None:
        self._model.require_state(state["model"], self.n_states, self.n_actions)
        self._model.set_state(state["model"])

    @property
    def updates_(self) -> int:
        """All updates applied so far: real transitions learned plus planning updates."""
        return int(self._visits.sum())


class DynaQ(_PlanningLearner):
    r"""Tabular Dyna-Q: Q-learning plus planning from a learned model.

    After the real update and the model update, repeat ``planning_steps``
    times: pick a previously observed state uniformly, then an action
    previously taken there uniformly, ask the model for an outcome (with
    ``model="counts"``, drawn with probability proportional to its count) and
    apply the Q-learning update to it.

    Parameters
    ----------
    n_states, n_actions, gamma, step_size, exploration, initial_value, seed
        As for :class:`~tdkit.QLearning`; so are ``state_encoder`` and
        ``action_encoder``.
    planning_steps : int, default 5
        Simulated updates after each real step, ``>= 0``.
    model : {"last", "counts"}, default "last"
        Deterministic last-outcome model, or outcome counts with mean
        rewards for stochastic environments.

    Attributes
    ----------
    planning_updates_ : int
        Simulated updates applied so far.

    Raises
    ------
    ValueError
        If ``planning_steps`` is negative, ``model`` unknown, or another
        hyper-parameter out of range.

    References
    ----------
    .. [1] Sutton, R. S. (1990). Integrated architectures for learning,
       planning, and reacting based on approximating dynamic programming.
       Proceedings of the 7th ICML, 216-224.
    .. [2] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
       Introduction, 2nd ed., Section 8.2 (Tabular Dyna-Q).

    Examples
    --------
    >>> agent = DynaQ(3, 2, planning_steps=10, gamma=0.9, step_size=0.5, seed=0)
    >>> agent.observe(0, 1, 1.0, 2, True, False); agent.update()   # real error only
    (1.0,)
    >>> agent.planning_updates_, round(float(agent.table[0, 1]), 4)   # 1 - 0.5**11
    (10, 0.9995)
    """

    def _plan(self) -> None:
        model = self._model
        rng = self._rng
        learn = self._q_learning_step
        for _ in range(self.planning_steps):
            s, a = model.sample_pair(rng)
            o = model.sample(s, a, rng)
            learn(Transition(s, a, o.reward, o.next_state, o.terminated, False, o.next_mask))
        self.planning_updates_ += self.planning_steps


class DynaQPlus(DynaQ):
    r"""Dyna-Q+: Dyna-Q with an exploration bonus for pairs not tried for a long time.

    Planning updates use the modelled reward plus :math:`\kappa\sqrt{\tau}`,
    where :math:`\tau` is the number of real steps since the pair was last
    tried. As in the book's experiments, planning may also pick actions never
    tried from an observed state; their model returns to the same state with
    reward 0 (only actions allowed by the last mask seen for that state, if
    any). Real updates carry no bonus.

    Parameters
    ----------
    n_states, n_actions, planning_steps, model, gamma, step_size, exploration
        As for :class:`DynaQ`; so are ``initial_value``, ``seed``,
        ``state_encoder`` and ``action_encoder``.
    kappa : float, default 1e-3
        Bonus weight :math:`\kappa \ge 0` (``0`` gives Dyna-Q's updates,
        with untried actions also planned).

    Attributes
    ----------
    planning_updates_ : int
        Simulated updates applied so far.

    References
    ----------
    .. [1] Sutton, R. S. (1990). Integrated architectures for learning,
       planning, and reacting based on approximating dynamic programming.
       Proceedings of the 7th ICML, 216-224.
    .. [2] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
       Introduction, 2nd ed., Section 8.3 (Examples 8.2 and 8.3).

    Examples
    --------
    >>> agent = DynaQPlus(2, 2, planning_steps=1, kappa=0.1, seed=0)
    >>> agent.kappa
    0.1
    """

    _saved_state: ClassVar[tuple[tuple[str, str], ...]] = (
        ("_last_tried", "counts<=steps_"), ("_known_masks", "mask_map"),
    )

    def __init__(
        self,
        n_states: int,
        n_actions: int,
        *,
        planning_steps: int = 5,
        kappa: float = 1e-3,
        model: str = "last",
        gamma: float = 0.99,
        step_size: float | Schedule = 0.1,
        exploration: float | Schedule | Exploration = 0.1,
        initial_value: InitialValue = 0.0,
        seed: SeedLike = None,
        state_encoder: Any = None,
        action_encoder: Any = None,
    ) -> None:
        self.kappa = require_in_range(type(self).__name__, "kappa", kappa, 0.0, math.inf)
        super().__init__(
            n_states, n_actions, planning_steps=planning_steps, model=model,
            gamma=gamma, step_size=step_size, exploration=exploration,
            initial_value=initial_value, seed=seed, state_encoder=state_encoder,
            action_encoder=action_encoder,
        )
        self._last_tried = np.zeros((self.n_states, self.n_actions), dtype=np.int64)
        self._known_masks: dict[int, np.ndarray] = {}

    def _choose(self, s: int, mask: np.ndarray | None, explore: bool) -> int:
        if explore and mask is not None:  # behaviour only: greedy act leaves the model alone
            self._known_masks[s] = mask
        return super()._choose(s, mask, explore)

    def _after_real_step(self, s: int, a: int, s2: int, next_mask: np.ndarray | None) -> None:
        self._last_tried[s, a] = self.steps_
        if next_mask is not None:
            self._known_masks[s2] = next_mask

    def _plan(self) -> None:
        model = self._model
        rng = self._rng
        learn = self._q_learning_step
        kappa = self.kappa
        now = self.steps_
        last = self._last_tried
        for _ in range(self.planning_steps):
            s = model.states[int(rng.random() * len(model.states))]
            mask = self._known_masks.get(s)
            a = uniform_action(self.n_actions, mask, rng)
            if (s, a) in model:
                o = model.sample(s, a, rng)
                r, s2, terminated, next_mask = o.reward, o.next_state, o.terminated, o.next_mask
            else:  # never tried: the model returns to s with reward 0
                r, s2, terminated, next_mask = 0.0, s, False, mask
            r += kappa * math.sqrt(now - last[s, a])
            learn(Transition(s, a, r, s2, terminated, False, next_mask))
        self.planning_updates_ += self.planning_steps


class PrioritizedSweeping(_PlanningLearner):
    r"""Prioritized sweeping: plan backwards from the pairs whose values changed most.

    After the real update of :math:`(S, A)`, the pair itself (its model just
    changed) and every pair :math:`(\bar S, \bar A)` the model predicts to
    lead to :math:`S` get the priority
    :math:`P = |\,\bar G - Q(\bar S, \bar A)|`, where :math:`\bar G` is the
    model's target for the pair, and enter the queue if
    :math:`P >` ``threshold`` (a pair already queued keeps the larger
    priority). Then up to ``planning_steps`` times: pop the pair of highest
    priority, update it towards its model target, and queue its predecessors
    the same way. With ``model="counts"`` the model target is the expected
    update :math:`\sum_{s', r} \hat p(s', r \mid s, a)\,[r + \gamma \max_a Q(s', a)]`
    (the book's suggestion for stochastic environments); with ``"last"`` it is
    the sample update of the last outcome. Equal priorities are served first
    in, first out.

    Parameters
    ----------
    n_states, n_actions, gamma, step_size, exploration, initial_value, seed
        As for :class:`~tdkit.QLearning`; so are ``state_encoder`` and
        ``action_encoder``.
    planning_steps : int, default 5
        Most planning updates after each real step, ``>= 0`` (fewer when
        the queue empties).
    model : {"last", "counts"}, default "last"
        Sample updates towards the last outcome of each pair, or expected
        updates over outcome counts and mean rewards (stochastic
        environments).
    threshold : float, default 1e-4
        Smallest priority that enters the queue, ``>= 0``.

    Attributes
    ----------
    planning_updates_ : int
        Simulated updates applied so far (at most ``planning_steps`` per
        real step; fewer when the queue empties).

    References
    ----------
    .. [1] Moore, A. W. & Atkeson, C. G. (1993). Prioritized sweeping:
       Reinforcement learning with less data and less time. Machine Learning
       13, 103-130.
    .. [2] Peng, J. & Williams, R. J. (1993). Efficient learning and planning
       within the Dyna framework. Adaptive Behavior 1(4), 437-454.
    .. [3] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
       Introduction, 2nd ed., Section 8.4 (Example 8.4).

    Examples
    --------
    A chain 0 -> 1 -> 2 (terminal, reward 1): once the last step is learned,
    one planning update carries the value back to the first pair.

    >>> agent = PrioritizedSweeping(3, 1, planning_steps=5, gamma=0.5, step_size=1.0, seed=0)
    >>> agent.observe(0, 0, 0.0, 1, False, False); agent.update()
    (0.0,)
    >>> agent.observe(1, 0, 1.0, 2, True, False); agent.update()
    (1.0,)
    >>> agent.table[:, 0].tolist(), agent.planning_updates_
    ([0.5, 1.0, 0.0], 1)
    """

    def __init__(
        self,
        n_states: int,
        n_actions: int,
        *,
        planning_steps: int = 5,
        threshold: float = 1e-4,
        model: str = "last",
        gamma: float = 0.99,
        step_size: float | Schedule = 0.1,
        exploration: float | Schedule | Exploration = 0.1,
        initial_value: InitialValue = 0.0,
        seed: SeedLike = None,
        state_encoder: Any = None,
        action_encoder: Any = None,
    ) -> None:
        self.threshold = require_in_range(
            type(self).__name__, "threshold", threshold, 0.0, math.inf
        )
        super().__init__(
            n_states, n_actions, planning_steps=planning_steps, model=model,
            gamma=gamma, step_size=step_size, exploration=exploration,
            initial_value=initial_value, seed=seed, state_encoder=state_encoder,
            action_encoder=action_encoder,
        )
        self._heap: list[tuple[float, int, int, int]] = []
        self._queued: dict[tuple[int, int], float] = {}
        self._pushes = 0  # entries pushed so far: the first-in-first-out tie-breaker

    def _model_target(self, s: int, a: int) -> float:
        gamma = self.gamma
        target = 0.0
        for o in self._model.outcomes(s, a):
            if o.terminated:
                target += o.probability * o.reward
            else:
                best = greedy_max(self._row(o.next_state), self._allowed(o.next_mask))
                target += o.probability * (o.reward + gamma * best)
        return target

    def _queue(self, pair: tuple[int, int]) -> None:
        """Queue ``pair`` with priority |model target - Q| if it exceeds the threshold."""
        priority = abs(self._model_target(*pair) - self._values[pair])
        if priority > self.threshold and priority > self._queued.get(pair, 0.0):
            self._queued[pair] = priority
            heapq.heappush(self._heap, (-priority, self._pushes, *pair))
            self._pushes += 1

    def _queue_predecessors(self, s: int) -> None:
        for pair in self._model.predecessors_of(s):
            self._queue(pair)

    def _pop(self) -> tuple[int, int] | None:
        heap = self._heap
        queued = self._queued
        while heap:
            neg, _, s, a = heapq.heappop(heap)
            if queued.get((s, a)) == -neg:  # else a stale entry superseded by a higher priority
                del queued[(s, a)]
                return s, a
        return None

    def _after_real_step(self, s: int, a: int, s2: int, next_mask: np.ndarray | None) -> None:
        if self.planning_steps:
            self._queue((s, a))  # its model changed: what remains of its error
            self._queue_predecessors(s)

    def _plan(self) -> None:
        q = self._values
        visits = self._visits
        for _ in range(self.planning_steps):
            pair = self._pop()
            if pair is None:
                break
            s, a = pair
            self._td_step(q, visits, s, a, self._model_target(s, a))
            self.planning_updates_ += 1
            self._queue_predecessors(s)

    _saved_state: ClassVar[tuple[tuple[str, str], ...]] = (
        ("_heap", "hooks"), ("_queued", "hooks"), ("_pushes", "hooks"),
    )

    def _get_extra_state(self) -> dict[str, Any]:
        return {
            **super()._get_extra_state(),
            "heap": [list(entry) for entry in self._heap],
            "queued": [[s, a, p] for (s, a), p in self._queued.items()],
            "order": self._pushes,
        }

    def _set_extra_state(self, state: dict[str, Any]) -> None:
        _require_queue(state, self.n_states, self.n_actions)
        super()._set_extra_state(state)
        self._heap = [(float(p), int(k), int(s), int(a)) for p, k, s, a in state["heap"]]
        heapq.heapify(self._heap)
        self._queued = {(int(s), int(a)): float(p) for s, a, p in state["queued"]}
        self._pushes = int(state["order"])

    @property
    def queue_size(self) -> int:
        """Number of pairs waiting in the priority queue."""
        return len(self._queued)


def _require_queue(state: Any, n_states: int, n_actions: int) -> None:
    """Raise ValueError naming the entry unless the saved priority queue fits the table."""

    def pair_ok(s: Any, a: Any) -> bool:
        return all(isinstance(x, int) and not isinstance(x, bool) for x in (s, a)) and (
            0 <= s < n_states and 0 <= a < n_actions)

    def priority_ok(p: Any) -> bool:
        return isinstance(p, (int, float)) and not isinstance(p, bool) and math.isfinite(p) and (
            p > 0)

    order = state.get("order")
    if not (isinstance(order, int) and not isinstance(order, bool) and order >= 0):
        raise ValueError(f"order: {order!r:.80} is not an integer >= 0.")
    for entry in state.get("heap", None) or []:
        if not (isinstance(entry, list) and len(entry) == 4
                and isinstance(entry[0], (int, float)) and priority_ok(-entry[0])
                and isinstance(entry[1], int) and not isinstance(entry[1], bool)
                and 0 <= entry[1] < order
                and pair_ok(entry[2], entry[3])):
            raise ValueError(f"heap: {entry!r:.80} is not [-priority, order, state, action].")
    for entry in state.get("queued", None) or []:
        if not (isinstance(entry, list) and len(entry) == 3 and pair_ok(entry[0], entry[1])
                and priority_ok(entry[2])):
            raise ValueError(f"queued: {entry!r:.80} is not [state, action, priority].")
    if not (isinstance(state.get("heap"), list) and isinstance(state.get("queued"), list)):
        raise ValueError("heap and queued must be lists.")

r"""K independent tabular learners stepping in lockstep on one :class:`~tdkit.FiniteMDP`.

:func:`train_batch` runs ``n_learners`` (K) copies of a one-step TD control
learner -- Q-learning, SARSA, Expected SARSA or Double Q-learning -- on the
same finite model at once. Each learner has its own table, visit counts,
current state, episode return and episode step count; one time step of all K
learners is a handful of numpy operations over a leading axis of length K,
with no Python loop over the learners. Multi-seed experiments (K seeds of one
setting) then cost little more than one run.

Semantics (identical to the scalar learners of :mod:`tdkit.learners.one_step`
trained by :func:`tdkit.train` on ``mdp.to_env()``):

* Episodes start from a state drawn from ``mdp.initial``, end on entering a
  terminal state (``terminated``: the target does not bootstrap) or after
  ``max_episode_steps`` steps (``truncated``: the target bootstraps), and
  then restart.
* Next states are sampled from the model's successor form with one uniform
  number per learner; the reward is the per-outcome reward when the model has
  one (as ``to_env`` pays it), else the expected reward ``R[s, a]``.
* Behaviour is ε-greedy; greedy choices break ties uniformly at random
  (tie :math:`\lfloor u k \rfloor` of the :math:`k` tied actions, the rule of
  :func:`tdkit._greedy.greedy_action`).
* At step :math:`t` (from 0) the behaviour uses :math:`\varepsilon(t)` and the
  update uses :math:`\alpha(t + 1, n(s, a))`, where :math:`n(s, a)` counts the
  updates of the pair including this one; SARSA's next action and Expected
  SARSA's expectation use :math:`\varepsilon(t + 1)` (a scalar learner has
  observed :math:`t + 1` transitions by then).
* SARSA draws :math:`A_{t+1}` before its update and then takes it; on
  truncation the bootstrap action is drawn but the next episode starts with a
  fresh action. Double Q-learning flips one fair coin per learner and step,
  behaves on :math:`Q^A + Q^B` and reports :math:`(Q^A + Q^B)/2`.

Only ε-greedy exploration is vectorised here; for soft-max or UCB train the
scalar learners with :func:`tdkit.train`.

Examples
--------
>>> from tdkit.batch import train_batch
>>> from tdkit.envs.problems import garnet
>>> mdp = garnet(10, 2, 3, gamma=0.5, seed=0)
>>> res = train_batch(mdp, "q_learning", n_learners=4, steps=200, max_episode_steps=20)
>>> res.tables.shape, res.n_learners, int(res.visits.sum())
((4, 10, 2), 4, 800)
>>> [len(r) for r in res.episode_returns]        # 200 steps, episodes of 20
[10, 10, 10, 10]
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ._errors import InvalidParameterError
from ._greedy import greedy_rows
from ._seeding import SeedLike, as_generator
from ._validation import require_in_range, require_positive_int
from .dp import greedy_policy
from .envs.finite import FiniteMDP
from .exploration import EpsilonGreedy, Exploration, as_exploration
from .schedules import Constant, Schedule, VisitCount, as_schedule
from .tables import initial_values

__all__ = ["LEARNERS", "BatchResult", "train_batch"]

LEARNERS = ("q_learning", "sarsa", "expected_sarsa", "double_q")
"""Names of the learners :func:`train_batch` runs."""

_SCALAR_NAMES = {
    "QLearning": "q_learning",
    "Sarsa": "sarsa",
    "ExpectedSarsa": "expected_sarsa",
    "DoubleQLearning": "double_q",
}

_CHUNK_NUMBERS = 1 << 18
"""Uniform numbers drawn per call to the generator (drawn ahead for many steps)."""


# --------------------------------------------------------------------------- result
@dataclass(frozen=True, eq=False)
class BatchResult:
    """What :func:`train_batch` returns.

    Attributes
    ----------
    learner : str
        The learner's name (one of :data:`LEARNERS`).
    tables : ndarray, shape (K, S, A)
        Learned action values of each learner. For ``"double_q"`` the mean
        :math:`(Q^A + Q^B)/2`, as :attr:`tdkit.DoubleQLearning.table`.
    visits : ndarray of int64, shape (K, S, A)
        Number of updates of each pair (for ``"double_q"``: of both tables
        together).
    episode_returns : list of K ndarrays
        Undiscounted return of every *completed* episode of each learner, in
        order (an episode still running after the last step is not included).
    episode_lengths : list of K ndarrays of int64
        Number of steps of the same episodes.
    steps : int
        Steps taken by each learner.
    double_tables : ndarray, shape (2, K, S, A), or None
        For ``"double_q"`` the two tables :math:`Q^A, Q^B`; otherwise None.
    """

    learner: str
    tables: np.ndarray
    visits: np.ndarray
    episode_returns: list[np.ndarray]
    episode_lengths: list[np.ndarray]
    steps: int
    double_tables: np.ndarray | None = None

    @property
    def n_learners(self) -> int:
        """Number of learners K."""
        return int(self.tables.shape[0])

    def greedy_policies(self, *, atol: float = 0.0) -> np.ndarray:
        """Greedy action of every state for every learner, shape ``(K, S)``.

        Uses :func:`tdkit.dp.greedy_policy` on each table: the lowest-index
        action among those within ``atol`` of the state's maximum
        (deterministic, so the policy can be evaluated exactly with
        :func:`tdkit.evaluate_policy`).

        Examples
        --------
        >>> import numpy as np
        >>> q = np.array([[[0.0, 1.0], [2.0, 2.0]]])      # K=1, S=2, A=2
        >>> res = BatchResult("q_learning", q, np.zeros((1, 2, 2), np.int64), [], [], 0)
        >>> res.greedy_policies()
        array([[1, 0]])
        """
        k, s, a = self.tables.shape
        flat = greedy_policy(self.tables.reshape(k * s, a), atol=atol).policy
        return flat.reshape(k, s)

    def __repr__(self) -> str:
        k, s, a = self.tables.shape
        episodes = sum(len(r) for r in self.episode_returns)
        return (
            f"BatchResult(learner={self.learner!r}, n_learners={k}, n_states={s}, "
            f"n_actions={a}, steps={self.steps}, episodes={episodes})"
        )


# --------------------------------------------------------------------------- row-wise choices
def _epsilon_greedy_rows(
    rows: np.ndarray, eps: float, u_explore: np.ndarray, u_action: np.ndarray,
    u_tie: np.ndarray,
) -> np.ndarray:
    """ε-greedy action of each row: uniform with probability ``eps``, else greedy."""
    greedy = greedy_rows(rows, u_tie)
    if eps <= 0.0:
        return greedy
    n_actions = rows.shape[1]
    uniform = np.minimum((u_action * n_actions).astype(np.intp), n_actions - 1)
    return np.where(u_explore < eps, uniform, greedy)


# --------------------------------------------------------------------------- step sizes
class _StepSizes:
    """Step sizes for a batch of updates, through the schedule's own ``value``.

    * :class:`~tdkit.schedules.Constant`: one float.
    * schedules by step only: one ``value(t)`` call per step.
    * :class:`~tdkit.schedules.VisitCount` (step-independent): a lookup table
      ``value(0, n)`` for ``n = 0, 1, ...``, grown by doubling, so the values
      are exactly those the scalar learners compute.
    * other per-visit schedules: one ``value(t, n)`` call per distinct count.
    """

    def __init__(self, schedule: Schedule) -> None:
        self.schedule = schedule
        self.constant = schedule.constant if isinstance(schedule, Constant) else None
        self.per_visit = bool(schedule.per_visit)
        self.lookup = type(schedule) is VisitCount  # a subclass might read the step
        self._table = np.empty(0)

    def _grow(self, largest: int) -> None:
        size = max(2 * self._table.size, largest + 1, 64)
        value = self.schedule.value
        self._table = np.array([value(0, n) for n in range(size)], dtype=np.float64)

    def __call__(self, step: int, counts: np.ndarray) -> float | np.ndarray:
        if self.constant is not None:
            return self.constant
        if not self.per_visit:
            return self.schedule.value(step)
        if self.lookup:
            largest = int(counts.max())
            if largest >= self._table.size:
                self._grow(largest)
            return self._table[counts]
        distinct, inverse = np.unique(counts, return_inverse=True)
        values = np.array([self.schedule.value(step, int(n)) for n in distinct])
        return values[inverse.reshape(counts.shape)]


# --------------------------------------------------------------------------- validation
def _check_learner(learner: Any) -> str:
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


def _check_epsilon(exploration: Any) -> EpsilonGreedy:
    rule: Exploration = as_exploration(exploration, owner="train_batch")
    if not isinstance(rule, EpsilonGreedy):
        raise InvalidParameterError(
            f"train_batch: exploration must be a float epsilon in [0, 1], a schedule of "
            f"epsilon or an EpsilonGreedy object; got {exploration!r}. Other exploration "
            "rules are not vectorised: train the scalar learners with tdkit.train instead."
        )
    return rule


def _initial_tables(
    initial_value: Any, shape: tuple[int, int, int], rng: np.random.Generator
) -> np.ndarray:
    """(K, S, A) starting values: a float, a (low, high) range, or an (S, A)/(K, S, A) array."""
    if isinstance(initial_value, np.ndarray) or isinstance(initial_value, list):
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
        return np.broadcast_to(array, shape).copy()  # C order: the loop uses flat views
    return initial_values(shape, initial_value, rng, owner="train_batch")


def _check_mdp(mdp: Any) -> FiniteMDP:
    if not isinstance(mdp, FiniteMDP):
        raise InvalidParameterError(
            f"train_batch: mdp must be a tdkit.FiniteMDP; got {type(mdp).__name__} "
            f"({mdp!r:.60}). Build one with tdkit.FiniteMDP(P, R, gamma=...) or "
            "FiniteMDP.from_successors(...); for other environments use tdkit.train."
        )
    return mdp


# --------------------------------------------------------------------------- the run
def train_batch(
    mdp: FiniteMDP,
    learner: str,
    *,
    n_learners: int,
    steps: int,
    step_size: float | Schedule = 0.1,
    exploration: float | Schedule | EpsilonGreedy = 0.1,
    seed: SeedLike = 0,
    initial_value: Any = 0.0,
    max_episode_steps: int | None = None,
    gamma: float | None = None,
) -> BatchResult:
    r"""Train K independent one-step TD learners in lockstep on ``mdp``.

    Each learner applies its scalar counterpart's update at every step
    (:class:`tdkit.QLearning`, :class:`tdkit.Sarsa`,
    :class:`tdkit.ExpectedSarsa`, :class:`tdkit.DoubleQLearning`):

    .. math::
        Q(S_t, A_t) \leftarrow Q(S_t, A_t) + \alpha\,[G_t - Q(S_t, A_t)],
        \qquad G_t = R_{t+1} + \gamma\, B(S_{t+1})

    with :math:`B(s') = \max_a Q(s', a)` (Q-learning, Watkins & Dayan 1992),
    :math:`Q(s', A_{t+1})` for the action then taken (SARSA, Rummery &
    Niranjan 1994), :math:`\varepsilon\,\overline{Q}(s') + (1 - \varepsilon)
    \max_a Q(s', a)` (Expected SARSA, van Seijen et al. 2009), or
    :math:`Q^B(s', \arg\max_a Q^A(s', a))` with the roles of the two tables
    chosen by a fair coin (Double Q-learning, van Hasselt 2010). :math:`G_t =
    R_{t+1}` when :math:`S_{t+1}` is terminal; a time-limit truncation
    bootstraps. See the module docstring for the exact step conventions.

    Parameters
    ----------
    mdp : FiniteMDP
        The model to sample (dense or sparse form).
    learner : {"q_learning", "sarsa", "expected_sarsa", "double_q"}
    n_learners : int
        K >= 1 independent learners.
    steps : int
        Steps (transitions) each learner takes, >= 1.
    step_size : float or Schedule, default 0.1
        :math:`\alpha \in (0, 1]` or a schedule from :mod:`tdkit.schedules`
        (per-pair schedules such as ``VisitCount`` use each learner's own
        counts).
    exploration : float, Schedule or EpsilonGreedy, default 0.1
        :math:`\varepsilon \in [0, 1]` of ε-greedy, or a schedule of it by step.
    seed : int, numpy.random.Generator or None, default 0
        One seed for the whole run; the same seed gives the same result.
    initial_value : float, (float, float) or array, default 0.0
        A constant, a ``(low, high)`` range (every learner's table drawn
        independently from the run's generator), or an array of shape
        ``(S, A)`` (every learner starts from it) or ``(K, S, A)``. Double
        Q-learning starts both tables from it.
    max_episode_steps : int, optional
        Truncate episodes after this many steps. Without it, episodes of a
        model with no terminal states never end (``episode_returns`` is then
        empty).
    gamma : float, optional
        Discount in [0, 1]; default ``mdp.gamma``.

    Returns
    -------
    BatchResult
        ``tables`` (K, S, A), ``visits``, ``episode_returns``,
        ``episode_lengths``, ``steps`` and :meth:`BatchResult.greedy_policies`.

    Raises
    ------
    InvalidParameterError
        On an unknown learner, ``n_learners`` or ``steps`` below 1, a step
        size outside (0, 1], ε outside [0, 1], a non-ε-greedy exploration
        rule, a malformed initial value, ``max_episode_steps`` below 1 or
        ``gamma`` outside [0, 1] (each message names the parameter).
    FloatingPointError
        If action values become NaN.

    References
    ----------
    .. [1] Watkins, C. J. C. H. & Dayan, P. (1992). Q-learning. Machine
       Learning 8, 279-292.
    .. [2] Rummery, G. A. & Niranjan, M. (1994). On-line Q-learning using
       connectionist systems. Technical Report CUED/F-INFENG/TR 166.
    .. [3] van Seijen, H., van Hasselt, H., Whiteson, S. & Wiering, M. (2009).
       A theoretical and empirical analysis of Expected Sarsa. IEEE ADPRL.
    .. [4] van Hasselt, H. (2010). Double Q-learning. NIPS 23.
    .. [5] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
       Introduction, 2nd ed., Sections 6.4-6.7.

    Examples
    --------
    Eight Q-learners on the Dyna maze (Sutton & Barto 2018, Example 8.1):

    >>> from tdkit.batch import train_batch
    >>> from tdkit.envs.problems import dyna_maze
    >>> res = train_batch(dyna_maze(), "q_learning", n_learners=8, steps=3000, seed=1,
    ...                   step_size=0.5, exploration=0.1)
    >>> res.tables.shape
    (8, 54, 4)
    >>> bool(all(len(r) > 0 for r in res.episode_returns))   # every learner reached the goal
    True
    """
    owner = "train_batch"
    mdp = _check_mdp(mdp)
    learner = _check_learner(learner)
    n_learners = require_positive_int(owner, "n_learners", n_learners)
    steps = require_positive_int(owner, "steps", steps)
    alpha = _StepSizes(as_schedule(
        step_size, owner=owner, name="step_size", low=0.0, high=1.0, low_open=True,
        hint="Use a float or a schedule from tdkit.schedules.",
    ))
    explore = _check_epsilon(exploration)
    rng = as_generator(seed, owner=owner)
    if max_episode_steps is not None:
        max_episode_steps = require_positive_int(owner, "max_episode_steps", max_episode_steps)
    gamma = mdp.gamma if gamma is None else require_in_range(owner, "gamma", gamma, 0.0, 1.0)
    n_tables = 2 if learner == "double_q" else 1
    shape = (n_learners, mdp.n_states, mdp.n_actions)
    q = np.stack([_initial_tables(initial_value, shape, rng) for _ in range(n_tables)])
    return _Lockstep(mdp, learner, q, alpha, explore, float(gamma), max_episode_steps, rng).run(
        steps
    )


class _Lockstep:
    """The state of K learners and the loop that steps them (internal)."""

    def __init__(
        self,
        mdp: FiniteMDP,
        learner: str,
        q: np.ndarray,
        alpha: _StepSizes,
        explore: EpsilonGreedy,
        gamma: float,
        max_episode_steps: int | None,
        rng: np.random.Generator,
    ) -> None:
        self.learner = learner
        _, k, s, a = q.shape
        self.K, self.S, self.A = k, s, a
        self.q = np.ascontiguousarray(q)  # flat views of it are updated in place
        self.alpha = alpha
        self.explore = explore
        self.gamma = gamma
        self.max_steps = max_episode_steps
        self.rng = rng
        next_states, probs, rewards = mdp.successors
        cumulative = np.cumsum(probs, axis=2)
        # As FiniteMDPEnv: exactly 1 at the last positive slot, so a uniform draw
        # in [0, 1) never lands on a zero-probability slot.
        cumulative /= cumulative[:, :, -1:]
        self.cum = np.ascontiguousarray(cumulative.reshape(s * a, -1))
        self.next = np.ascontiguousarray(next_states.reshape(s * a, -1))
        self.rew = np.ascontiguousarray(rewards.reshape(s * a, -1), dtype=np.float64)
        self.terminal = np.asarray(mdp.terminal)
        start = np.cumsum(mdp.initial)
        self.start_cum = start / start[-1]
        # Uniform numbers per learner and step: transition, restart, then the
        # three of an epsilon-greedy choice (explore, uniform action, tie) for the
        # behaviour, and three more for SARSA's next action or two (coin, tie)
        # for Double Q-learning's coin and argmax.
        self.n_uniform = 5 + {"sarsa": 3, "double_q": 2}.get(learner, 0)

    def _start_states(self, u: np.ndarray) -> np.ndarray:
        idx = np.searchsorted(self.start_cum, u, side="right")
        return np.minimum(idx, self.start_cum.size - 1)

    def run(self, steps: int) -> BatchResult:
        K, S, A = self.K, self.S, self.A
        learner, gamma, explore, alpha = self.learner, self.gamma, self.explore, self.alpha
        sarsa = learner == "sarsa"
        double = learner == "double_q"
        expected = learner == "expected_sarsa"
        n_tables = self.q.shape[0]
        # Flat views: row (table, learner, state) of A values; entry (table, learner, s, a).
        q_rows = self.q.reshape(n_tables * K * S, A)
        q_flat = self.q.reshape(-1)
        visits = np.zeros((n_tables, K, S, A), dtype=np.int64)
        visits_flat = visits.reshape(-1)
        if double:
            behaviour = self.q[0] + self.q[1]
            total_visits = np.zeros((K, S, A), dtype=np.int64)
        else:
            behaviour = self.q[0]
            total_visits = visits[0]
        behaviour_rows = behaviour.reshape(K * S, A)
        behaviour_flat = behaviour.reshape(-1)
        total_flat = total_visits.reshape(-1)
        cum, terminal = self.cum, self.terminal
        n_slots = cum.shape[1]
        last_slot = n_slots - 1
        next_flat, reward_flat = self.next.reshape(-1), self.rew.reshape(-1)
        max_steps = self.max_steps
        learners = np.arange(K)
        row_base = learners * S  # row of (learner, state 0) in a table
        table_size = K * S * A

        draw = max(1, _CHUNK_NUMBERS // (self.n_uniform * K))
        block = np.empty(0)
        state = self._start_states(self.rng.random(K))
        action = np.zeros(K, dtype=np.intp)
        fresh = np.ones(K, dtype=bool)  # SARSA: learners that need a new action
        ret = np.zeros(K)
        length = np.zeros(K, dtype=np.int64)
        ended_ids: list[np.ndarray] = []
        ended_returns: list[np.ndarray] = []
        ended_lengths: list[np.ndarray] = []

        for t in range(steps):
            i = t % draw
            if i == 0:
                block = self.rng.random((min(draw, steps - t), self.n_uniform, K))
            u = block[i]
            # -- act
            here = row_base + state
            chosen = _epsilon_greedy_rows(
                behaviour_rows[here], explore.current(t), u[2], u[3], u[4]
            )
            if sarsa:
                action = np.where(fresh, chosen, action)
            else:
                action = chosen
            # -- environment
            outcome = state * A + action
            if last_slot:
                # Slot = number of cumulative probabilities <= u (searchsorted "right").
                slot = (cum[outcome] <= u[0][:, None]).sum(axis=1)
                np.minimum(slot, last_slot, out=slot)
                outcome = outcome * n_slots + slot
            s2 = next_flat[outcome]
            reward = reward_flat[outcome]
            terminated = terminal[s2]
            length += 1
            ret += reward
            if max_steps is None:
                ended = terminated
            else:
                ended = terminated | (length >= max_steps)
            # -- target
            entry = here * A + action
            if double:
                update_a = u[5] < 0.5
                upd = np.where(update_a, 0, 1)
                upd_rows = q_rows[upd * (K * S) + row_base + s2]
                best = greedy_rows(upd_rows, u[6])
                evaluated = q_rows[(1 - upd) * (K * S) + row_base + s2, best]
                entry = upd * table_size + entry
                boot = evaluated
            else:
                next_rows = q_rows[row_base + s2]
                if sarsa:
                    next_action = _epsilon_greedy_rows(
                        next_rows, explore.current(t + 1), u[5], u[6], u[7]
                    )
                    boot = next_rows[learners, next_action]
                elif expected:
                    eps_next = explore.current(t + 1)
                    top = next_rows.max(axis=1)
                    if eps_next == 0.0:
                        boot = top
                    else:
                        boot = eps_next * next_rows.mean(axis=1) + (1.0 - eps_next) * top
                else:
                    boot = next_rows.max(axis=1)
            target = np.where(terminated, reward, reward + gamma * boot)
            # -- update (K distinct entries: one per learner)
            counts = visits_flat[entry] + 1
            visits_flat[entry] = counts
            step_alpha = alpha(t + 1, counts)
            old = q_flat[entry]
            q_flat[entry] = old + step_alpha * (target - old)
            if double:
                own = entry % table_size
                behaviour_flat[own] = q_flat[own] + q_flat[table_size + own]
                total_flat[own] += 1
            # -- episode bookkeeping
            if sarsa:
                action = next_action
                fresh = ended
            if ended.any():
                ids = np.flatnonzero(ended)
                ended_ids.append(ids)
                ended_returns.append(ret[ids])
                ended_lengths.append(length[ids])
                ret[ids] = 0.0
                length[ids] = 0
                s2 = s2.copy()
                s2[ids] = self._start_states(u[1][ids])
            state = s2

        tables = (self.q[0] + self.q[1]) / 2.0 if double else self.q[0]
        return BatchResult(
            learner=learner,
            tables=tables,
            visits=total_visits,
            episode_returns=_split(ended_ids, ended_returns, K, np.float64),
            episode_lengths=_split(ended_ids, ended_lengths, K, np.int64),
            steps=steps,
            double_tables=self.q if double else None,
        )


def _split(
    ids: list[np.ndarray], values: list[np.ndarray], n_learners: int, dtype: type
) -> list[np.ndarray]:
    """Group per-step records of ended episodes into one array per learner, in order."""
    if not ids:
        return [np.zeros(0, dtype=dtype) for _ in range(n_learners)]
    all_ids = np.concatenate(ids)
    all_values = np.concatenate(values).astype(dtype, copy=False)
    order = np.argsort(all_ids, kind="stable")
    bounds = np.cumsum(np.bincount(all_ids, minlength=n_learners))[:-1]
    return [part.copy() for part in np.split(all_values[order], bounds)]


"""The numpy path of :func:`tdkit.batch.train_batch`: K learners, one step = a few array ops."""

from __future__ import annotations

import numpy as np

from ...envs._successors import sample_slots
from ...learners import _targets
from ...schedules import Schedule
from ._result import BatchResult, batch_result
from ._setup import Setup, schedule_values, step_size_kind, uniform_blocks

__all__ = ["run_numpy"]


class _StepSizes:
    """Per-visit step sizes for a batch of updates, through the schedule's own ``value``.

    (Constant and by-step schedules are read directly in the loop.)

    * :class:`~tdkit.schedules.VisitCount`: a lookup table ``value(0, n)``
      for ``n = 0, 1, ...``, grown by doubling (exactly the scalar values);
    * other per-visit schedules: one ``value(t, n)`` call per distinct count.
    """

    def __init__(self, schedule: Schedule) -> None:
        self.schedule = schedule
        self.kind = step_size_kind(schedule)
        self._table = np.empty(0)

    def _grow(self, largest: int) -> None:
        size = max(2 * self._table.size, largest + 1, 64)
        value = self.schedule.value
        self._table = np.array([value(0, n) for n in range(size)], dtype=np.float64)

    def __call__(self, step: int, counts: np.ndarray) -> np.ndarray:
        """Per-visit step sizes of the pairs updated now (``counts`` include this update)."""
        if self.kind == "visit_count":
            largest = int(counts.max())
            if largest >= self._table.size:
                self._grow(largest)
            return self._table[counts]
        distinct, inverse = np.unique(counts, return_inverse=True)
        values = np.array([self.schedule.value(step, int(n)) for n in distinct])
        return values[inverse.reshape(counts.shape)]


def _raise_on_nan(q: np.ndarray) -> None:
    """Raise if a learner's values hold NaN (checked once per block of steps).

    A NaN makes greedy undefined; until the end of the block the choices of
    that learner are -1 (see :mod:`tdkit.learners._targets`), its run is
    meaningless and is discarded by this error.
    """
    bad = np.isnan(q).any(axis=(0, 2, 3))
    if bad.any():
        k = int(np.flatnonzero(bad)[0])
        raise FloatingPointError(
            f"greedy choice is undefined for learner {k}: its action values contain NaN. "
            "Check rewards and step sizes for overflow."
        )


def run_numpy(setup: Setup, q: np.ndarray, rng: np.random.Generator, steps: int) -> BatchResult:
    """Run ``steps`` steps of the K learners whose starting tables are ``q`` (T, K, S, A)."""
    learner, gamma = setup.learner, setup.gamma
    sarsa, double = learner == "sarsa", learner == "double_q"
    expected = learner == "expected_sarsa"
    softmax = setup.softmax
    n_tables, K, S, A = q.shape
    q = np.ascontiguousarray(q)  # flat views of it are updated in place
    # Flat views: row (table, learner, state) of A values; entry (table, learner, s, a).
    q_rows = q.reshape(n_tables * K * S, A)
    q_flat = q.reshape(-1)
    visits = np.zeros((n_tables, K, S, A), dtype=np.int64)
    visits_flat = visits.reshape(-1)
    if double:
        behaviour = q[0] + q[1]
        total_visits = np.zeros((K, S, A), dtype=np.int64)
    else:
        behaviour = q[0]
        total_visits = visits[0]
    behaviour_rows = behaviour.reshape(K * S, A)
    behaviour_flat = behaviour.reshape(-1)
    total_flat = total_visits.reshape(-1)
    model = setup.model
    cum = model.cumulative.reshape(S * A, -1)
    next_flat = model.next_states.reshape(-1)
    reward_flat = model.rewards.reshape(-1)
    n_slots = cum.shape[1]
    terminal, start_cum = model.terminal, model.start_cumulative
    mask = setup.mask
    max_steps = setup.max_episode_steps
    alpha = _StepSizes(setup.step_size)
    by_step = alpha.kind == "by_step"
    constant = setup.step_size.constant if alpha.kind == "constant" else None
    learners = np.arange(K)
    row_base = learners * S  # row of (learner, state 0) in a table
    table_size = K * S * A

    choose = _targets.softmax_index_rows if softmax else _targets.epsilon_greedy_index_rows

    def start_states(u: np.ndarray) -> np.ndarray:
        return sample_slots(start_cum, u)

    state = start_states(rng.random(K))
    action = np.zeros(K, dtype=np.intp)
    fresh = np.ones(K, dtype=bool)  # SARSA: learners that need a new action
    ret = np.zeros(K)
    length = np.zeros(K, dtype=np.int64)
    ended_ids: list[np.ndarray] = []
    ended_returns: list[np.ndarray] = []
    ended_lengths: list[np.ndarray] = []

    for t0, block in uniform_blocks(rng, steps, learner, K):
        n = block.shape[1]
        block = np.ascontiguousarray(block.transpose(1, 2, 0))  # (step, slot, learner)
        par = schedule_values(setup.parameter, t0, n + 1).tolist()  # behaviour t, targets t + 1
        alphas = schedule_values(setup.step_size, t0 + 1, n).tolist() if by_step else None
        for i in range(n):
            t = t0 + i
            u = block[i]  # u[slot]: one number per learner
            # -- act
            here = row_base + state
            rows = behaviour_rows[here]
            m = None if mask is None else mask[state]
            chosen = choose(rows, m, par[i], u[2])
            action = np.where(fresh, chosen, action) if sarsa else chosen
            # -- environment
            outcome = state * A + action
            if n_slots > 1:
                outcome = outcome * n_slots + sample_slots(cum[outcome], u[0])
            s2 = next_flat[outcome]
            reward = reward_flat[outcome]
            terminated = terminal[s2]
            length += 1
            ret += reward
            ended = terminated if max_steps is None else terminated | (length >= max_steps)
            # -- bootstrap value (tdkit.learners._targets)
            entry = here * A + action
            m2 = None if mask is None else mask[s2]
            if double:
                upd, u_tie = _targets.double_coin_rows(u[3])
                select = q_rows[upd * (K * S) + row_base + s2]
                evaluate = q_rows[(1 - upd) * (K * S) + row_base + s2]
                boot = _targets.double_value_rows(select, evaluate, m2, u_tie)
                entry = upd * table_size + entry
            else:
                next_rows = q_rows[row_base + s2]
                if sarsa:
                    next_action = choose(next_rows, m2, par[i + 1], u[3])
                    boot = next_rows[learners, next_action]  # sampled_value, row by row
                elif expected and softmax:
                    boot = _targets.expected_softmax_rows(next_rows, m2, par[i + 1])
                elif expected:
                    boot = _targets.expected_epsilon_greedy_rows(next_rows, m2, par[i + 1])
                else:
                    boot = _targets.greedy_max_rows(next_rows, m2)
            target = np.where(terminated, reward, reward + gamma * boot)
            # -- update (K distinct entries: one per learner)
            counts = visits_flat[entry] + 1
            visits_flat[entry] = counts
            if constant is not None:
                step_alpha = constant
            elif alphas is not None:
                step_alpha = alphas[i]
            else:
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
                s2[ids] = start_states(u[1][ids])
            state = s2
        _raise_on_nan(q)

    records = (ended_ids, ended_returns, ended_lengths)
    return batch_result(learner, q, total_visits, records, steps, "numpy")


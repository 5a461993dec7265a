"""``BehaviourReading`` reads the same numbers as the numpy formulation it replaced.

The reading feeds two calibrated checks (``convergence``, ``average_reward``),
whose measured error rates hold only for the computation that was measured.
The per-step reading now works on lists of Python floats; the reference below
is the earlier numpy code, kept verbatim, and both are driven through the same
random steps: rows with ties, infinities and NaN, bootstraps on the maximum,
on another entry and on an ε-mixture of the row, and updates that change one
entry, none or several. Every counter must be equal, exactly.
"""

from __future__ import annotations

import math

import numpy as np
from hypothesis import given
from hypothesis import strategies as st

from tdkit.verify._behaviour import BehaviourReading, bootstrap_value


class NumpyReading:
    """The numpy formulation of :class:`BehaviourReading` (commit 27586e8), for reference."""

    def __init__(self, agent, gamma):
        self.agent, self.gamma = agent, gamma
        self.non_greedy = self.acts = 0
        self.share = 0.0
        self.greedy_targets = self.sampled_targets = self.expected_targets = 0
        self._implied = None
        self._rows = None
        self._expect = None

    def _row(self, s):
        return np.array(self.agent.q_values(s), dtype=np.float64).reshape(-1)

    def after_act(self, obs, action):
        if self._expect is not None:
            if self._expect == (int(obs), int(action)):
                self.sampled_targets += 1
            self._expect = None
        row = self._row(obs)
        top = row.max()
        greedy = row >= top - 1e-12 * (1.0 + abs(top))
        self.acts += 1
        self.share += 1.0 - greedy.sum() / row.size
        if not greedy[int(action)]:
            self.non_greedy += 1

    def before_observe(self, transition):
        self._rows = None
        obs, _, _, next_obs, terminated, truncated, _ = transition
        if not (terminated or truncated):
            self._rows = (self._row(obs), self._row(next_obs), 0.0)

    def after_update(self, transition, errors):
        if self._rows is None or len(errors) != 1:
            return
        obs, action, reward, next_obs = transition[:4]
        row, row2, offset = self._rows
        after = self._row(obs)
        changed = np.flatnonzero(after != row)
        if changed.tolist() != [int(action)] or self.gamma == 0:
            return
        boot = bootstrap_value(row[int(action)], errors[0], float(reward), self.gamma, offset)
        top, low, mean = row2.max(), row2.min(), row2.mean()
        tol = 1e-9 * (1.0 + float(np.abs(row2).max()) + abs(boot))
        if abs(boot - top) <= tol:
            self.greedy_targets += 1
        elif np.any(np.abs(row2 - boot) <= tol) and low < top:
            self._expect = (int(next_obs), int(np.flatnonzero(np.abs(row2 - boot) <= tol)[0]))
        elif low - tol <= boot < top and top - mean > 1e-6:
            implied = float((top - boot) / (top - mean))
            if self._implied is not None and abs(implied - self._implied) <= 1e-6:
                self.expected_targets += 1
            self._implied = implied


class TableAgent:
    """``q_values`` from a dict the test writes between the hooks."""

    def __init__(self):
        self.rows = {}

    def q_values(self, s):
        return self.rows[s].copy()


values = st.one_of(
    st.sampled_from([0.0, 1.0, 1.0, 2.5, -1.0, 3.0]),  # ties are common
    st.floats(-10, 10, allow_nan=False),
    st.sampled_from([math.inf, -math.inf, math.nan]),
)
rows = st.lists(values, min_size=4, max_size=4)
step = st.tuples(
    rows, rows, st.integers(0, 3),                           # row of s, row of s', action
    st.sampled_from(["max", "entry", "mixture", "random"]),  # what the target bootstraps on
    st.floats(0.0, 1.0), st.floats(-2, 2, allow_nan=False),  # ε of a mixture, reward
    st.sampled_from(["one", "none", "two"]),                 # entries the update changes
    st.booleans(),                                           # the next act takes the entry
)


@given(st.lists(step, min_size=1, max_size=12), st.sampled_from([0.9, 1.0, 0.0]))
@np.errstate(invalid="ignore")  # the reference's arithmetic on inf and NaN rows
def test_list_reading_equals_the_numpy_reading(steps, gamma):
    agent = TableAgent()
    ours, reference = BehaviourReading(agent, gamma), NumpyReading(agent, gamma)
    for row, row2, a, bootstrap_on, eps, reward, changes, takes_it in steps:
        agent.rows = {0: np.array(row), 1: np.array(row2)}
        for reading in (ours, reference):
            reading.after_act(0, a)
        finite = [v for v in row2 if math.isfinite(v)] or [0.0]
        boot = {"max": max(finite), "entry": finite[-1],
                "mixture": eps * sum(finite) / len(finite) + (1 - eps) * max(finite),
                "random": reward}[bootstrap_on]
        q_sa = row[a] if math.isfinite(row[a]) else 0.0
        error = reward + gamma * boot - q_sa
        transition = (0, a, reward, 1, False, False, None)
        for reading in (ours, reference):
            reading.before_observe(transition)
        after = np.array(row)
        if changes != "none":
            after[a] = q_sa + 0.5 * error + 1.0
        if changes == "two":
            after[(a + 1) % 4] = 7.0
        agent.rows[0] = after
        for reading in (ours, reference):
            reading.after_update(transition, (error,))
        if takes_it:
            for reading in (ours, reference):
                reading.after_act(1, row2.index(finite[-1]) if finite[-1] in row2 else 0)
        for name in ("non_greedy", "acts", "greedy_targets", "sampled_targets",
                     "expected_targets", "_expect"):
            assert getattr(ours, name) == getattr(reference, name), name
        assert ours.share == reference.share
        assert ours._implied == reference._implied or (
            ours._implied is not None and math.isnan(ours._implied)
            and math.isnan(reference._implied))
        assert ours.exploration() == reference_exploration(reference)


def reference_exploration(reading):
    return BehaviourReading.exploration(reading)

"""The per-step shortcuts change nothing a learner computes.

``act`` goes straight to ``_pick`` (the choice for an action set) unless a
subclass overrides ``_choose``; observed transitions are queued as plain
tuples; Q-learning and SARSA apply their Python-float targets with
``_td_main``. Each shortcut is checked against the general path it skips, by
equivalence: the same seed and the same inputs must give the same actions,
the same random numbers consumed and the same tables.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import tdkit
from tdkit.exploration import Softmax


class _ThroughChoose(tdkit.QLearning):
    """Q-learning whose ``act`` must take the general path (``_choose`` with a mask array)."""

    def _choose(self, s: int, mask: np.ndarray | None, explore: bool) -> int:
        return super()._choose(s, mask, explore)


masks = st.lists(st.booleans(), min_size=4, max_size=4).filter(any)


@settings(max_examples=100)
@given(
    seed=st.integers(0, 2**32 - 1),
    steps=st.lists(
        st.tuples(st.integers(0, 2), st.integers(0, 3), st.sampled_from([-1.0, 0.0, 1.0]),
                  st.integers(0, 2), st.booleans(), st.none() | masks, st.none() | masks),
        min_size=1, max_size=30,
    ),
    explore=st.booleans(),
)
def test_act_shortcut_equals_the_general_path_draw_for_draw(seed, steps, explore):
    fast = tdkit.QLearning(3, 4, step_size=0.5, exploration=0.3, seed=seed)
    general = _ThroughChoose(3, 4, step_size=0.5, exploration=0.3, seed=seed)
    assert fast._own_choose and not general._own_choose
    for s, a, r, s2, terminated, mask, next_mask in steps:
        m = None if mask is None else np.array(mask, dtype=np.int8)  # Taxi-like int8 masks
        m2 = None if next_mask is None else np.array(next_mask)
        chosen = fast.act(s, mask=m, explore=explore)
        assert chosen == general.act(s, mask=m, explore=explore)
        assert type(chosen) is int and (m is None or m[chosen])
        for agent in (fast, general):
            agent.observe(s, a, r, s2, terminated, False, next_mask=m2)
            agent.update()
    assert fast.table.tolist() == general.table.tolist()
    assert fast.rng.random() == general.rng.random()  # the same numbers were consumed


def test_an_overridden_choose_is_what_act_calls():
    calls = []

    class Recording(tdkit.QLearning):
        def _choose(self, s, mask, explore):
            calls.append((s, None if mask is None else mask.tolist(), explore))
            return super()._choose(s, mask, explore)

    agent = Recording(3, 2, seed=0)
    agent.act(1)
    agent.act(2, mask=np.array([0, 1], dtype=np.int8), explore=False)
    assert calls == [(1, None, True), (2, [False, True], False)]


@pytest.mark.parametrize("exploration", [Softmax(1.0), tdkit.exploration.UCB(1.0)])
def test_rules_other_than_epsilon_greedy_return_python_ints(exploration):
    agent = tdkit.QLearning(2, 3, exploration=exploration, seed=0)
    mask = np.array([True, False, True])
    actions = [agent.act(0, mask=mask) for _ in range(20)]
    assert all(type(a) is int and a in (0, 2) for a in actions)


def test_queued_transitions_are_plain_tuples_in_transition_order():
    agent = tdkit.QLearning(3, 2, seed=0)
    agent.observe(0, 1, 2.0, 2, False, False)
    (queued,) = agent._pending
    assert type(queued) is tuple
    assert tdkit.agent.Transition(*queued) == (0, 1, 2.0, 2, False, False, None)
    # end_episode settles it as a time-limit truncation: the target still bootstraps.
    agent._q[2] = [3.0, 1.0]
    (error,) = agent.end_episode()
    assert error == pytest.approx(2.0 + 0.99 * 3.0)
    assert agent.episodes_ == 1


@pytest.mark.parametrize("cls", [tdkit.QLearning, tdkit.Sarsa])
def test_td_errors_and_table_entries_stay_python_floats(cls):
    agent = cls(2, 2, step_size=0.5, seed=0)
    agent.observe(0, 0, np.float64(1.0), 1, np.bool_(False), False)
    (error,) = agent.update()
    assert type(error) is float and type(agent._qv[0]) is float
    assert agent.visits[0, 0] == 1


@pytest.mark.parametrize("cls", [tdkit.QLearning, tdkit.Sarsa])
def test_an_overridden_td_step_is_what_learn_calls(cls):
    calls = []

    class Recording(cls):
        def _td_step(self, values, visits, s, a, target, weight=1.0):
            calls.append((s, a, target))
            return super()._td_step(values, visits, s, a, target, weight)

    agent = Recording(2, 1, gamma=0.5, step_size=1.0, seed=0)
    agent.observe(0, 0, 1.0, 1, False, False)
    assert agent.update() == (1.0,) and calls == [(0, 0, 1.0)]
    assert not agent._own_td_step and cls(2, 1)._own_td_step

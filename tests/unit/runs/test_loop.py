"""The training and evaluation loops, History, and the inventory demo scenario."""

from __future__ import annotations

import numpy as np
import pytest

import tdkit
from tdkit import QLearning, Sarsa
from tdkit.envs.inventory import InventoryEnv
from tdkit.loop import episode_seed


class Chain:
    """States 0..n-1 on a line; action 1 moves right, 0 left; reward -1 a step.

    Entering state n-1 terminates. ``reset(seed)`` picks a random start with
    its own generator, so env seeding shows up in the trajectory.
    """

    def __init__(self, n=6):
        self.n = n
        self.rng = np.random.default_rng()

    def reset(self, seed=None):
        self.rng = np.random.default_rng(seed)
        self.pos = int(self.rng.integers(self.n - 1))
        return self.pos, {}

    def step(self, action):
        slip = self.rng.random() < 0.1
        move = (1 if action == 1 else -1) * (-1 if slip else 1)
        self.pos = min(max(self.pos + move, 0), self.n - 1)
        return self.pos, -1.0, self.pos == self.n - 1, False, {}


def run(agent_seed, train_seed):
    agent = QLearning(6, 2, gamma=0.95, exploration=0.2, seed=agent_seed)
    history = tdkit.train(agent, Chain(), episodes=50, seed=train_seed)
    return history, agent.table.copy()


def test_same_seeds_reproduce_the_run_exactly():
    h1, t1 = run(1, 2)
    h2, t2 = run(1, 2)
    np.testing.assert_array_equal(h1.returns, h2.returns)
    np.testing.assert_array_equal(h1.td_abs_mean, h2.td_abs_mean)
    np.testing.assert_array_equal(t1, t2)
    h3, _ = run(1, 3)
    assert not np.array_equal(h1.returns, h3.returns)


def test_episode_seeds_are_a_pure_function_of_root_and_index():
    root = np.random.SeedSequence(5)
    seeds = [episode_seed(root, k) for k in range(100)]
    assert seeds == [episode_seed(np.random.SeedSequence(5), k) for k in range(100)]
    assert len(set(seeds)) == 100


def test_steps_budget_stops_mid_episode_and_marks_it_unfinished():
    agent = QLearning(6, 2, seed=0)
    history = tdkit.train(agent, Chain(), steps=37, seed=0)
    assert history.total_steps == 37
    assert agent.steps_ == 37
    ends = [rec["end"] for rec in history.to_records()]
    assert all(e == "terminated" for e in ends[:-1])
    assert ends[-1] in ("terminated", "unfinished")


def test_max_episode_steps_truncates_continuing_simulators():
    class Forever:
        def reset(self, seed=None):
            return 0, {}

        def step(self, action):
            return 0, 1.0, False, False, {}

    history = tdkit.train(QLearning(1, 2, seed=0), Forever(), episodes=3, max_episode_steps=7)
    assert history.lengths.tolist() == [7, 7, 7]
    assert [r["end"] for r in history.to_records()] == ["truncated"] * 3
    assert history.returns.tolist() == [7.0, 7.0, 7.0]


def test_callbacks_can_stop_training():
    seen = []

    def stop_after_five(history, agent):
        seen.append(len(history))
        return len(history) >= 5

    history = tdkit.train(
        QLearning(6, 2, seed=0), Chain(), episodes=100, callbacks=[stop_after_five]
    )
    assert len(history) == 5 and seen == [1, 2, 3, 4, 5]


@pytest.mark.parametrize(
    ("kwargs", "word"),
    [({}, "episodes"), ({"episodes": 0}, "episodes"), ({"steps": -1}, "steps"),
     ({"episodes": 1, "max_episode_steps": 0}, "max_episode_steps"),
     ({"episodes": 1, "seed": "x"}, "seed")],
)
def test_bad_loop_arguments(kwargs, word):
    with pytest.raises(ValueError, match=word):
        tdkit.train(QLearning(6, 2, seed=0), Chain(), **kwargs)


@pytest.mark.parametrize("cls", [QLearning, Sarsa, tdkit.ExpectedSarsa, tdkit.DoubleQLearning])
def test_masks_from_info_are_honoured_in_training(cls):
    # InventoryEnv raises on an order that does not fit the shelf, so one
    # masked action taken anywhere in 20 * 52 steps would fail the test.
    env = InventoryEnv()
    agent = cls.for_env(env, exploration=0.5, seed=0)
    history = tdkit.train(agent, env, episodes=20, seed=0)
    assert history.lengths.tolist() == [52] * 20
    assert set(history.ends.tolist()) == {1}  # truncated by the 52-week horizon


def test_history_records_and_frame():
    history, _ = run(0, 0)
    records = history.to_records()
    assert len(records) == len(history) == 50
    assert set(records[0]) == {
        "episode", "return", "length", "end", "td_count", "td_abs_mean", "td_abs_max", "seconds"
    }
    assert records[3]["return"] == history.returns[3]
    assert all(r["td_count"] == r["length"] for r in records)  # one TD error per step
    pd = pytest.importorskip("pandas")
    frame = history.to_frame()
    assert isinstance(frame, pd.DataFrame) and len(frame) == 50
    again = tdkit.History.from_arrays(history.to_arrays())
    assert again.to_records() == records


def test_history_memory_is_per_episode_not_per_step():
    class Forever:
        def reset(self, seed=None):
            return 0, {}

        def step(self, action):
            return 0, 0.0, False, False, {}

    history = tdkit.train(QLearning(1, 1, seed=0), Forever(), episodes=2, max_episode_steps=20_000)
    assert len(history) == 2 and history.total_steps == 40_000
    assert len(history.to_arrays()["returns"]) == 2


def test_evaluate_is_greedy_and_does_not_learn():
    agent = QLearning(6, 2, gamma=0.95, seed=0)
    tdkit.train(agent, Chain(), episodes=200, seed=0)
    before = agent.table.copy()
    returns = tdkit.evaluate(agent, Chain(), episodes=20, seed=1, max_episode_steps=50)
    np.testing.assert_array_equal(agent.table, before)
    assert returns.shape == (20,)
    assert returns.max() <= 0 and returns.min() >= -50


def test_inventory_model_matches_simulation():
    # The exact model (used by the demo for the DP optimum) against 20,000
    # simulated weeks from stock 2 ordering 3: the mean reward must agree
    # within 5 standard errors (a correct model fails this with prob. < 1e-6).
    env = InventoryEnv()
    P, R = env.transition_model()
    np.testing.assert_allclose(P.sum(axis=2), 1.0, atol=1e-12)
    rewards, nexts = [], []
    for k in range(20_000):
        env.reset(seed=k, options={"stock": 2})
        s2, r, *_ = env.step(3)
        rewards.append(r)
        nexts.append(s2)
    rewards = np.array(rewards)
    se = rewards.std(ddof=1) / np.sqrt(len(rewards))
    assert abs(rewards.mean() - R[2, 3]) < 5 * se
    freq = np.bincount(nexts, minlength=11) / len(nexts)
    np.testing.assert_allclose(freq, P[2, 3], atol=5 * np.sqrt(0.25 / 20_000))


def test_inventory_rejects_orders_that_do_not_fit():
    env = InventoryEnv(capacity=5)
    _, info = env.reset(seed=0, options={"stock": 4})
    assert info["action_mask"].tolist() == [True, True, False, False, False, False]
    with pytest.raises(ValueError, match="action_mask"):
        env.step(3)


def test_progress_bar_runs_when_tqdm_is_installed(capsys):
    pytest.importorskip("tqdm")
    history = tdkit.train(QLearning(6, 2, seed=0), Chain(), episodes=5, progress=True)
    assert len(history) == 5
    assert "5/5" in capsys.readouterr().err

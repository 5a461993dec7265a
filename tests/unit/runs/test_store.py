"""Saving, loading and checkpoint/resume: exact round trips and refusal of bad files."""

from __future__ import annotations

import json
import zipfile

import gymnasium as gym
import numpy as np
import pytest

import tdkit
from tdkit import StoreError
from tdkit.encoders import HashIndexEncoder
from tdkit.schedules import Linear, VisitCount

LEARNERS = [tdkit.QLearning, tdkit.Sarsa, tdkit.ExpectedSarsa, tdkit.DoubleQLearning]


def trained(cls, **kwargs):
    env = gym.make("FrozenLake-v1")
    agent = cls.for_env(env, seed=3, **kwargs)
    tdkit.train(agent, env, episodes=40, seed=1)
    return agent, env


@pytest.mark.parametrize("cls", LEARNERS)
def test_round_trip_restores_tables_counters_and_random_state(cls, tmp_path):
    agent, env = trained(cls, step_size=VisitCount(0.7), exploration=Linear(1.0, 0.1, 500))
    path = tdkit.save(agent, tmp_path / "agent.npz")
    again = tdkit.load(path)
    assert type(again) is cls
    np.testing.assert_array_equal(again.table, agent.table)
    np.testing.assert_array_equal(again.visits, agent.visits)
    assert again.steps_ == agent.steps_ and again.episodes_ == agent.episodes_
    assert again.get_params()["step_size"] == VisitCount(0.7)
    # Same generator state: both continue identically.
    h1 = tdkit.train(agent, env, episodes=20, seed=9)
    h2 = tdkit.train(again, env, episodes=20, seed=9)
    np.testing.assert_array_equal(h1.returns, h2.returns)
    np.testing.assert_array_equal(again.table, agent.table)


def test_hash_index_encoder_states_survive(tmp_path):
    enc = HashIndexEncoder(capacity=10)
    agent = tdkit.QLearning(10, 2, seed=0, state_encoder=enc)
    agent.observe(("a", 1), 0, 1.0, ("b", 2), False, False)
    agent.update()
    again = tdkit.load(tdkit.save(agent, tmp_path / "h.npz"))
    assert again.q_values(("a", 1))[0] == pytest.approx(0.1)
    assert again.state_encoder.encode(("b", 2)) == 1


def test_pending_transitions_refuse_to_save_and_leave_old_file_intact(tmp_path):
    path = tmp_path / "agent.npz"
    agent = tdkit.QLearning(3, 2, seed=0)
    tdkit.save(agent, path)
    before = path.read_bytes()
    agent.observe(0, 1, 1.0, 2, False, False)
    with pytest.raises(StoreError, match="update"):
        tdkit.save(agent, path)
    assert path.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["agent.npz"]  # no temporary left over


def test_tampered_file_is_refused(tmp_path):
    agent, _ = trained(tdkit.QLearning)
    path = tdkit.save(agent, tmp_path / "agent.npz")
    with np.load(path) as archive:
        contents = {k: archive[k] for k in archive.files}
    contents["state/_q"] = contents["state/_q"] + 1.0  # someone edits the table
    np.savez(path, **contents)
    with pytest.raises(StoreError, match="SHA-256"):
        tdkit.load(path)


def test_truncated_file_is_refused(tmp_path):
    agent, _ = trained(tdkit.QLearning)
    path = tdkit.save(agent, tmp_path / "agent.npz")
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with pytest.raises(StoreError, match="truncated"):
        tdkit.load(path)


def test_foreign_files_are_refused(tmp_path):
    plain = tmp_path / "plain.npz"
    np.savez(plain, x=np.arange(3))
    with pytest.raises(StoreError, match="meta"):
        tdkit.load(plain)
    text = tmp_path / "notes.npz"
    text.write_text("hello")
    with pytest.raises(StoreError):
        tdkit.load(text)
    with pytest.raises(StoreError, match="no such file"):
        tdkit.load(tmp_path / "missing.npz")


def test_object_arrays_are_never_unpickled(tmp_path):
    evil = tmp_path / "evil.npz"
    meta = json.dumps({"format": "tdkit-agent", "format_version": 1}).encode()
    np.savez(evil, meta=np.frombuffer(meta, dtype=np.uint8),
             payload=np.array([object()], dtype=object))
    with pytest.raises(StoreError):
        tdkit.load(evil)


def test_wrong_version_and_kind_are_named(tmp_path):
    agent = tdkit.QLearning(3, 2, seed=0)
    path = tdkit.save(agent, tmp_path / "a.npz")
    with zipfile.ZipFile(path) as z:
        meta = json.loads(np.lib.format.read_array(z.open("meta.npy")).tobytes())
    meta["format_version"] = 99
    with np.load(path) as archive:
        contents = {k: archive[k] for k in archive.files}
    contents["meta"] = np.frombuffer(json.dumps(meta).encode(), dtype=np.uint8)
    np.savez(path, **contents)
    with pytest.raises(StoreError, match="version 99"):
        tdkit.load(path)


def test_callable_parameters_cannot_be_saved_silently(tmp_path):
    class Custom(tdkit.QLearning):
        _extra_params = ("hook",)

        def __init__(self, *args, hook=None, **kwargs):
            self.hook = hook
            super().__init__(*args, **kwargs)

    agent = Custom(2, 2, hook=lambda x: x)
    with pytest.raises(StoreError, match="hook"):
        tdkit.save(agent, tmp_path / "c.npz")


@pytest.mark.parametrize("cls", LEARNERS)
def test_resumed_run_equals_the_uninterrupted_run(cls, tmp_path):
    def fresh():
        return cls(16, 4, gamma=0.95, step_size=0.2, exploration=0.3, seed=5)

    env = gym.make("FrozenLake-v1")
    whole = fresh()
    h_whole = tdkit.train(whole, env, episodes=120, seed=11)

    ckpt = tmp_path / "run.npz"
    first = fresh()
    h_first = tdkit.train(first, env, episodes=50, seed=11, checkpoint=ckpt, checkpoint_every=25)
    assert len(h_first) == 50
    resumed = fresh()  # a new process would build the agent again, then resume
    h_resumed = tdkit.train(resumed, gym.make("FrozenLake-v1"), episodes=120, seed=11,
                            resume=ckpt)
    np.testing.assert_array_equal(h_resumed.returns, h_whole.returns)
    np.testing.assert_array_equal(h_resumed.lengths, h_whole.lengths)
    np.testing.assert_array_equal(resumed.table, whole.table)


def test_resume_refuses_other_hyper_parameters_or_seed(tmp_path):
    env = gym.make("FrozenLake-v1")
    ckpt = tmp_path / "run.npz"
    tdkit.train(tdkit.QLearning(16, 4, seed=0), env, episodes=5, seed=1, checkpoint=ckpt)
    with pytest.raises(StoreError, match="step_size"):
        tdkit.train(tdkit.QLearning(16, 4, step_size=0.3, seed=0), env, episodes=10,
                    resume=ckpt)
    with pytest.raises(StoreError, match="Sarsa"):
        tdkit.train(tdkit.Sarsa(16, 4, seed=0), env, episodes=10, resume=ckpt)
    with pytest.raises(ValueError, match="seed"):
        tdkit.train(tdkit.QLearning(16, 4, seed=0), env, episodes=10, seed=2, resume=ckpt)
    with pytest.raises(StoreError, match="load_checkpoint"):
        tdkit.load(ckpt)


def _every_learner():
    """(id, factory) for every learner in tdkit.learners, with its non-array state exercised."""
    uniform = np.full((16, 4), 0.25)
    special = {
        "TD0": {"policy": uniform},
        "TDLambda": {"policy": uniform, "lam": 0.8},
        "DynaQ": {"model": "counts"},
        "DynaQPlus": {"kappa": 0.01},
        "PrioritizedSweeping": {"model": "counts"},
        "NStepSarsa": {"n": 3},
        "TreeBackup": {"n": 3},
        "SarsaLambda": {"lam": 0.9, "trace": "dutch"},
        "WatkinsQLambda": {"lam": 0.9},
    }
    return [
        pytest.param(name, special.get(name, {}), id=name) for name in tdkit.learners.__all__
        if not name.startswith("Differential")  # no gamma: tests/unit/learners/test_differential.py
    ]


@pytest.mark.parametrize(("name", "extra"), _every_learner())
def test_every_learner_round_trips_and_resumes_exactly(name, extra, tmp_path):
    cls = getattr(tdkit.learners, name)

    def fresh():
        return cls(16, 4, gamma=0.95, step_size=0.2, seed=5, **extra)

    env = gym.make("FrozenLake-v1")
    whole = fresh()
    h_whole = tdkit.train(whole, env, episodes=60, seed=11)

    ckpt = tmp_path / "run.npz"
    tdkit.train(fresh(), env, episodes=30, seed=11, checkpoint=ckpt)
    resumed = fresh()
    h_resumed = tdkit.train(resumed, env, episodes=60, seed=11, resume=ckpt)
    np.testing.assert_array_equal(h_resumed.returns, h_whole.returns)
    np.testing.assert_array_equal(resumed.table if name not in ("TD0", "TDLambda")
                                  else resumed.values_table,
                                  whole.table if name not in ("TD0", "TDLambda")
                                  else whole.values_table)

    again = tdkit.load(tdkit.save(whole, tmp_path / "agent.npz"))
    h1 = tdkit.train(whole, env, episodes=10, seed=3)
    h2 = tdkit.train(again, env, episodes=10, seed=3)
    np.testing.assert_array_equal(h1.returns, h2.returns)


def test_saving_mid_episode_is_refused_with_the_reason(tmp_path):
    agent = tdkit.NStepSarsa(4, 2, n=3, seed=0)
    agent.observe(0, 1, 1.0, 1, False, False)
    agent.update()  # the 3-step return is not complete: the step stays buffered
    with pytest.raises(StoreError, match="middle of an episode"):
        tdkit.save(agent, tmp_path / "x.npz")


def test_checkpoints_are_taken_at_episode_boundaries_only(tmp_path):
    # A step budget that ends mid-episode must not checkpoint the half episode:
    # multi-step buffers would be mid-flight, and a resumed run would skip the
    # rest of that episode, which the uninterrupted run plays out.
    env = gym.make("FrozenLake-v1")

    def fresh():
        return tdkit.NStepSarsa(16, 4, n=3, gamma=0.95, step_size=0.2, seed=5)

    whole = fresh()
    h_whole = tdkit.train(whole, env, episodes=40, seed=2)
    ckpt = tmp_path / "run.npz"
    partial = fresh()
    h_part = tdkit.train(partial, env, steps=100, seed=2, checkpoint=ckpt, checkpoint_every=1)
    assert h_part.to_records()[-1]["end"] == "unfinished"  # the budget cut an episode
    resumed = fresh()
    h_resumed = tdkit.train(resumed, env, episodes=40, seed=2, resume=ckpt)
    np.testing.assert_array_equal(h_resumed.returns, h_whole.returns)
    np.testing.assert_array_equal(resumed.table, whole.table)


class _TupleWalk:
    """A 1-D walk whose observations are tuples (indexed by a HashIndexEncoder)."""

    def reset(self, seed=None):
        self.x = 0
        return ("x", 0), {}

    def step(self, action):
        self.x = max(0, self.x + (1 if action == 1 else -1))
        done = self.x == 3
        return ("x", self.x), float(done), done, False, {}


def test_a_growing_state_index_is_restored_on_resume(tmp_path):
    def fresh():
        return tdkit.QLearning(10, 2, exploration=0.5, seed=2,
                               state_encoder=HashIndexEncoder(capacity=10))

    whole = fresh()
    h_whole = tdkit.train(whole, _TupleWalk(), episodes=30, seed=4)
    ckpt = tmp_path / "walk.npz"
    tdkit.train(fresh(), _TupleWalk(), episodes=10, seed=4, checkpoint=ckpt)
    resumed = fresh()
    h = tdkit.train(resumed, _TupleWalk(), episodes=30, seed=4, resume=ckpt)
    np.testing.assert_array_equal(h.returns, h_whole.returns)
    np.testing.assert_array_equal(resumed.table, whole.table)
    assert resumed.state_encoder.states == whole.state_encoder.states

    other = fresh()
    other.state_encoder.register([("x", 2), ("x", 0)])  # indexes in another order
    with pytest.raises(StoreError, match="state_encoder"):
        tdkit.store.load_checkpoint(ckpt, other)

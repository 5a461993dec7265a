"""History: views without copies, bounded memory per episode, one row layout, linear checkpoints."""

from __future__ import annotations

import os
import tracemalloc

import numpy as np
import pytest

import tdkit
from tdkit import History, StoreError
from tdkit.history import COLUMNS, EPISODE_ENDS, ROW_BYTES
from tdkit.store import load_checkpoint, save_checkpoint

RECORD_KEYS = ["episode", "return", "length", "end", "td_count", "td_abs_mean", "td_abs_max",
               "seconds"]


def filled(n: int, seed: int = 0) -> History:
    rng = np.random.default_rng(seed)
    h = History()
    for i in range(n):
        count = int(rng.integers(0, 4))
        h.add_episode(ret=float(rng.normal()), length=int(rng.integers(1, 50)),
                      end=EPISODE_ENDS[i % 3], td_count=count, td_abs_sum=0.5 * count,
                      td_abs_max=0.25, seconds=float(i))
    return h


def test_columns_are_read_only_views_not_copies():
    h = filled(100)
    first, second = h.returns, h.returns
    assert np.shares_memory(first, second)  # both views of the same storage: no copy
    for name in COLUMNS:
        column = getattr(h, name)
        assert len(column) == 100 and not column.flags.writeable
        with pytest.raises(ValueError):
            column[0] = 0
    snapshot = h.returns
    h.add_episode(ret=9.0, length=1, end="terminated", td_count=1, td_abs_sum=1.0,
                  td_abs_max=1.0)
    assert len(snapshot) == 100 and len(h.returns) == 101 and h.returns[-1] == 9.0


def test_reading_returns_after_every_episode_allocates_nothing_per_episode():
    # The early-stopping pattern: a callback reads history.returns after each episode.
    # With copies this allocates O(E) per read; with views the peak stays O(1).
    h = filled(20_000)
    tracemalloc.start()
    for _ in range(1000):
        r = h.returns
        _ = r[-10:].mean()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert peak < 20_000 * 8 / 4  # a single copy of the column would be 160 kB


def test_memory_per_episode_is_bounded_by_twice_the_row():
    h = filled(10_000)
    held = sum(column.nbytes for column in h._columns.values())
    assert ROW_BYTES == 49
    assert 10_000 * ROW_BYTES <= held <= 2 * 10_000 * ROW_BYTES


def test_records_and_frame_have_one_layout_with_or_without_episodes():
    empty, full = History(), filled(5)
    assert empty.to_records() == []
    assert [list(r) for r in full.to_records()] == [RECORD_KEYS] * 5
    assert full.to_records()[2]["end"] == "unfinished" and full.to_records()[4]["seconds"] == 4.0
    pytest.importorskip("pandas")
    assert list(empty.to_frame().reset_index().columns) == RECORD_KEYS
    assert list(full.to_frame().reset_index().columns) == RECORD_KEYS


def test_seconds_default_to_the_time_since_the_previous_episode():
    h = History()
    for _ in range(3):
        h.add_episode(ret=0.0, length=1, end="terminated", td_count=0, td_abs_sum=0.0,
                      td_abs_max=0.0)
    assert (h.seconds >= 0).all() and np.isfinite(h.seconds).all()
    trained = tdkit.train(tdkit.QLearning(16, 4, seed=0), "FrozenLake-v1", episodes=5, seed=0)
    assert len(trained.seconds) == 5 and (trained.seconds > 0).all()


def test_an_unknown_end_is_refused_by_name():
    with pytest.raises(tdkit.InvalidParameterError, match="end"):
        History().add_episode(ret=0.0, length=1, end="done", td_count=0, td_abs_sum=0.0,
                              td_abs_max=0.0)


# ------------------------------------------------------------------ checkpoint costs
def _bytes_written() -> int:
    with open("/proc/self/io") as handle:
        for line in handle:
            if line.startswith("wchar:"):
                return int(line.split()[1])
    raise RuntimeError("no wchar line")  # pragma: no cover


needs_proc_io = pytest.mark.skipif(not os.path.exists("/proc/self/io"),
                                   reason="counts bytes through Linux /proc/self/io")


@needs_proc_io
def test_bytes_written_per_checkpoint_do_not_grow_with_the_episode_count(tmp_path):
    # Issue 10: each checkpoint rewrote the whole History (120k episodes: 7x overhead).
    # Now a checkpoint writes the learner file (fixed size) plus the rows recorded since the
    # previous checkpoint. Count the bytes really written (the kernel's wchar counter).
    agent = tdkit.QLearning(16, 4, seed=0)
    path = tmp_path / "run.npz"
    history = History()
    costs = []
    for episode in range(1, 40_001):
        history.add_episode(ret=1.0, length=1, end="terminated", td_count=1, td_abs_sum=0.1,
                            td_abs_max=0.1, seconds=0.0)
        if episode % 2000 == 0:
            loop = {"episode": episode, "total_steps": episode, "root_entropy": "1",
                    "root_spawn_key": []}
            before = _bytes_written()
            save_checkpoint(path, agent, loop, history)
            costs.append(_bytes_written() - before)
    later = costs[1:]  # the first checkpoint writes its 2000 rows whole, as a new file
    # Each later checkpoint appends 2000 rows (98 kB) and rewrites the learner file; only a
    # few digits of the JSON metadata grow. Rewriting the History would add 98 kB each time.
    assert max(later) - min(later) < 256, later
    assert max(later) < 2000 * ROW_BYTES + 20_000
    _, resumed = load_checkpoint(path, tdkit.QLearning(16, 4, seed=0))
    assert len(resumed) == 40_000 and resumed.to_records() == history.to_records()


@needs_proc_io
def test_total_checkpoint_bytes_of_a_run_are_linear_in_its_episodes(tmp_path):
    class OneStep:  # the one-step episodes
        def reset(self, seed=None):
            return 0, {}

        def step(self, action):
            return 0, 1.0, True, False, {}

    def written(episodes: int) -> int:
        before = _bytes_written()
        tdkit.train(tdkit.QLearning(1, 2, seed=0), OneStep(), episodes=episodes, seed=0,
                    checkpoint=tmp_path / f"run{episodes}.npz", checkpoint_every=500)
        return _bytes_written() - before

    small, large = written(5_000), written(20_000)
    # Linear: 4x the episodes write 4x the bytes. Rewriting the History at each checkpoint
    # makes it quadratic: 16x. The threshold 6 sits far from both.
    assert large / small < 6, (small, large)


def test_a_crash_between_append_and_checkpoint_resumes_from_the_older_checkpoint(tmp_path):
    env = "FrozenLake-v1"
    path = tmp_path / "run.npz"

    def fresh():
        return tdkit.QLearning(16, 4, gamma=0.95, step_size=0.2, seed=5)

    whole = fresh()
    h_whole = tdkit.train(whole, env, episodes=60, seed=3)
    tdkit.train(fresh(), env, episodes=30, seed=3, checkpoint=path, checkpoint_every=10)
    sidecar = tmp_path / "run.npz.history"
    with open(sidecar, "ab") as handle:  # rows of a checkpoint whose learner file never came
        handle.write(b"\x07" * (5 * ROW_BYTES))
    resumed = fresh()
    h = tdkit.train(resumed, env, episodes=60, seed=3, resume=path, checkpoint=path,
                    checkpoint_every=10)
    np.testing.assert_array_equal(h.returns, h_whole.returns)
    np.testing.assert_array_equal(resumed.table, whole.table)
    _, again = load_checkpoint(path, fresh())
    np.testing.assert_array_equal(again.returns, h_whole.returns)


def test_an_altered_history_sidecar_is_refused(tmp_path):
    path = tmp_path / "run.npz"
    tdkit.train(tdkit.QLearning(16, 4, seed=0), "FrozenLake-v1", episodes=20, seed=0,
                checkpoint=path, checkpoint_every=5)
    sidecar = tmp_path / "run.npz.history"
    data = bytearray(sidecar.read_bytes())
    data[-3] ^= 0xFF
    sidecar.write_bytes(bytes(data))
    with pytest.raises(StoreError, match="SHA-256"):
        load_checkpoint(path, tdkit.QLearning(16, 4, seed=0))
    sidecar.write_bytes(bytes(data[:-10]))
    with pytest.raises(StoreError, match="truncated"):
        load_checkpoint(path, tdkit.QLearning(16, 4, seed=0))
    sidecar.unlink()
    with pytest.raises(StoreError, match="History"):
        load_checkpoint(path, tdkit.QLearning(16, 4, seed=0))


def test_resuming_into_another_checkpoint_path_writes_the_whole_history_there(tmp_path):
    first, second = tmp_path / "a.npz", tmp_path / "b.npz"
    tdkit.train(tdkit.QLearning(16, 4, seed=0), "FrozenLake-v1", episodes=20, seed=0,
                checkpoint=first, checkpoint_every=5)
    h = tdkit.train(tdkit.QLearning(16, 4, seed=0), "FrozenLake-v1", episodes=30, seed=0,
                    resume=first, checkpoint=second, checkpoint_every=5)
    _, saved = load_checkpoint(second, tdkit.QLearning(16, 4, seed=0))
    assert saved.to_records() == h.to_records() and len(saved) == 30


def test_a_sidecar_shortened_behind_the_runs_back_is_rewritten_whole(tmp_path):
    path = tmp_path / "run.npz"
    agent = tdkit.QLearning(2, 2, seed=0)
    history = filled(30)
    loop = {"episode": 30, "total_steps": 30, "root_entropy": "1", "root_spawn_key": []}
    save_checkpoint(path, agent, loop, history)
    sidecar = tmp_path / "run.npz.history"
    sidecar.write_bytes(sidecar.read_bytes()[:100])  # someone cut the file
    history.add_episode(ret=1.0, length=1, end="terminated", td_count=0, td_abs_sum=0.0,
                        td_abs_max=0.0, seconds=0.0)
    save_checkpoint(path, agent, {**loop, "episode": 31}, history)
    _, again = load_checkpoint(path, tdkit.QLearning(2, 2, seed=0))
    np.testing.assert_array_equal(again.returns, history.returns)


def test_max_bytes_must_be_a_positive_integer(tmp_path):
    path = tdkit.save(tdkit.QLearning(2, 2, seed=0), tmp_path / "a.npz")
    with pytest.raises(tdkit.InvalidParameterError, match="max_bytes"):
        tdkit.load(path, max_bytes="lots")


@pytest.mark.parametrize(
    ("section", "key", "value", "named"),
    [
        ("loop", "episode", -1, "loop.episode"),
        ("loop", "total_steps", 2.5, "loop.total_steps"),
        ("loop", "root_entropy", "abc", "loop.root_entropy"),
        ("loop", "root_spawn_key", [-1], "loop.root_spawn_key"),
        ("history", "rows", 10**12, "history.rows"),
        ("history", "rows", 31, "truncated"),
        ("history", "digest", "0" * 64, "SHA-256"),
    ],
)
def test_edited_checkpoint_positions_are_store_errors_naming_the_field(
        tmp_path, section, key, value, named):
    import json

    path = tmp_path / "run.npz"
    tdkit.train(tdkit.QLearning(16, 4, seed=0), "FrozenLake-v1", episodes=30, seed=0,
                checkpoint=path, checkpoint_every=10)
    with np.load(path) as archive:
        contents = {k: archive[k] for k in archive.files}
    meta = json.loads(contents["meta"].tobytes())
    meta[section][key] = value
    contents["meta"] = np.frombuffer(json.dumps(meta).encode(), dtype=np.uint8)
    np.savez(path, **contents)  # the metadata carries no digest of its own
    agent = tdkit.QLearning(16, 4, seed=0)
    before = agent.table.copy()
    with pytest.raises(StoreError, match=named):
        load_checkpoint(path, agent)
    np.testing.assert_array_equal(agent.table, before)

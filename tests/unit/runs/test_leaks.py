"""Small leaks: temporaries left by a killed writer, rewards that overflow a table."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

import tdkit
from tdkit import InvalidParameterError

SRC = str(Path(tdkit.__file__).resolve().parents[1])


def test_a_checkpoint_killed_mid_write_leaves_a_temporary_that_the_next_write_removes(tmp_path):
    # The child writes a checkpoint and is SIGKILLed while its temporary file is open
    # (it blocks in fsync, patched to wait), exactly like a kill during a real write.
    path = tmp_path / "run.npz"
    child = textwrap.dedent(f"""
        import os, sys, time
        sys.path.insert(0, {SRC!r})
        import tdkit
        def stuck(fd):
            open({str(tmp_path / 'ready')!r}, 'w').close()
            time.sleep(600)
        os.fsync = stuck
        tdkit.save(tdkit.QLearning(4, 2, seed=0), {str(path)!r})
    """)
    proc = subprocess.Popen([sys.executable, "-c", child])
    try:
        for _ in range(600):  # up to 60 s for the child to reach the write
            if (tmp_path / "ready").exists() or proc.poll() is not None:
                break
            time.sleep(0.1)
        assert (tmp_path / "ready").exists(), "the child never reached its write"
        os.kill(proc.pid, signal.SIGKILL)
    finally:
        proc.wait()
    stale = [p.name for p in tmp_path.iterdir() if p.name.endswith(".tmp")]
    assert len(stale) == 1 and stale[0].startswith(f".run.npz.{proc.pid}.")
    (tmp_path / "ready").unlink()

    tdkit.save(tdkit.QLearning(4, 2, seed=0), path)  # the next write to the same path
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run.npz"]
    assert tdkit.load(path).table.shape == (4, 2)


def test_temporaries_of_live_processes_and_of_other_files_are_left_alone(tmp_path):
    path = tmp_path / "agent.npz"
    alive = tmp_path / f".agent.npz.{os.getppid()}.abc.tmp"  # our parent is alive
    other = tmp_path / ".notes.npz.1.abc.tmp"  # another file's temporary
    foreign = tmp_path / ".agent.npz.backup.tmp"  # not tdkit's naming
    for p in (alive, other, foreign):
        p.write_bytes(b"x")
    tdkit.save(tdkit.QLearning(4, 2, seed=0), path)
    assert alive.exists() and other.exists() and foreign.exists()


def _overflow_learners():
    uniform = np.full((2, 1), 1.0)
    special = {"TD0": {"policy": uniform}, "DifferentialTD": {"policy": uniform},
               "TDLambda": {"policy": uniform}, "NStepSarsa": {"n": 1}, "TreeBackup": {"n": 1}}
    # The trace learners apply their updates through the shared trace step (every
    # trace kind), the others through _td_step: both refuse an overflow.
    params = [pytest.param(n, special.get(n, {}), id=n) for n in tdkit.learners.__all__]
    params += [pytest.param(n, {"trace": kind, **special.get(n, {})}, id=f"{n}-{kind}")
               for n in ("SarsaLambda", "WatkinsQLambda", "TDLambda")
               for kind in ("replacing", "dutch")]
    return params


@pytest.mark.filterwarnings("ignore:overflow encountered:RuntimeWarning")
@pytest.mark.parametrize(("name", "extra"), _overflow_learners())
def test_rewards_near_the_float_limit_raise_naming_the_step_and_leave_the_table(name, extra):
    # Two states in a loop, reward 1e308, gamma = 1, alpha = 1: the second update's target
    # 1e308 + 1e308 overflows to inf (IEEE 754 doubles top out near 1.8e308).
    cls = getattr(tdkit.learners, name)
    undiscounted = {} if name.startswith("Differential") else {"gamma": 1.0}
    agent = cls(2, 1, step_size=1.0, seed=0, **undiscounted, **extra)
    s = 0
    with pytest.raises(InvalidParameterError, match=r"at step \d+ .*overflows") as info:
        for _ in range(10):
            agent.observe(s, 0, 1e308, 1 - s, False, False)
            agent.update()
            before = (np.array(agent.table), np.array(agent.visits))
            s = 1 - s
    assert "rescale the rewards" in str(info.value)
    assert np.isfinite(agent.table).all()
    np.testing.assert_array_equal(agent.table, before[0])
    np.testing.assert_array_equal(agent.visits, before[1])

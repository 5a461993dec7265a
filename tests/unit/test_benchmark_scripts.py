"""Every script in ``benchmarks/`` runs at its smoke size and passes its own checks.

The scripts compare tdkit with hand-written code side by side, and several
refuse to print a ratio when the two did not do the same work (for example
``bench_step.py`` exits with an error unless tdkit and the hand-written
pure-Python agents end with the same table, and ``bench_vector.py`` compares
the tables of synchronous and asynchronous runs). Running them here keeps
those checks, and the scripts themselves, working; timings are not looked at
(no wall-clock limit in a unit test).
"""

from __future__ import annotations

import os
import pathlib
import subprocess
import sys

import pytest

import tdkit

BENCHMARKS = pathlib.Path(__file__).resolve().parents[2] / "benchmarks"
SCRIPTS = sorted(BENCHMARKS.glob("*.py"))


def test_the_scripts_are_found():
    assert {"bench_step.py", "calibrate_verify.py"} <= {p.name for p in SCRIPTS}


@pytest.mark.parametrize("script", SCRIPTS, ids=lambda p: p.name)
def test_a_benchmark_script_runs_at_smoke_size(script, tmp_path):
    # The same tdkit as this test imports, whether installed or on PYTHONPATH.
    here = str(pathlib.Path(tdkit.__file__).resolve().parents[1])
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([here, os.environ.get("PYTHONPATH", "")]))
    done = subprocess.run(
        [sys.executable, str(script), "--smoke"],
        cwd=tmp_path, env=env, capture_output=True, text=True, timeout=600,
    )
    output = f"{done.stdout[-2000:]}\n{done.stderr[-4000:]}"
    assert done.returncode == 0, f"{script.name} --smoke failed:\n{output}"
    assert done.stdout.strip(), f"{script.name} --smoke printed nothing"

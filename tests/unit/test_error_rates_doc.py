"""docs/verify.md's measured error rates are what the calibration files say.

The block from "**Measured" to the end marker of the "Error rates" section is
written by ``benchmarks/calibration/error_rates.py`` from the records in
``benchmarks/calibration/``; this test regenerates it and compares, so a
count, a table or an hour total in the docs cannot drift from the data (after
adding records, run the script with ``--write``).
"""

from __future__ import annotations

import os
import pathlib
import subprocess
import sys

import tdkit

ROOT = pathlib.Path(__file__).resolve().parents[2]
SCRIPT = ROOT / "benchmarks" / "calibration" / "error_rates.py"


def test_the_docs_hold_the_block_the_data_gives():
    here = str(pathlib.Path(tdkit.__file__).resolve().parents[1])
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([here, os.environ.get("PYTHONPATH", "")]))
    done = subprocess.run([sys.executable, str(SCRIPT)], env=env, capture_output=True,
                          text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-4000:]
    doc = (ROOT / "docs" / "verify.md").read_text()
    in_docs = doc[doc.index("**Measured"):doc.index("<!-- calibration: end -->")]
    assert in_docs.strip() == done.stdout.strip(), (
        "docs/verify.md's Error rates differ from benchmarks/calibration/: run "
        "python benchmarks/calibration/error_rates.py --write"
    )

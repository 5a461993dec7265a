"""The calibration script's summary counts each run of a check once.

``benchmarks/calibrate_verify.py`` combines records from pieces run on
different days, and re-measures changed checks with ``--checks``; a seed
covered twice must not count twice, and a re-measured check must replace the
older result of the same run.
"""

from __future__ import annotations

import importlib.util
import json
import pathlib

import pytest

SCRIPT = pathlib.Path(__file__).resolve().parents[2] / "benchmarks" / "calibrate_verify.py"


@pytest.fixture(scope="module")
def calibrate():
    spec = importlib.util.spec_from_file_location("_calibrate_verify", SCRIPT)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _record(seed, checks, commit="aaa", seconds=1.0, learner="QLearning"):
    return {"learner": learner, "variant": "defaults", "level": "quick", "seed": seed,
            "seconds": seconds, "commit": commit, "checks": dict(checks),
            "messages": {c: "why" for c, s in checks.items() if s == "failed"}}


def test_a_seed_run_twice_counts_once(calibrate):
    records = [_record(1, {"terminal": "passed", "convergence": "failed"}),
               _record(1, {"terminal": "passed", "convergence": "failed"}, commit="bbb"),
               _record(2, {"terminal": "passed", "convergence": "passed"})]
    merged = calibrate.merge_records(records)
    assert len(merged) == 2
    text = calibrate.summarize(records)
    assert "| quick | convergence | 1/2 |" in text
    assert "| quick | terminal | 0/2 |" in text


def test_a_re_measured_check_replaces_the_older_result_of_the_same_run(calibrate):
    old = _record(1, {"terminal": "passed", "convergence": "failed"}, seconds=5.0)
    new = _record(1, {"convergence": "passed"}, commit="bbb", seconds=2.0)
    (merged,) = calibrate.merge_records([old, new])
    assert merged["checks"] == {"terminal": "passed", "convergence": "passed"}
    assert merged["messages"] == {}  # the old failure's message went with it
    assert merged["seconds"] == 5.0 and merged["commit"] == "aaa+bbb"
    # The inputs are left as they were.
    assert old["checks"]["convergence"] == "failed"


def test_drop_and_merge_from_the_command_line(calibrate, tmp_path, capsys):
    first = tmp_path / "old.jsonl"
    second = tmp_path / "new.jsonl"
    first.write_text("\n".join(json.dumps(_record(s, {"terminal": "passed",
                                                      "convergence": "failed"}))
                               for s in (1, 2, 3)) + "\n")
    second.write_text("\n".join(json.dumps(_record(s, {"convergence": "passed"}, commit="bbb"))
                                for s in (1, 2)) + "\n")
    calibrate.main(["--summarize", str(first), str(second), "--drop", "convergence@aaa"])
    text = capsys.readouterr().out
    # Seed 3's old convergence result is dropped; seeds 1-2 are the re-measured ones.
    assert "| quick | convergence | 0/2 |" in text
    assert "| quick | terminal | 0/3 |" in text
    assert "| quick | QLearning | defaults | 2-3 | 0 | - |" in text.replace(
        "defaults = recommended", "defaults")


def test_resume_leaves_out_the_runs_the_file_holds(calibrate, tmp_path):
    from tdkit.verify import CHECK_NAMES

    out = tmp_path / "runs.jsonl"
    complete = _record(1, {name: "passed" for name in CHECK_NAMES})
    partial = _record(2, {"convergence": "passed"})
    out.write_text(json.dumps(complete) + "\n" + json.dumps(partial) + "\n"
                   + '{"learner": "QLearning", "vari')  # a line cut short by a stopped run
    jobs = [("QLearning", "defaults", "quick", s) for s in (1, 2, 3)]
    # complete reports: seed 1 is done; seed 2 holds one check only; seed 3 is new
    assert calibrate.pending_jobs(jobs, out) == jobs[1:]
    named = [(*job, ("convergence",)) for job in jobs]
    assert calibrate.pending_jobs(named, out) == named[2:]
    both = [(*job, ("convergence", "next_action")) for job in jobs]
    assert calibrate.pending_jobs(both, out) == both[1:]


def test_a_line_cut_short_is_removed_before_appending(calibrate, tmp_path):
    out = tmp_path / "runs.jsonl"
    whole = json.dumps(_record(1, {"terminal": "passed"})) + "\n"
    out.write_text(whole + '{"learner": "QLe')
    calibrate.drop_cut_line(out)
    assert out.read_text() == whole
    calibrate.drop_cut_line(out)  # a clean file is left as it is
    assert out.read_text() == whole


def test_seeds_with_a_step(calibrate):
    assert calibrate.parse_seeds("1-10:3") == [1, 4, 7, 10]
    assert calibrate.parse_seeds("1-3,8") == [1, 2, 3, 8]


def test_full_reports_that_share_seeds_are_counted_once(calibrate):
    # A full report at seed s runs seeds s, s + 1, s + 2: reports at 1 and 4 are disjoint,
    # those at 2 and 3 repeat runs of the report at 1 (and of 4).
    full = [dict(_record(s, {"convergence": "passed"}), level="full") for s in (1, 2, 3, 4)]
    quick = [_record(s, {"convergence": "passed"}) for s in (1, 2, 3)]
    kept, left_out = calibrate.independent_reports(full + quick)
    assert sorted((r["level"], r["seed"]) for r in kept) == [
        ("full", 1), ("full", 4), ("quick", 1), ("quick", 2), ("quick", 3)]
    assert left_out == 2
    text = calibrate.summarize(full)
    assert "| full | convergence | 0/2 |" in text and "2 full reports left out" in text

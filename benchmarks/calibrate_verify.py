"""Measure the verifier's error rates: false alarms on correct agents, detections of bugs.

Runs ``tdkit.verify.verify_agent`` on every tdkit learner (with its defaults
and with the settings docs/verify.md recommends) and on the deliberately
broken agents of tests/reference/test_verify_mutants.py, over many seeds, and prints
one table: for each learner and check, how often a correct agent failed it
(with the 95% upper confidence bound of the false-alarm rate,
Clopper-Pearson; 3/N for 0 of N), and for each mutant how often the check
that names its bug caught it.

Usage::

    python benchmarks/calibrate_verify.py --level quick --seeds 1-300 --jobs 2
    python benchmarks/calibrate_verify.py --learners QLearning,Sarsa --seeds 1-20
    python benchmarks/calibrate_verify.py --mutants-only --seeds 1-50 --named-check-only
    python benchmarks/calibrate_verify.py --checks next_action,convergence --mutants none
    python benchmarks/calibrate_verify.py --seeds 1-300 --out quick.jsonl --resume   # go on
    python benchmarks/calibrate_verify.py --shard 0/4 --out part0.jsonl   # a quarter
    python benchmarks/calibrate_verify.py --summarize part*.jsonl         # the table
    python benchmarks/calibrate_verify.py --smoke                         # seconds

Run it from the repository root with ``PYTHONPATH=src``. Every run is one
line of JSON in ``--out`` (appended), so pieces run on different days or
machines combine with ``--summarize``.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import pathlib
import sys
import time
from collections import defaultdict
from concurrent.futures import ProcessPoolExecutor

import numpy as np

ROOT = pathlib.Path(__file__).resolve().parent.parent

CONTROL = [
    "QLearning", "Sarsa", "ExpectedSarsa", "DoubleQLearning", "NStepSarsa", "TreeBackup",
    "SarsaLambda", "WatkinsQLambda", "DynaQ", "DynaQPlus", "PrioritizedSweeping",
    "DifferentialQLearning", "DifferentialSarsa",
]
PREDICTION = ["TD0", "TDLambda"]
VARIANTS = ("defaults", "recommended")


def _mutants_module():
    spec = importlib.util.spec_from_file_location(
        "_verify_mutants", ROOT / "tests" / "reference" / "test_verify_mutants.py"
    )
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def make_factory(name: str, variant: str):
    """The factory of a learner (``variant`` defaults or recommended) or of a mutant."""
    import tdkit
    import tdkit.learners

    if variant == "mutant":
        return _mutants_module().MUTANT_FACTORIES[name]
    cls = getattr(tdkit.learners, name)
    prediction = name in PREDICTION

    def make(env, seed):
        kwargs = {"seed": seed}
        if prediction:
            n, m = env.observation_space.n, env.action_space.n
            kwargs["policy"] = np.full((n, m), 1.0 / m)
        if variant == "recommended":
            kwargs.update(tdkit.verify.recommended_settings(name))
        return cls.for_env(env, **kwargs)

    make.__name__ = f"make_{name}_{variant}"
    return make


def same_as_defaults(name: str) -> bool:
    """True when ``recommended_settings(name)`` equals the learner's constructor defaults.

    The two variants then build the same agent and give the same report for a
    seed, so only ``defaults`` is run and its records stand for both rows.
    """
    import tdkit.learners
    from tdkit.verify import recommended_settings

    cls = getattr(tdkit.learners, name)
    defaults = cls(2, 2).get_params()
    return all(defaults.get(k) == v for k, v in recommended_settings(name).items())


def source_commit() -> str:
    """The git commit of the tree the runs use (``"unknown"`` outside a checkout)."""
    import subprocess

    try:
        out = subprocess.run(["git", "-C", str(ROOT), "rev-parse", "--short", "HEAD"],
                             capture_output=True, text=True, check=True)
    except (OSError, subprocess.CalledProcessError):
        return "unknown"
    return out.stdout.strip()


COMMIT = source_commit()


def run_one(job: tuple[str, str, str, int]) -> dict:
    name, variant, level, seed = job[:4]
    from tdkit.verify import run_check, verify_agent

    started = time.perf_counter()
    if len(job) > 4:  # only the checks named in job[4] (run_check), e.g. a planted bug's
        results = [run_check(make_factory(name, variant), check, level=level, seed=seed)
                   for check in job[4]]
        return {
            "learner": name, "variant": variant, "level": level, "seed": seed,
            "seconds": round(time.perf_counter() - started, 2), "commit": COMMIT,
            "checks": {r.name: r.status for r in results},
            "messages": {r.name: r.message for r in results if r.failed},
        }
    report = verify_agent(make_factory(name, variant), level=level, seed=seed)
    return {
        "learner": name, "variant": variant, "level": level, "seed": seed,
        "seconds": round(time.perf_counter() - started, 2), "commit": COMMIT,
        "checks": {c.name: c.status for c in report},
        "messages": {c.name: c.message for c in report if c.failed},
    }


def pending_jobs(jobs: list[tuple], out: pathlib.Path) -> list[tuple]:
    """The jobs whose runs ``out`` does not hold yet (for ``--resume``).

    A job that names its checks is done when a record of the same learner,
    settings, level and seed holds every one of them; a complete report is
    done when a record holds every check of the verifier. A last line cut
    short by a stopped run is ignored (and rewritten by the run).
    """
    from tdkit.verify import CHECK_NAMES

    held: dict[tuple, set[str]] = defaultdict(set)
    for line in out.read_text().splitlines():
        try:
            r = json.loads(line)
        except json.JSONDecodeError:
            continue
        held[(r["learner"], r["variant"], r["level"], r["seed"])].update(r["checks"])
    return [job for job in jobs
            if not set(job[4] if len(job) > 4 else CHECK_NAMES) <= held[tuple(job[:4])]]


def drop_cut_line(out: pathlib.Path) -> None:
    """Remove a last line that a stopped run left without its newline (appends start clean)."""
    if not out.exists():
        return
    data = out.read_bytes()
    if data and not data.endswith(b"\n"):
        out.write_bytes(data[: data.rfind(b"\n") + 1])


def parse_seeds(text: str) -> list[int]:
    """``"1-300"``, ``"1,2,5-9"`` or with a step, ``"1-298:3"`` (1, 4, ..., 298)."""
    seeds: list[int] = []
    for part in text.split(","):
        part, _, step = part.partition(":")
        if "-" in part:
            low, high = part.split("-")
            seeds.extend(range(int(low), int(high) + 1, int(step or 1)))
        else:
            seeds.append(int(part))
    return seeds


FULL_SPAN = 3
"""Seeds one ``full`` report runs: ``seed``, ``seed + 1``, ``seed + 2`` (``Context.seeds``)."""


def independent_reports(records: list[dict]) -> tuple[list[dict], int]:
    """Keep the records whose runs share no seed: every ``quick`` one, ``full`` at seeds 1, 4, ....

    A ``full`` report at seed ``s`` runs each check on seeds ``s``, ``s + 1`` and
    ``s + 2``, so reports at neighbouring seeds repeat two of their three runs:
    counted together they would not be independent, and the upper bounds
    (which assume independent runs) would be too tight. The summary keeps the
    ``full`` reports at ``seed % 3 == 1`` (disjoint triples; run them with
    ``--seeds 1-298:3``) and returns how many others it left out.
    """
    kept = [r for r in records if r["level"] != "full" or r["seed"] % FULL_SPAN == 1]
    return kept, len(records) - len(kept)


def upper_bound(failures: int, runs: int) -> float:
    """One-sided 95% Clopper-Pearson upper bound of a rate seen as failures / runs."""
    if runs == 0:
        return float("nan")
    if failures == runs:
        return 1.0
    from scipy.stats import beta

    return float(beta.ppf(0.95, failures + 1, runs - failures))


def merge_records(records: list[dict]) -> list[dict]:
    """One record per (level, learner, settings, seed): a check run twice counts once.

    Runs of the same seed are the same run (the verifier is deterministic per
    seed), so a seed that two pieces both ran, or a check re-measured with
    ``--checks`` after it changed, must not be counted twice. Later records
    (files later on the command line, lines later in a file) win per check;
    ``seconds`` is the largest of the merged records (the complete report).
    """
    merged: dict[tuple, dict] = {}
    for r in records:
        key = (r["level"], r["learner"], r["variant"], r["seed"])
        if key not in merged:
            merged[key] = {**r, "checks": dict(r["checks"]),
                           "messages": dict(r.get("messages", {}))}
            continue
        m = merged[key]
        m["checks"].update(r["checks"])
        for c in r["checks"]:
            m["messages"].pop(c, None)
        m["messages"].update(r.get("messages", {}))
        m["seconds"] = max(m["seconds"], r["seconds"])
        if r.get("commit") != m.get("commit"):
            m["commit"] = f"{m.get('commit')}+{r.get('commit')}"
    return list(merged.values())


def pooled_counts(records: list[dict]) -> dict[tuple[str, str], tuple[int, int]]:
    """(level, check) -> (failed, runs) over every correct agent's records (skips excluded)."""
    total: dict[tuple[str, str], list[int]] = defaultdict(lambda: [0, 0])
    for r in records:
        if r["variant"] == "mutant":
            continue
        for check, status in r["checks"].items():
            if status in ("passed", "failed"):
                total[(r["level"], check)][0] += status == "failed"
                total[(r["level"], check)][1] += 1
    return {key: (k, n) for key, (k, n) in total.items()}


def summarize(records: list[dict]) -> str:
    records, overlapping = independent_reports(merge_records(records))
    mutants = _mutants_module().MUTANT_CHECKS
    lines = []
    correct = [r for r in records if r["variant"] != "mutant"]
    broken = [r for r in records if r["variant"] == "mutant"]
    if correct:
        lines.append("False alarms on correct agents (failed / runs; 95% upper bound of the rate)")
        groups = defaultdict(list)
        for r in correct:
            groups[(r["level"], r["learner"], r["variant"])].append(r)
        checks = sorted({c for r in correct for c in r["checks"]})
        lines.append("| level | learner | settings | runs of each check (fewest-most) "
                     "| runs with a failure | failures by check | s/run |")
        lines.append("|---|---|---|---|---|---|---|")
        for (level, learner, variant), runs in sorted(groups.items()):
            if (variant == "defaults" and (level, learner, "recommended") not in groups
                    and learner not in PREDICTION and same_as_defaults(learner)):
                variant = "defaults = recommended"
            any_fail = sum(any(s == "failed" for s in r["checks"].values()) for r in runs)
            per, ran = [], []
            for c in checks:
                k = sum(r["checks"].get(c) == "failed" for r in runs)
                n_c = sum(r["checks"].get(c) in ("passed", "failed") for r in runs)
                if n_c:
                    ran.append(n_c)
                if k:
                    per.append(f"{c} {k}/{n_c}")
            secs = np.mean([r["seconds"] for r in runs])
            span = f"{min(ran)}-{max(ran)}" if ran and min(ran) != max(ran) else \
                f"{ran[0] if ran else 0}"
            lines.append(
                f"| {level} | {learner} | {variant} | {span} | {any_fail} | "
                f"{', '.join(per) or '-'} | {secs:.1f} |"
            )
        lines.append("")
        lines.append("Per check, all correct agents pooled (failed / runs in which the check "
                     "ran, skips excluded; 95% upper bound)")
        lines.append("| level | check | failed / runs | upper bound |")
        lines.append("|---|---|---|---|")
        for (level, c), (k, n) in sorted(pooled_counts(correct).items()):
            lines.append(f"| {level} | {c} | {k}/{n} | {upper_bound(k, n):.4f} |")
    commits = sorted({c for r in records for c in r.get("commit", "unknown").split("+")})
    lines.append("")
    lines.append(f"{len(records)} records; source commit(s): {', '.join(commits)}")
    if overlapping:
        lines.append(f"({overlapping} full reports left out: their seeds overlap those kept; "
                     "see independent_reports)")
    if broken:
        lines.append("")
        lines.append("Detections of planted bugs (caught by the check that names it / runs)")
        lines.append("| mutant | check | caught / runs | other checks failed (full reports) |")
        lines.append("|---|---|---|---|")
        groups = defaultdict(list)
        for r in broken:
            groups[(r["level"], r["learner"])].append(r)
        for (level, name), runs in sorted(groups.items()):
            check = mutants[name]
            runs = [r for r in runs if check in r["checks"]]
            k = sum(r["checks"].get(check) == "failed" for r in runs)
            others = sorted({c for r in runs for c, s in r["checks"].items()
                             if s == "failed" and c != check})
            lines.append(f"| {name} ({level}) | {check} | {k}/{len(runs)} | "
                         f"{', '.join(others) or '-'} |")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--level", choices=["quick", "full"], default="quick")
    parser.add_argument("--seeds", default="1-300", help="e.g. 1-300 or 1,2,5-9")
    parser.add_argument("--learners", default=",".join(CONTROL + PREDICTION))
    parser.add_argument("--variants", default=",".join(VARIANTS))
    parser.add_argument("--mutants", default="all", help="names, 'all' or 'none'")
    parser.add_argument("--mutants-only", action="store_true")
    parser.add_argument("--named-check-only", action="store_true",
                        help="for planted bugs, run only the check that names the bug")
    parser.add_argument("--checks", default=None,
                        help="comma-separated check names: run only these on the correct "
                             "learners (to re-measure checks changed since earlier records)")
    parser.add_argument("--resume", action="store_true",
                        help="with --out: leave out the runs the file already holds")
    parser.add_argument("--jobs", type=int, default=1)
    parser.add_argument("--shard", default="0/1", help="i/n: run every n-th job from i")
    parser.add_argument("--out", default=None, help="append one JSON line per run")
    parser.add_argument("--summarize", nargs="*", default=None, help="JSONL files to tabulate")
    parser.add_argument("--smoke", action="store_true", help="1 seed, 2 learners, 2 mutants")
    parser.add_argument("--drop", action="append", default=[], metavar="CHECK@COMMIT",
                        help="with --summarize: leave out a check's results from the records "
                             "of a commit whose version of that check was replaced")
    args = parser.parse_args(argv)
    if args.summarize is not None:
        records = [json.loads(line) for f in args.summarize
                   for line in pathlib.Path(f).read_text().splitlines() if line.strip()]
        for item in args.drop:
            check, _, commit = item.partition("@")
            for r in records:
                if r.get("commit") == commit and r["variant"] != "mutant":
                    r["checks"].pop(check, None)
                    r["messages"].pop(check, None)
        print(summarize(records))
        return 0
    seeds = parse_seeds(args.seeds)
    learners = [] if args.mutants_only else args.learners.split(",")
    variants = args.variants.split(",")
    all_mutants = list(_mutants_module().MUTANT_CHECKS)
    mutants = (all_mutants if args.mutants == "all" else
               [] if args.mutants == "none" else args.mutants.split(","))
    if args.smoke:
        seeds, learners, variants, mutants = [1], ["QLearning", "TD0"], ["defaults"], \
            all_mutants[:2]
    duplicates = {n for n in learners if n not in PREDICTION and same_as_defaults(n)}
    only = () if args.checks is None else (tuple(args.checks.split(",")),)
    jobs = [(n, v, args.level, s, *only) for s in seeds for n in learners for v in variants
            if not (v == "recommended" and n in duplicates and "defaults" in variants)]
    named = _mutants_module().MUTANT_CHECKS
    jobs += [(m, "mutant", args.level, s, *([(named[m],)] if args.named_check_only else []))
             for s in seeds for m in mutants]
    index, count = (int(x) for x in args.shard.split("/"))
    jobs = jobs[index::count]
    if args.resume and args.out and pathlib.Path(args.out).exists():
        before = len(jobs)
        jobs = pending_jobs(jobs, pathlib.Path(args.out))
        print(f"--resume: {before - len(jobs)} of {before} runs already in {args.out}")
    records = []
    if args.out:
        drop_cut_line(pathlib.Path(args.out))
    out = open(args.out, "a") if args.out else None
    started = time.perf_counter()
    try:
        if args.jobs > 1:
            with ProcessPoolExecutor(args.jobs) as pool:
                results = pool.map(run_one, jobs, chunksize=1)
                for record in results:
                    records.append(record)
                    if out:
                        out.write(json.dumps(record) + "\n")
                        out.flush()
        else:
            for job in jobs:
                record = run_one(job)
                records.append(record)
                if out:
                    out.write(json.dumps(record) + "\n")
                    out.flush()
    finally:
        if out:
            out.close()
    print(summarize(records))
    print(f"\n{len(records)} runs in {time.perf_counter() - started:.0f} s "
          f"(level {args.level}, jobs {args.jobs})")
    return 0


if __name__ == "__main__":
    sys.exit(main())

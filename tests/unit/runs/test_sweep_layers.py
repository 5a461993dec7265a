"""Layering of the runs modules (DESIGN.md, "Layers"): imports point down, never up.

Read from the source (``ast``), because ``import tdkit`` loads every layer anyway.
"""

from __future__ import annotations

import ast
import pathlib

import tdkit

SRC = pathlib.Path(tdkit.__file__).parent


def _imports(relative: str) -> set[str]:
    """Absolute dotted names of every module that ``src/tdkit/<relative>`` imports."""
    path = SRC / relative
    package = ["tdkit", *pathlib.PurePath(relative).parent.parts]
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            base = package[: len(package) - node.level + 1] if node.level else []
            module = ".".join([*base, *(node.module.split(".") if node.module else [])])
            found.add(module)
            found.update(f"{module}.{alias.name}" for alias in node.names)
    return found


def test_plot_reads_results_without_importing_the_sweep_runner():
    names = _imports("plot.py")
    assert "tdkit.runs._results" in names
    assert not {n for n in names if n.startswith(("tdkit.sweep", "tdkit.runs._dispatch",
                                                   "tdkit.runs._one_run"))}


def test_the_public_paths_still_reach_the_moved_names():
    from tdkit import sweep, verify
    from tdkit.runs._factories import AgentFactory
    from tdkit.runs._results import RunRecord, SweepResult, SweepRunError
    from tdkit.stats import ScoreSummary
    from tdkit.verify import performance

    assert verify.AgentFactory is AgentFactory and verify.factories.AgentFactory is AgentFactory
    assert (sweep.RunRecord, sweep.SweepResult, sweep.SweepRunError) == (
        RunRecord, SweepResult, SweepRunError)
    assert sweep.SettingSummary is ScoreSummary and performance.AgentScores is ScoreSummary
    assert verify.AgentScores is ScoreSummary

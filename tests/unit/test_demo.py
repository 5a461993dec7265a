"""The demo (``tdkit demo``): the table, the explanation, the figures, the command line."""

from __future__ import annotations

import contextlib
import io
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import tdkit
from tdkit.__main__ import _prog, main
from tdkit.demo import DEMO_LEARNERS, run_demo
from tdkit.envs.inventory import InventoryEnv

ROOT = next(p for p in Path(__file__).resolve().parents if (p / "pyproject.toml").exists())
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def quick_run(tmp_path_factory):
    """``tdkit demo --quick --out DIR`` once, in this process: (exit status, stdout, DIR)."""
    out = tmp_path_factory.mktemp("demo") / "figures"
    printed = io.StringIO()
    with contextlib.redirect_stdout(printed):
        status = main(["demo", "--quick", "--no-progress", "--out", str(out)])
    return status, printed.getvalue(), out


def test_quick_demo_prints_one_table_row_per_learner(quick_run):
    status, text, _ = quick_run
    assert status == 0
    rows = [line for line in text.splitlines() if line.startswith("  ")]
    for name in DEMO_LEARNERS:
        assert any(row.strip().startswith(name) and row.endswith(" s") for row in rows), name
    assert any(row.strip().startswith("optimum (value it.)") for row in rows)
    for column in ("value", "gap to optimum", "optimal orders", "time/run"):
        assert column in text


def test_quick_demo_explains_the_differences_and_points_to_the_docs(quick_run):
    _, text, _ = quick_run
    assert "Where the learned orders differ from the optimal ones" in text
    assert "optimal order tried" in text
    for stock in range(InventoryEnv().capacity + 1):   # one row per stock level
        assert any(line.split()[:1] == [str(stock)] for line in text.splitlines())
    assert text.splitlines()[-1].startswith("Next: docs/index.md")


def test_quick_demo_writes_png_figures_into_the_named_folder(quick_run):
    _, text, out = quick_run
    pytest.importorskip("matplotlib")
    names = sorted(p.name for p in out.iterdir())
    assert names == ["learning_curves.png", "orders_by_stock.png"]
    for name in names:
        data = (out / name).read_bytes()
        assert data[:8] == PNG_MAGIC and len(data) > 10_000   # a drawn figure, not a stub
        assert name in text
    assert str(out.resolve()) in text


def test_learned_values_are_exact_and_never_above_the_optimum():
    # The values in the table are exact (tdkit.evaluate_policy on the scenario's model), so
    # they must equal a recomputation from the returned orders, and no policy may exceed the
    # optimal value v* (its defining property; Puterman 1994, Theorem 6.2.2).
    result = run_demo(episodes=30, seeds=2, out=None, progress=False, echo=lambda line: None,
                      jobs=1)
    env = InventoryEnv()
    mdp = tdkit.FiniteMDP(*env.transition_model(), gamma=env.gamma)
    start = np.full(mdp.n_states, 1.0 / mdp.n_states)
    never = float(start @ tdkit.evaluate_policy(mdp, np.zeros(mdp.n_states, dtype=int)))
    for learner in result.learners.values():
        again = [float(start @ tdkit.evaluate_policy(mdp, o)) for o in learner.orders]
        np.testing.assert_allclose(learner.values, again, rtol=1e-12)
        assert (learner.values <= result.optimum + 1e-6).all()
        assert ((learner.optimal_share >= 0) & (learner.optimal_share <= 1)).all()
        # Orders respect the shelf: the greedy action is asked with the scenario's mask.
        assert (learner.orders + np.arange(mdp.n_states) <= env.capacity).all()
        assert learner.returns.shape == (2, 30) and learner.visits.sum() == 2 * 30 * env.weeks
        # Never ordering sells nothing after the first weeks; its exact value (about -2000,
        # lost-sale penalties for ever) is far below anything that orders at all.
        assert (learner.values > never).all()
    assert result.optimum == pytest.approx(
        float(start @ tdkit.policy_iteration(mdp).v), abs=1e-6
    )


def test_results_do_not_depend_on_the_number_of_worker_processes():
    kwargs = {"episodes": 15, "seeds": 2, "out": None, "progress": False,
              "echo": lambda line: None, "learners": ["Q-learning", "Double Q-learning"]}
    one, two = run_demo(jobs=1, **kwargs), run_demo(jobs=2, **kwargs)
    for name in kwargs["learners"]:
        np.testing.assert_array_equal(one.learners[name].orders, two.learners[name].orders)
        np.testing.assert_array_equal(one.learners[name].returns, two.learners[name].returns)


@pytest.mark.parametrize(
    ("kwargs", "words"),
    [
        ({"episodes": 0}, "episodes"),
        ({"seeds": 1.5}, "seeds"),
        ({"learners": ["Q learning"]}, "learners must be names from"),
        ({"learners": []}, "learners must be names from"),
        ({"jobs": 0}, "jobs"),
        ({"seed": -1}, "seed"),
    ],
)
def test_bad_arguments_are_refused_before_any_training(kwargs, words):
    with pytest.raises(tdkit.InvalidParameterError, match=words):
        run_demo(out=None, progress=False, echo=lambda line: None, **kwargs)


def test_the_command_line_reports_a_bad_count_with_exit_status_2(capsys):
    with pytest.raises(SystemExit) as info:
        main(["demo", "--episodes", "0", "--out", "unused"])
    assert info.value.code == 2
    assert "episodes" in capsys.readouterr().err


def test_missing_optional_packages_degrade_with_a_note(monkeypatch, tmp_path):
    # None in sys.modules makes the import fail, as if the package were not installed.
    monkeypatch.setitem(sys.modules, "matplotlib.figure", None)
    monkeypatch.setitem(sys.modules, "tqdm.auto", None)
    lines: list[str] = []
    result = run_demo(episodes=5, seeds=1, out=tmp_path / "figs", echo=lines.append,
                      learners=["Q-learning"], jobs=1)
    text = "\n".join(lines)
    assert result.figures == [] and not (tmp_path / "figs").exists()
    assert "matplotlib is not installed" in text and "tdkit[demo]" in text
    assert "tqdm is not installed" in text


@pytest.mark.parametrize(
    ("argv0", "prog"),
    [
        ("/home/me/venv/bin/tdkit", "tdkit"),
        ("C:\\venv\\Scripts\\tdkit.exe", "tdkit"),
        ("/home/me/src/tdkit/__main__.py", "python -m tdkit"),
        ("", "python -m tdkit"),
    ],
)
def test_program_name_matches_how_it_was_started(argv0, prog):
    assert _prog(argv0) == prog


def test_help_under_python_dash_m_names_python_dash_m_tdkit():
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT / "src"),
                                                        os.environ.get("PYTHONPATH", "")])}
    done = subprocess.run([sys.executable, "-m", "tdkit", "--help"], capture_output=True,
                          text=True, env=env, check=False)
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith("usage: python -m tdkit ")
    assert "demo" in done.stdout and "verify" in done.stdout


def test_help_through_an_installed_style_launcher_names_tdkit(tmp_path):
    # pip's console-script launcher is a file called "tdkit" that calls main();
    # sys.argv[0] is then that file's path.
    launcher = tmp_path / "tdkit"
    launcher.write_text("import sys\nfrom tdkit.__main__ import main\nsys.exit(main())\n",
                        encoding="utf-8")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT / "src"),
                                                        os.environ.get("PYTHONPATH", "")])}
    done = subprocess.run([sys.executable, str(launcher), "demo", "--help"],
                          capture_output=True, text=True, env=env, check=False)
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith("usage: tdkit demo ")

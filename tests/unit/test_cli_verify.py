"""``python -m tdkit verify package.module:factory``: the report table and the exit status."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from tdkit.__main__ import main
from tdkit.verify import CHECK_NAMES

ROOT = next(p for p in Path(__file__).resolve().parents if (p / "pyproject.toml").exists())

FACTORIES = textwrap.dedent(
    """
    import numpy as np
    import tdkit


    def good(env, seed):
        return tdkit.QLearning.for_env(env, step_size=0.5, exploration=0.1, seed=seed)


    class FirstIndex(tdkit.QLearning):
        def _choose(self, s, mask, explore):
            return int(np.argmax(self._q[s]))


    def first_index(env, seed):
        return FirstIndex.for_env(env, step_size=0.5, seed=seed)


    class Nested:
        make = staticmethod(good)

    not_callable = 3
    """
)


@pytest.fixture
def factories(tmp_path, monkeypatch):
    (tmp_path / "team_agents.py").write_text(FACTORIES, encoding="utf-8")
    monkeypatch.chdir(tmp_path)
    monkeypatch.syspath_prepend(str(tmp_path))
    yield "team_agents"
    sys.modules.pop("team_agents", None)


def test_a_passing_factory_prints_the_table_and_exits_0(factories, capsys):
    assert main(["verify", f"{factories}:good"]) == 0
    out = capsys.readouterr().out
    assert out.startswith(f"tdkit verify: {factories}:good -> QLearning")
    for name in CHECK_NAMES:
        if name != "average_reward":  # only for agents with an average_reward attribute
            assert f"PASS  {name}" in out
    assert "SKIP  average_reward" in out
    assert out.rstrip().endswith("PASSED")


def test_a_failing_factory_exits_1_and_says_how_to_reproduce(factories, capsys):
    assert main(["verify", f"{factories}:first_index", "--seed", "3"]) == 1
    out = capsys.readouterr().out
    assert "FAIL  tie_breaking" in out and "reproduce: seed=3, env=tie-probe" in out
    assert "level=quick, seed=3" in out and out.rstrip().endswith("FAILED")


def test_dotted_attributes_and_agent_classes_are_accepted(factories, capsys):
    assert main(["verify", f"{factories}:Nested.make"]) == 0
    assert main(["verify", "tdkit:QLearning"]) == 0
    assert "tdkit:QLearning -> QLearning" in capsys.readouterr().out


@pytest.mark.parametrize(
    ("spec", "words"),
    [
        ("no_colon", "expected package.module:factory"),
        ("no_such_module_xyz:make", "cannot import module 'no_such_module_xyz'"),
        ("team_agents:missing", "has no attribute 'missing'"),
        ("team_agents:not_callable", "not a callable"),
    ],
)
def test_a_bad_spec_exits_2_with_a_clear_message(factories, capsys, spec, words):
    assert main(["verify", spec]) == 2
    assert words in capsys.readouterr().err


def test_level_is_validated_by_the_parser(capsys):
    with pytest.raises(SystemExit) as info:
        main(["verify", "tdkit:QLearning", "--level", "medium"])
    assert info.value.code == 2
    assert "invalid choice: 'medium'" in capsys.readouterr().err


def test_the_module_entry_point_returns_the_status_to_the_shell(factories):
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT / "src"),
                                                        os.environ.get("PYTHONPATH", "")])}
    done = subprocess.run(
        [sys.executable, "-m", "tdkit", "verify", f"{factories}:first_index"],
        capture_output=True, text=True, env=env, check=False,
    )
    assert done.returncode == 1, done.stderr
    assert "FAIL  tie_breaking" in done.stdout


def test_demo_subcommand_is_still_there(capsys):
    with pytest.raises(SystemExit) as info:
        main(["demo", "--help"])
    assert info.value.code == 0
    assert "--episodes" in capsys.readouterr().out


def test_load_factory_leaves_sys_path_as_it_found_it(tmp_path, monkeypatch):
    import sys

    from tdkit.verify._cli import load_factory

    (tmp_path / "my_factory_mod.py").write_text(
        "import tdkit\n"
        "def make(env, seed):\n"
        "    return tdkit.QLearning.for_env(env, seed=seed)\n"
    )
    monkeypatch.chdir(tmp_path)
    monkeypatch.setattr(sys, "path", [p for p in sys.path if p not in ("", str(tmp_path))])
    before = list(sys.path)
    assert callable(load_factory("my_factory_mod:make"))
    assert sys.path == before

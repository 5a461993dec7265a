"""The public surface is a decision: __all__ matches the exports; the design's names exist."""

from __future__ import annotations

import inspect
import types

import tdkit

# Names from the design contract (shared/DESIGN.md), used by tests outside this repository.
CONTRACT = [
    "Agent", "QLearning", "Sarsa", "ExpectedSarsa", "DoubleQLearning", "NStepSarsa",
    "TreeBackup", "SarsaLambda", "WatkinsQLambda", "DynaQ", "DynaQPlus",
    "PrioritizedSweeping", "TD0", "TDLambda", "FiniteMDP", "value_iteration",
    "policy_iteration", "evaluate_policy", "bellman_residual", "train", "evaluate", "save",
    "load", "verify", "testing", "envs", "schedules", "exploration", "encoders",
]
CONTRACT += ["DifferentialQLearning", "DifferentialSarsa", "DifferentialTD", "relative_value_iteration", "policy_gain"]  # noqa: E501


def test_all_lists_exactly_the_public_names():
    # Every public non-module attribute is in __all__, and everything in __all__ exists.
    # (Submodules such as tdkit.loop appear as attributes when imported; only the
    # modules users are meant to reach are listed.)
    public = {
        name for name, value in vars(tdkit).items()
        if not name.startswith("_") and name != "annotations"
        and not isinstance(value, types.ModuleType)
    }
    assert public <= set(tdkit.__all__)
    assert all(hasattr(tdkit, name) for name in tdkit.__all__)
    assert len(tdkit.__all__) == len(set(tdkit.__all__))


def test_contract_names_exist():
    for name in CONTRACT:
        assert hasattr(tdkit, name), name
    for name in ("verify_agent", "assert_agent", "compare_updates", "compare_performance"):
        assert callable(getattr(tdkit.verify, name))
    assert callable(tdkit.envs.adapt)
    assert callable(tdkit.envs.problems.garnet)
    assert callable(tdkit.testing.strategies.finite_mdps)
    assert callable(tdkit.FiniteMDP.from_successors)
    assert callable(tdkit.FiniteMDP.from_gymnasium)
    for name in ("Constant", "Linear", "Exponential", "VisitCount"):
        assert hasattr(tdkit.schedules, name)
    for name in ("EpsilonGreedy", "Softmax", "UCB"):
        assert hasattr(tdkit.exploration, name)


def test_every_learner_has_the_shared_constructor_and_for_env():
    for name in CONTRACT[1:14]:
        cls = getattr(tdkit, name)
        params = inspect.signature(cls.__init__).parameters
        assert "seed" in params or "kwargs" in params, name
        assert callable(cls.for_env), name
        assert isinstance(cls.__doc__, str) and "References" in cls.__doc__, name

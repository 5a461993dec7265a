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


def _public_modules() -> list[types.ModuleType]:
    """tdkit and every module below it whose dotted path has no private (``_``) part."""
    import importlib
    import pkgutil

    names = ["tdkit"] + [
        info.name for info in pkgutil.walk_packages(tdkit.__path__, "tdkit.")
        if not any(part.startswith("_") for part in info.name.split("."))
    ]
    return [importlib.import_module(name) for name in names]


PUBLIC_MODULES = _public_modules()


def test_every_public_module_declares_its_surface_in_all():
    # Each public module and subpackage says what it offers: __all__ exists, has no
    # duplicates, names only things that exist, and holds every public class or
    # function the module defines itself (anything else would be public by accident).
    assert len(PUBLIC_MODULES) > 20  # the walk found the subpackages, not just tdkit
    for module in PUBLIC_MODULES:
        name = module.__name__
        assert isinstance(getattr(module, "__all__", None), list | tuple), name
        exported = list(module.__all__)
        assert len(exported) == len(set(exported)), name
        missing = [n for n in exported if not hasattr(module, n)]
        assert not missing, f"{name}.__all__ names what does not exist: {missing}"
        defined_here = {
            n for n, value in vars(module).items()
            if not n.startswith("_")
            and (inspect.isclass(value) or inspect.isfunction(value))
            and getattr(value, "__module__", None) == name
        }
        unlisted = sorted(defined_here - set(exported))
        assert not unlisted, f"{name} defines public {unlisted} but leaves them out of __all__"


def test_every_exported_class_and_function_has_a_docstring():
    for module in PUBLIC_MODULES:
        for n in module.__all__:
            value = getattr(module, n)
            if inspect.isclass(value) or inspect.isfunction(value):
                assert inspect.getdoc(value), f"{module.__name__}.{n} has no docstring"

"""``python -m tdkit verify package.module:factory``: load a factory, print the report."""

from __future__ import annotations

import dataclasses
import importlib
import os
import sys
from typing import Any, TextIO

from .._errors import InvalidParameterError
from ._runner import verify_agent
from .factories import agent_factory

__all__ = ["load_factory", "main_verify"]


def load_factory(spec: str) -> Any:
    """Import ``module:attribute`` (the attribute may be dotted) and return it.

    An agent class with ``for_env`` (``tdkit:QLearning``) becomes
    ``agent_factory(cls)``. The current directory is importable while the
    module is imported, as with ``python -m``; ``sys.path`` is restored after.

    Raises
    ------
    InvalidParameterError
        If the spec is malformed, the module cannot be imported, the attribute
        is missing or the object is not callable.
    """
    module_name, sep, attribute = spec.partition(":")
    if not sep or not module_name or not attribute:
        raise InvalidParameterError(
            f"verify: expected package.module:factory; got {spec!r}. Example: "
            "python -m tdkit verify my_agents.tests:make_agent"
        )
    added = os.getcwd() not in sys.path
    if added:
        sys.path.insert(0, os.getcwd())
    try:
        obj: Any = importlib.import_module(module_name)
    except ImportError as exc:
        raise InvalidParameterError(
            f"verify: cannot import module {module_name!r} ({exc}); check the name and that it "
            "is on the Python path (run from the project directory or install it)."
        ) from None
    finally:
        if added:  # importable for this import only: the caller's sys.path is left as it was
            sys.path.remove(os.getcwd())
    for part in attribute.split("."):
        try:
            obj = getattr(obj, part)
        except AttributeError:
            raise InvalidParameterError(
                f"verify: {module_name!r} has no attribute {attribute!r}; give the name of a "
                "make_agent(env, seed) function."
            ) from None
    if isinstance(obj, type) and hasattr(obj, "for_env"):
        return agent_factory(obj)
    if not callable(obj):
        raise InvalidParameterError(
            f"verify: {spec!r} is {obj!r:.60}, not a callable make_agent(env, seed)."
        )
    return obj


def main_verify(
    spec: str, *, level: str = "quick", seed: int = 0, out: TextIO | None = None,
    err: TextIO | None = None,
) -> int:
    """Run the verifier on the factory named by ``spec``; print the report.

    Returns the exit status: 0 when every check passed (or was skipped), 1
    when a check failed, 2 when the factory could not be loaded.
    """
    out = sys.stdout if out is None else out
    err = sys.stderr if err is None else err
    try:
        factory = load_factory(spec)
        report = verify_agent(factory, level=level, seed=seed)
    except InvalidParameterError as exc:
        print(f"error: {exc}", file=err)
        return 2
    report = dataclasses.replace(report, factory=spec)
    print(report, file=out)
    return 0 if report.passed else 1

"""pytest helpers: every verifier check as its own parametrized test.

Needs pytest (the ``test`` extra).

Examples
--------
In a team's test file::

    from tdkit.testing.pytest_helpers import parametrize_agent_checks

    @parametrize_agent_checks(make_agent, level="quick")
    def test_agent(agent_check):
        agent_check()     # fails with the check's message, or skips with its reason

gives one test per check, with ids such as ``test_agent[masks]``.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from dataclasses import dataclass
from typing import Any

import pytest

from .._errors import InvalidParameterError
from ..verify import CHECK_NAMES, CheckResult, run_check

__all__ = ["AgentCheck", "agent_checks", "parametrize_agent_checks"]


@dataclass(frozen=True)
class AgentCheck:
    """One verifier check bound to a factory; call it inside a test."""

    make_agent: Callable[[Any, int], Any]
    name: str
    level: str = "quick"
    seed: int = 0

    def run(self) -> CheckResult:
        """Run the protocol check and this check; return this check's record."""
        return run_check(self.make_agent, self.name, level=self.level, seed=self.seed)

    def __call__(self) -> CheckResult:
        """Run the check: ``pytest.skip`` if it does not apply, ``AssertionError`` if it fails."""
        result = self.run()
        if result.skipped:
            pytest.skip(f"{self.name}: {result.message}")
        if result.failed:
            raise AssertionError(str(result))
        return result

    def __repr__(self) -> str:
        return f"AgentCheck({self.name!r}, level={self.level!r}, seed={self.seed})"


def agent_checks(
    make_agent: Callable[[Any, int], Any],
    *,
    level: str = "quick",
    seed: int = 0,
    checks: Iterable[str] | None = None,
) -> list[Any]:
    """``pytest.param`` objects, one per check (id = the check's name)."""
    names = tuple(CHECK_NAMES if checks is None else checks)
    unknown = [n for n in names if n not in CHECK_NAMES]
    if unknown:
        raise InvalidParameterError(
            f"agent_checks: unknown check(s) {unknown}; choose from {list(CHECK_NAMES)}."
        )
    return [pytest.param(AgentCheck(make_agent, n, level, seed), id=n) for n in names]


def parametrize_agent_checks(
    make_agent: Callable[[Any, int], Any],
    *,
    level: str = "quick",
    seed: int = 0,
    checks: Iterable[str] | None = None,
    argname: str = "agent_check",
) -> Any:
    """A ``pytest.mark.parametrize`` decorator giving the test one :class:`AgentCheck` per check.

    Parameters
    ----------
    make_agent : callable
        ``make_agent(env, seed) -> agent``, as for :func:`tdkit.verify.verify_agent`.
    level, seed
        As for :func:`~tdkit.verify.verify_agent`.
    checks : iterable of str, optional
        A subset of :data:`tdkit.verify.CHECK_NAMES` (default: all).
    argname : str, default "agent_check"
        Name of the test's argument.
    """
    return pytest.mark.parametrize(
        argname, agent_checks(make_agent, level=level, seed=seed, checks=checks)
    )

"""Check records and the verification report (one record per check)."""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field

__all__ = ["FAILED", "PASSED", "SKIPPED", "CheckResult", "VerificationReport"]

PASSED = "passed"
FAILED = "failed"
SKIPPED = "skipped"

_LABELS = {PASSED: "PASS", FAILED: "FAIL", SKIPPED: "SKIP"}


@dataclass(frozen=True)
class CheckResult:
    """The outcome of one check.

    Attributes
    ----------
    name : str
        The check's name (``"terminal"``, ``"masks"``, ...).
    status : {"passed", "failed", "skipped"}
        ``"skipped"`` means the check does not apply to this agent; ``message``
        says why. A skipped check never counts as passed.
    message : str
        One line with the values seen (and, on failure, the values expected).
    seed : int or None
        The seed given to ``make_agent`` (and the root of the environment seeds)
        in the run that decided the outcome.
    env : str or None
        The probe environment of that run.
    where : str or None
        Where in that run the outcome was decided (``"episode 12, step 1"``,
        ``"after 300 episodes"``).
    rebuild : str or None
        Python code that rebuilds the deciding run through ``tdkit.train``
        (``make_agent`` stands for the factory verified; the environment comes
        from :mod:`tdkit.verify.probes` or :mod:`tdkit.envs.problems`).
    """

    name: str
    status: str
    message: str
    seed: int | None = None
    env: str | None = None
    where: str | None = None
    rebuild: str | None = None

    @property
    def passed(self) -> bool:
        """True when the check ran and passed."""
        return self.status == PASSED

    @property
    def failed(self) -> bool:
        """True when the check ran and failed."""
        return self.status == FAILED

    @property
    def skipped(self) -> bool:
        """True when the check did not apply."""
        return self.status == SKIPPED

    @property
    def reproduce(self) -> str:
        """How to reproduce the deciding run, or ``""``.

        The code of :attr:`rebuild` when the check set it, followed by where
        the outcome was decided; otherwise seed, environment and place.
        """
        place = ""
        if self.where is not None:
            place = self.where if self.where.startswith("after") else f"at {self.where}"
        if self.rebuild is not None:
            return self.rebuild + (f"  # decided {place}" if place else "")
        parts = []
        if self.seed is not None:
            parts.append(f"seed={self.seed}")
        if self.env is not None:
            parts.append(f"env={self.env}")
        if place:
            parts.append(place)
        return ", ".join(parts)

    def __str__(self) -> str:
        text = f"{_LABELS.get(self.status, self.status)} {self.name}: {self.message}"
        if self.reproduce and not self.skipped:
            text += f" [{self.reproduce}]"
        return text


@dataclass(frozen=True)
class VerificationReport:
    """What :func:`tdkit.verify.verify_agent` found: one :class:`CheckResult` per check.

    ``report.passed`` is True when no check failed (skipped checks do not
    fail, and are listed with their reason). ``str(report)`` is a table.
    """

    checks: tuple[CheckResult, ...]
    level: str
    seed: int
    agent: str = "agent"
    kind: str = ""
    factory: str = field(default="make_agent")

    @property
    def passed(self) -> bool:
        """True when no check failed."""
        return not any(c.failed for c in self.checks)

    @property
    def failures(self) -> tuple[CheckResult, ...]:
        """The failed checks."""
        return tuple(c for c in self.checks if c.failed)

    def __iter__(self) -> Iterator[CheckResult]:
        return iter(self.checks)

    def __len__(self) -> int:
        return len(self.checks)

    def __getitem__(self, name: str) -> CheckResult:
        """The record of the check called ``name``."""
        for check in self.checks:
            if check.name == name:
                return check
        raise KeyError(f"no check named {name!r}; checks: {[c.name for c in self.checks]}")

    def __str__(self) -> str:
        header = (
            f"tdkit verify: {self.factory} -> {self.agent}"
            + (f" ({self.kind})" if self.kind else "")
            + f", level={self.level}, seed={self.seed}"
        )
        width = max([len(c.name) for c in self.checks] + [5])
        lines = [header, f"  {'':4}  {'check':<{width}}  details"]
        lines.append(f"  {'-' * 4}  {'-' * width}  {'-' * 40}")
        for check in self.checks:
            label = _LABELS.get(check.status, check.status)
            lines.append(f"  {label:<4}  {check.name:<{width}}  {check.message}")
            if check.failed and check.reproduce:
                lines.append(f"  {'':4}  {'':<{width}}  reproduce: {check.reproduce}")
        counts = {s: sum(c.status == s for c in self.checks) for s in (PASSED, FAILED, SKIPPED)}
        verdict = "PASSED" if self.passed else "FAILED"
        lines.append(
            f"{counts[PASSED]} passed, {counts[FAILED]} failed, {counts[SKIPPED]} skipped: "
            + verdict
        )
        return "\n".join(lines)

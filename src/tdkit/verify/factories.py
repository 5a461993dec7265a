"""Picklable agent factories (public path; they live in :mod:`tdkit.runs._factories`)
and the settings recommended for verifying tdkit's own learners."""

from __future__ import annotations

from typing import Any

from ..runs._factories import AgentFactory, agent_factory

__all__ = ["AgentFactory", "agent_factory", "recommended_settings"]

#: Settings docs/verify.md recommends for verifying tdkit learners, by class name.
#: Step size 0.1; on-policy learners decay exploration to 0.01 (Singh et al. 2000,
#: GLIE) so that they approach Q*; planning learners use the counts model.
_ON_POLICY = ("Sarsa", "ExpectedSarsa", "NStepSarsa", "SarsaLambda")
_EXTRA: dict[str, dict[str, Any]] = {
    "NStepSarsa": {"n": 3},
    "TreeBackup": {"n": 3},
    "SarsaLambda": {"lam": 0.8},
    "WatkinsQLambda": {"lam": 0.8},
    "DynaQ": {"planning_steps": 5, "model": "counts"},
    "DynaQPlus": {"planning_steps": 5, "kappa": 1e-4, "model": "counts"},
    "PrioritizedSweeping": {"planning_steps": 5, "model": "counts"},
    "TDLambda": {"lam": 0.8},
}


def recommended_settings(name: str) -> dict[str, Any]:
    """Keyword arguments docs/verify.md recommends for the tdkit learner class ``name``.

    Examples
    --------
    >>> recommended_settings("TreeBackup")
    {'n': 3, 'step_size': 0.1, 'exploration': 0.1}
    """
    from ..schedules import Exponential

    kwargs: dict[str, Any] = dict(_EXTRA.get(name, {}), step_size=0.1)
    if name in ("TD0", "TDLambda"):
        return kwargs
    kwargs["exploration"] = Exponential(0.2, 0.999, 0.01) if name in _ON_POLICY else 0.1
    return kwargs

"""Picklable agent factories: ``make_agent(env, seed)`` for any learner class."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from .._errors import InvalidParameterError

__all__ = ["AgentFactory", "agent_factory", "recommended_settings"]


@dataclass(frozen=True)
class AgentFactory:
    """``make_agent(env, seed)`` that builds ``cls.for_env(env, seed=seed, **kwargs)``.

    Classes without ``for_env`` are called as ``cls(env, seed=seed, **kwargs)``.
    Keywords passed to the call add to (and override) ``kwargs``, so one
    factory serves every setting of a :func:`tdkit.sweep.run_sweep`:
    ``make(env, seed, step_size=0.5)``.
    Instances pickle (when ``cls`` and the keyword values do), so they can be
    sent to the worker processes of a ``concurrent.futures`` executor.
    """

    cls: Any
    kwargs: dict[str, Any] = field(default_factory=dict)

    def __call__(self, env: Any, seed: int, **setting: Any) -> Any:
        kwargs = {**self.kwargs, **setting} if setting else self.kwargs
        build = getattr(self.cls, "for_env", None)
        if build is not None:
            return build(env, seed=seed, **kwargs)
        return self.cls(env, seed=seed, **kwargs)

    def __repr__(self) -> str:
        args = "".join(f", {k}={v!r}" for k, v in self.kwargs.items())
        return f"agent_factory({getattr(self.cls, '__name__', self.cls)!r}{args})"


def agent_factory(cls: Any, **kwargs: Any) -> AgentFactory:
    """Return a picklable ``make_agent(env, seed)`` for ``cls`` with fixed keywords.

    Examples
    --------
    >>> import tdkit
    >>> make = agent_factory(tdkit.QLearning, step_size=0.5)
    >>> from tdkit.envs.problems import random_walk
    >>> make(random_walk(5).to_env(), 0).step_size
    0.5
    """
    if not callable(cls):
        raise InvalidParameterError(
            f"agent_factory: cls must be an agent class (or callable); got {cls!r:.80}."
        )
    if "seed" in kwargs:
        raise InvalidParameterError(
            "agent_factory: do not pass seed=...; the factory receives the seed of each run."
        )
    return AgentFactory(cls, dict(kwargs))


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

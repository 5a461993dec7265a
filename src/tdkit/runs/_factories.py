"""Picklable agent factories: ``make_agent(env, seed)`` for any learner class.

A runs-layer module: :mod:`tdkit.sweep` and :mod:`tdkit.verify` both use it
(``tdkit.verify.agent_factory`` is the public path), so the sweep needs nothing
from the verifier.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from .._errors import InvalidParameterError

__all__ = ["AgentFactory", "agent_factory"]


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

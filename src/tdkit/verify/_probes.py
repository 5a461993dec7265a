"""The probe environments' wrapper :class:`ProbeEnv` (the probes: :mod:`tdkit.verify.probes`).

Kept apart from the public module because it implements ``step`` (a wrapper
around the model's own environment); every episode on it is still driven by
:func:`tdkit.runs.run_episode`. The probe builders were importable from here
before they became public; they still are.
"""

from __future__ import annotations

from typing import Any

import gymnasium
import numpy as np

__all__ = ["ProbeEnv"]


class ProbeEnv(gymnasium.Wrapper):
    """A probe model's environment: masks in ``info``, aliased terminal observations.

    Attributes
    ----------
    violations : list of (episode, step, state, action)
        Masked actions the agent took (the step is then carried out anyway);
        episodes count the calls of ``reset``, from 0.
    """

    def __init__(
        self,
        env: gymnasium.Env,
        *,
        name: str,
        alias: dict[int, int],
        masks: np.ndarray | None,
    ) -> None:
        super().__init__(env)
        self.name = name
        self._alias = alias
        self._masks = masks
        self._state: int | None = None
        self._episode = -1
        self._step = 0
        self.violations: list[tuple[int, int, int, int]] = []

    def _info(self, info: dict, state: int) -> dict:
        if self._masks is None:
            return info
        return {**info, "action_mask": self._masks[state].copy()}

    def reset(self, *, seed: int | None = None, options: dict | None = None) -> tuple[Any, dict]:
        obs, info = self.env.reset(seed=seed, options=options)
        self._state = int(obs)
        self._episode += 1
        self._step = 0
        return obs, self._info(info, self._state)

    def step(self, action: Any) -> tuple[Any, float, bool, bool, dict]:
        if self._masks is not None and not self._masks[self._state, int(action)]:
            self.violations.append((self._episode, self._step, self._state, int(action)))
        self._step += 1
        obs, reward, terminated, truncated, info = self.env.step(action)
        self._state = int(obs)
        info = self._info(info, self._state)
        if terminated and self._state in self._alias:
            obs = self._alias[self._state]
        return obs, reward, terminated, truncated, info


def __getattr__(name: str) -> Any:
    """The probe builders, from :mod:`tdkit.verify.probes` (their public home)."""
    from . import probes

    if name in probes.__all__:
        return getattr(probes, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")

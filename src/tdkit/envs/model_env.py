"""A gymnasium environment that samples a :class:`~tdkit.envs.finite.FiniteMDP`."""

from __future__ import annotations

import numbers
from typing import TYPE_CHECKING, Any

import gymnasium

from .._errors import EnvironmentProtocolError, InvalidParameterError
from ._successors import sample_slot, successor_tables

if TYPE_CHECKING:
    from .finite import FiniteMDP

__all__ = ["FiniteMDPEnv"]


class FiniteMDPEnv(gymnasium.Env):
    """Sample a finite MDP through the gymnasium ``reset``/``step`` interface.

    Built by :meth:`FiniteMDP.to_env`. Observations are state indices in
    ``Discrete(S)``, actions are indices in ``Discrete(A)``.

    * ``reset(seed=...)`` seeds the env's own ``np_random`` (gymnasium's
      contract) and draws the start state from ``mdp.initial``.
    * ``step(a)`` draws the successor from the model's successor slots with
      one uniform number from ``np_random``; the reward is the per-transition
      reward when the model has one, else the expected reward ``R[s, a]``.
      ``terminated`` is true on entering a terminal state. ``truncated`` is
      true when ``max_episode_steps`` steps have been taken and the episode
      did not terminate on that step.
    * Stepping a terminal state keeps it there with reward 0.
    * When the model has action masks, ``info["action_mask"]`` (from
      ``reset`` and ``step``) is the read-only boolean row of the current
      state. A masked action is still carried out as the model's row says
      (as gymnasium's Taxi does); learners are expected not to choose it.

    Attributes
    ----------
    mdp : FiniteMDP
        The sampled model.
    gamma : float
        Its discount (``env.unwrapped.gamma``).
    max_episode_steps : int or None
        Truncation horizon.
    """

    metadata: dict[str, Any] = {"render_modes": []}  # noqa: RUF012 (gymnasium's convention)

    def __init__(self, mdp: FiniteMDP, *, max_episode_steps: int | None = None) -> None:
        super().__init__()
        self.mdp = mdp
        self.gamma = mdp.gamma
        self.max_episode_steps = max_episode_steps
        self._masks = mdp.masks
        self.observation_space = gymnasium.spaces.Discrete(mdp.n_states)
        self.action_space = gymnasium.spaces.Discrete(mdp.n_actions)
        tables = successor_tables(mdp)  # the one sampling rule of tdkit.envs._successors
        self._cumulative = tables.cumulative
        self._next_states = tables.next_states
        self._rewards = tables.rewards
        self._terminal = tables.terminal
        self._initial_cumulative = tables.start_cumulative
        self._n_actions = mdp.n_actions
        self._state: int | None = None
        self._steps = 0

    def reset(
        self, *, seed: int | None = None, options: dict[str, Any] | None = None
    ) -> tuple[int, dict[str, Any]]:
        """Start an episode; ``seed`` reseeds ``np_random`` (gymnasium's contract)."""
        super().reset(seed=seed)
        u = self.np_random.random()
        self._state = int(sample_slot(self._initial_cumulative, u))
        self._steps = 0
        return self._state, self._info(self._state)

    def _info(self, state: int) -> dict[str, Any]:
        if self._masks is None:
            return {}
        return {"action_mask": self._masks[state]}

    def step(self, action: Any) -> tuple[int, float, bool, bool, dict[str, Any]]:
        """Take ``action``; return ``(state, reward, terminated, truncated, info)``."""
        s = self._state
        if s is None:
            raise EnvironmentProtocolError(
                "FiniteMDPEnv.step: call reset() before step()."
            )
        if (
            isinstance(action, bool)
            or not isinstance(action, numbers.Integral)
            or not 0 <= action < self._n_actions
        ):
            raise InvalidParameterError(
                f"FiniteMDPEnv.step: action must be an integer in [0, {self._n_actions}); "
                f"got {action!r}."
            )
        if self._terminal[s]:
            return s, 0.0, True, False, self._info(s)
        k = sample_slot(self._cumulative[s, action], self.np_random.random())
        nxt = int(self._next_states[s, action, k])
        reward = float(self._rewards[s, action, k])
        self._state = nxt
        self._steps += 1
        terminated = bool(self._terminal[nxt])
        limit = self.max_episode_steps
        truncated = not terminated and limit is not None and self._steps >= limit
        return nxt, reward, terminated, truncated, self._info(nxt)

"""The agent protocol and the base class of tdkit's tabular learners.

The protocol is three verbs::

    action = agent.act(obs, *, mask=None, explore=True)
    agent.observe(obs, action, reward, next_obs, terminated, truncated, *, next_mask=None)
    errors = agent.update()   # tuple of the TD errors applied now; () if none

Any object with these methods can be trained (:func:`tdkit.train`), evaluated
and verified (:mod:`tdkit.verify`); subclassing :class:`TabularAgent` is a
convenience, never a requirement.

Semantics every tdkit learner honours
-------------------------------------
* ``terminated=True``: the target does not bootstrap from ``next_obs``.
* ``truncated=True`` and not terminated (a time limit): the target
  **does** bootstrap from ``next_obs``; then the episode ends.
* Greedy choices break ties uniformly at random.
* ``mask`` (and ``next_mask``) is a boolean array over actions; masked actions
  are never chosen and never enter a max or expectation in a target.
"""

from __future__ import annotations

import math
import operator
from collections.abc import Sequence
from typing import Any, ClassVar, Protocol, runtime_checkable

import numpy as np

from ._errors import InvalidParameterError
from ._greedy import check_mask, greedy_action
from ._seeding import SeedLike, as_generator
from ._validation import check_in_range, check_positive_int
from .exploration import Exploration, as_exploration
from .schedules import Constant, Schedule, as_schedule
from .tables import ActionValueTable, InitialValue, read_only

__all__ = ["Agent", "TabularAgent", "Transition"]

#: One observed transition after encoding:
#: (state, action, reward, next_state, terminated, truncated, next_mask)
Transition = tuple[int, int, float, int, bool, bool, "np.ndarray | None"]


@runtime_checkable
class Agent(Protocol):
    """Anything tdkit can train, evaluate and verify."""

    def act(self, obs: Any, *, mask: Any = None, explore: bool = True) -> Any:
        """Return the action to take in ``obs``."""

    def observe(
        self,
        obs: Any,
        action: Any,
        reward: float,
        next_obs: Any,
        terminated: bool,
        truncated: bool,
        *,
        next_mask: Any = None,
    ) -> None:
        """Record one transition."""

    def update(self) -> Sequence[float]:
        """Apply every update that is due; return their TD errors."""


class TabularAgent:
    r"""Base class of tdkit's tabular learners.

    Subclasses implement :meth:`_learn`, which applies the update for one
    encoded transition and returns the TD errors as a tuple. The shared TD
    step :math:`Q(s,a) \leftarrow Q(s,a) + \alpha\,[G - Q(s,a)]` lives in
    :meth:`_td_step` and is written nowhere else.

    Parameters
    ----------
    n_states, n_actions : int
        Table shape (number of encoded states and of actions).
    gamma : float, default 0.99
        Discount factor in [0, 1].
    step_size : float or Schedule, default 0.1
        :math:`\alpha` in (0, 1], or a schedule from :mod:`tdkit.schedules`.
    exploration : float, Schedule or Exploration, default 0.1
        A float or schedule is the :math:`\varepsilon` of ε-greedy; or an
        object from :mod:`tdkit.exploration`.
    initial_value : float or (float, float), default 0.0
        Constant (optimistic when large) or ``(low, high)`` seeded uniform.
    seed : int, numpy.random.Generator or None
        Seeds the learner's own generator (exploration, tie-breaking).
    state_encoder, action_encoder : optional
        Objects from :mod:`tdkit.encoders`. By default observations must be
        integers in ``[0, n_states)`` and actions integers in ``[0, n_actions)``.

    Attributes
    ----------
    steps_ : int
        Transitions observed so far (drives schedules).
    episodes_ : int
        Episodes ended so far (a transition with ``terminated`` or ``truncated``).
    """

    #: Names of the algorithm-specific constructor keywords (for get_params / store).
    _extra_params: ClassVar[tuple[str, ...]] = ()

    def __init__(
        self,
        n_states: int,
        n_actions: int,
        *,
        gamma: float = 0.99,
        step_size: float | Schedule = 0.1,
        exploration: float | Schedule | Exploration = 0.1,
        initial_value: InitialValue = 0.0,
        seed: SeedLike = None,
        state_encoder: Any = None,
        action_encoder: Any = None,
    ) -> None:
        name = type(self).__name__
        self.n_states = check_positive_int(name, "n_states", n_states)
        self.n_actions = check_positive_int(name, "n_actions", n_actions)
        self.gamma = check_in_range(name, "gamma", gamma, 0.0, 1.0)
        self.step_size = step_size
        self.exploration = exploration
        self.initial_value = initial_value
        self.seed = seed
        self.state_encoder = state_encoder
        self.action_encoder = action_encoder

        self._step_size = as_schedule(
            step_size, owner=name, name="step_size", low=0.0, high=1.0, low_open=True,
            hint="Use a float or a schedule from tdkit.schedules.",
        )
        self._alpha_const = (
            self._step_size.constant if isinstance(self._step_size, Constant) else None
        )
        self._explore = as_exploration(exploration, owner=name)
        self._rng = as_generator(seed, owner=name)
        self._check_encoders()
        self._init_tables(initial_value)
        self._pending: list[Transition] = []
        self.steps_ = 0
        self.episodes_ = 0
        self._steps_at_episode_end = 0

    # ------------------------------------------------------------------ set-up
    def _init_tables(self, initial_value: InitialValue) -> None:
        table = ActionValueTable(
            self.n_states, self.n_actions, initial_value=initial_value, rng=self._rng,
            owner=type(self).__name__,
        )
        self._q = table.values
        self._visits = table.visits

    def _check_encoders(self) -> None:
        name = type(self).__name__
        enc = self.state_encoder
        if enc is None:
            self._encode = self._encode_int_state
        else:
            if getattr(enc, "n_states", self.n_states) != self.n_states:
                raise InvalidParameterError(
                    f"{name}: state_encoder has n_states={enc.n_states!r} but the table has "
                    f"n_states={self.n_states!r}; build the learner with for_env() or pass "
                    "matching sizes."
                )
            self._encode = enc.encode
        aenc = self.action_encoder
        if aenc is None:
            self._action_index = self._int_action
            self._env_action = int
        else:
            if getattr(aenc, "n_actions", self.n_actions) != self.n_actions:
                raise InvalidParameterError(
                    f"{name}: action_encoder has n_actions={aenc.n_actions!r} but the table has "
                    f"n_actions={self.n_actions!r}."
                )
            self._action_index = aenc.to_index
            self._env_action = aenc.to_env

    def _encode_int_state(self, obs: Any) -> int:
        try:
            s = operator.index(obs)
        except TypeError:
            raise InvalidParameterError(
                f"{type(self).__name__}: observation {obs!r} is not an integer state index. "
                "Pass state_encoder=... (see tdkit.encoders) or build the learner with "
                "for_env(env)."
            ) from None
        if not 0 <= s < self.n_states:
            raise InvalidParameterError(
                f"{type(self).__name__}: state {obs!r} is outside [0, {self.n_states}); "
                "check n_states or use an encoder from tdkit.encoders."
            )
        return s

    def _int_action(self, action: Any) -> int:
        try:
            a = operator.index(action)
        except TypeError:
            raise InvalidParameterError(
                f"{type(self).__name__}: action {action!r} is not an integer action index; "
                "pass action_encoder=... (see tdkit.encoders)."
            ) from None
        if not 0 <= a < self.n_actions:
            raise InvalidParameterError(
                f"{type(self).__name__}: action {action!r} is outside [0, {self.n_actions})."
            )
        return a

    @classmethod
    def for_env(cls, env: Any, **kwargs: Any) -> TabularAgent:
        """Build a learner whose encoders match ``env``'s spaces.

        ``env`` may be anything :func:`tdkit.envs.adapt` accepts. When
        ``gamma`` is not given and ``env.unwrapped`` has a ``gamma``
        attribute (as the models of :class:`tdkit.FiniteMDP` do), that
        discount is used.

        Examples
        --------
        >>> import gymnasium as gym
        >>> from tdkit import QLearning
        >>> agent = QLearning.for_env(gym.make("FrozenLake-v1"), seed=0)
        >>> agent.table.shape
        (16, 4)
        """
        from .encoders import action_encoder_for_space, for_space
        from .envs import adapt

        env = adapt(env)
        obs_space = getattr(env, "observation_space", None)
        act_space = getattr(env, "action_space", None)
        if "state_encoder" not in kwargs:
            if obs_space is None:
                raise InvalidParameterError(
                    f"{cls.__name__}.for_env: the environment has no observation_space; pass "
                    "n_states and a state_encoder (e.g. tdkit.encoders.HashIndexEncoder) to the "
                    "constructor instead."
                )
            kwargs["state_encoder"] = for_space(obs_space)
        if "action_encoder" not in kwargs:
            if act_space is None:
                raise InvalidParameterError(
                    f"{cls.__name__}.for_env: the environment has no action_space; pass "
                    "n_actions (and an action_encoder if actions are not 0..n-1) to the "
                    "constructor instead."
                )
            kwargs["action_encoder"] = action_encoder_for_space(act_space)
        if "gamma" not in kwargs:
            env_gamma = getattr(getattr(env, "unwrapped", env), "gamma", None)
            if isinstance(env_gamma, (int, float)):
                kwargs["gamma"] = float(env_gamma)
        return cls(
            kwargs["state_encoder"].n_states, kwargs["action_encoder"].n_actions, **kwargs
        )

    def get_params(self) -> dict[str, Any]:
        """Constructor arguments, as given."""
        params = {
            "n_states": self.n_states,
            "n_actions": self.n_actions,
            "gamma": self.gamma,
            "step_size": self.step_size,
            "exploration": self.exploration,
            "initial_value": self.initial_value,
            "seed": self.seed,
            "state_encoder": self.state_encoder,
            "action_encoder": self.action_encoder,
        }
        for key in self._extra_params:
            params[key] = getattr(self, key)
        return params

    def __repr__(self) -> str:
        shown = ("n_states", "n_actions", "gamma", "step_size", "exploration", *self._extra_params)
        params = self.get_params()
        return f"{type(self).__name__}({', '.join(f'{k}={params[k]!r}' for k in shown)})"

    # ------------------------------------------------------------ the verbs
    def act(self, obs: Any, *, mask: Any = None, explore: bool = True) -> Any:
        """Choose an action for ``obs``.

        Parameters
        ----------
        obs : observation
            Encoded to a table row by the state encoder.
        mask : array of bool, optional
            Allowed actions; masked actions are never returned.
        explore : bool, default True
            False gives the greedy action (ties broken uniformly at random).
        """
        s = self._encode(obs)
        if mask is not None:
            mask = check_mask(mask, self.n_actions)
        return self._env_action(self._choose(s, mask, explore))

    def _behaviour_values(self, s: int) -> np.ndarray:
        """The values the behaviour policy ranks actions by (a row of the table)."""
        return self._q[s]

    def _choose(self, s: int, mask: np.ndarray | None, explore: bool) -> int:
        values = self._behaviour_values(s)
        if explore:
            return self._explore.select(
                values, mask, self._rng, step=self.steps_, counts=self._counts_for(s)
            )
        return greedy_action(values, mask, self._rng)

    def _counts_for(self, s: int) -> np.ndarray | None:
        """The visit counts of ``s`` when the exploration rule reads them, else None."""
        return self._visits[s] if self._explore.uses_counts else None

    def observe(
        self,
        obs: Any,
        action: Any,
        reward: float,
        next_obs: Any,
        terminated: bool,
        truncated: bool,
        *,
        next_mask: Any = None,
    ) -> None:
        """Record one transition; :meth:`update` applies it."""
        r = float(reward)
        if not math.isfinite(r):
            raise InvalidParameterError(
                f"{type(self).__name__}.observe: reward must be finite; got {reward!r}. "
                "The table was not changed."
            )
        if next_mask is not None:
            next_mask = check_mask(next_mask, self.n_actions, name="next_mask")
        self._pending.append(
            (
                self._encode(obs),
                self._action_index(action),
                r,
                self._encode(next_obs),
                bool(terminated),
                bool(truncated),
                next_mask,
            )
        )
        self.steps_ += 1

    def update(self) -> tuple[float, ...]:
        """Apply the pending updates; return their TD errors (``()`` if none)."""
        pending = self._pending
        if not pending:
            return ()
        if len(pending) == 1:
            transition = pending.pop()
            errors = self._learn(transition)
            if transition[4] or transition[5]:
                self._close_episode(self.steps_)
            return errors
        out: list[float] = []
        batch = pending[:]
        pending.clear()
        last = len(batch) - 1
        for i, transition in enumerate(batch):
            out.extend(self._learn(transition))
            if transition[4] or transition[5]:
                self._close_episode(self.steps_ - (last - i))
        return tuple(out)

    def end_episode(self) -> tuple[float, ...]:
        """Settle an episode that stopped without ``terminated`` or ``truncated``.

        A step budget, a callback or an exception can stop an episode between
        two steps. The episode is then settled as a time-limit truncation at
        the last observed transition: pending transitions are applied (the
        last one as ``truncated=True``), multi-step returns still in the
        buffer are completed with a bootstrap from the last next state, and
        traces, buffers and a committed next action are cleared. Nothing of
        the episode reaches the next one. :func:`tdkit.train` calls this
        whenever it stops mid-episode; call it yourself in a hand-written
        loop that abandons an episode.

        Returns
        -------
        tuple of float
            The TD errors of the updates this applied (``()`` when there was
            nothing to settle, as after ``terminated`` or ``truncated``).

        Examples
        --------
        >>> from tdkit import NStepSarsa
        >>> agent = NStepSarsa(3, 1, n=3, gamma=1.0, step_size=1.0, seed=0)
        >>> agent.observe(0, 0, 1.0, 1, False, False); agent.update()
        ()
        >>> agent.end_episode()   # G = 1 + Q(1, 0) = 1: bootstrapped, not dropped
        (1.0,)
        >>> agent.end_episode()   # already settled
        ()
        """
        pending = self._pending
        if pending:
            last = pending[-1]
            if not (last[4] or last[5]):
                pending[-1] = (*last[:5], True, last[6])
            return self.update()
        if self.steps_ == self._steps_at_episode_end:
            return ()
        errors = self._settle_cut()
        self._close_episode(self.steps_)
        return errors

    def _close_episode(self, steps: int) -> None:
        """Count an episode that ended after the ``steps``-th observed transition."""
        self.episodes_ += 1
        self._steps_at_episode_end = steps
        self._end_episode()

    # ------------------------------------------------------------ for subclasses
    def _learn(self, transition: Transition) -> tuple[float, ...]:
        raise NotImplementedError(f"{type(self).__name__} must implement _learn")

    def _end_episode(self) -> None:
        """Hook called after the last transition of an episode was learned."""

    def _settle_cut(self) -> tuple[float, ...]:
        """Complete what an episode cut after its last learned transition left open.

        One-step learners have nothing open (their last update already
        bootstrapped); multi-step learners flush their buffer with a bootstrap.
        """
        return ()

    def _td_step(
        self, values: np.ndarray, visits: np.ndarray, s: int, a: int, target: float
    ) -> float:
        r"""Apply :math:`Q(s,a) \leftarrow Q(s,a) + \alpha\,[G - Q(s,a)]`; return the TD error.

        ``visits[s, a]`` is incremented first, so per-pair schedules see the
        count including this update.
        """
        alpha = self._count_visit(visits, s, a)
        delta = target - values[s, a]
        values[s, a] += alpha * delta
        return float(delta)

    def _count_visit(self, visits: np.ndarray, s: int, a: int) -> float:
        """Increment ``visits[s, a]`` and return the step size for this update."""
        n = visits[s, a] + 1
        visits[s, a] = n
        alpha = self._alpha_const
        if alpha is None:
            alpha = self._step_size.value(self.steps_, int(n))
        return alpha

    # ------------------------------------------------------------ inspection
    @property
    def table(self) -> np.ndarray:
        """The ``(n_states, n_actions)`` action values (read-only view)."""
        return read_only(self._q)

    @property
    def visits(self) -> np.ndarray:
        """Update counts ``n(s, a)`` (read-only view)."""
        return read_only(self._visits)

    def q_values(self, obs: Any) -> np.ndarray:
        """The action values of ``obs``, shape ``(n_actions,)`` (a copy)."""
        return self.table[self._encode(obs)].copy()

    @property
    def rng(self) -> np.random.Generator:
        """The learner's own random generator."""
        return self._rng

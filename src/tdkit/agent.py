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
* ``mask`` (and ``next_mask``) is a boolean (or 0/1 integer) array over
  actions; masked actions are never chosen and never enter a max or
  expectation in a target.

The per-step path
-----------------
The public tables are numpy arrays, but one numpy scalar costs several times a
Python float. :class:`TabularAgent` therefore keeps, beside its value array,
a cache of its rows as lists of Python floats (each loaded on first use and
written through by every TD step) and reads rows from it
(:meth:`TabularAgent._row`); single entries of the arrays are written through
flat memory views. Greedy choices then use the pure-Python forms in
:mod:`tdkit._greedy`, which pick the same action from the same random numbers
as the numpy forms. Each distinct mask is checked and turned into an
:class:`~tdkit._greedy.ActionSet` once (:class:`~tdkit._greedy.ActionSets`);
transitions carry its read-only boolean array.
"""

from __future__ import annotations

import functools
import inspect
import math
import numbers
import operator
import sys
import warnings
from collections.abc import Sequence
from typing import Any, ClassVar, NamedTuple, Protocol, runtime_checkable

import numpy as np

from ._errors import InvalidParameterError
from ._greedy import ActionSet, ActionSets, greedy_index
from ._seeding import SeedLike, as_generator
from ._validation import require_in_range, require_known_keywords, require_positive_int
from .exploration import EpsilonGreedy, Exploration, as_exploration
from .schedules import Constant, Schedule, as_schedule
from .tables import ActionValueTable, InitialValue, read_only

__all__ = ["Agent", "TabularAgent", "Transition", "constructor_parameters"]


def _real_reward(agent: Any, reward: Any) -> float:
    """``reward`` as a float when it is a real number (not a bool or a string)."""
    if isinstance(reward, numbers.Real) and not isinstance(reward, (bool, np.bool_)):
        return float(reward)
    raise InvalidParameterError(
        f"{type(agent).__name__}.observe: reward must be a real number; got {reward!r} of "
        f"type {type(reward).__name__}. Convert it with float(...) in the simulator. "
        "Nothing was recorded."
    )


def _flag(agent: Any, name: str, value: Any) -> bool:
    """A numpy bool as a bool; anything else that is not a bool is refused."""
    if isinstance(value, np.bool_):
        return bool(value)
    raise InvalidParameterError(
        f"{type(agent).__name__}.observe: {name} must be True or False; got {value!r} of "
        f"type {type(value).__name__}. Nothing was recorded."
    )


class Transition(NamedTuple):
    """One observed transition after encoding, in ``observe``'s argument order.

    ``next_mask`` is None or the read-only boolean array of the
    :class:`~tdkit._greedy.ActionSet` of the mask given to ``observe``.

    ``observe`` queues plain tuples in this field order (building the named
    tuple would cost a call per step), so ``_learn`` implementations unpack
    their argument by position, never by field name.
    """

    state: int
    action: int
    reward: float
    next_state: int
    terminated: bool
    truncated: bool
    next_mask: np.ndarray | None = None


_HIGHEST = sys.float_info.max
_LOWEST = -_HIGHEST

_VARIADIC = (inspect.Parameter.VAR_POSITIONAL, inspect.Parameter.VAR_KEYWORD)
_PARAMETERS: dict[type, tuple[inspect.Parameter, ...]] = {}


def constructor_parameters(cls: type) -> tuple[inspect.Parameter, ...]:
    """The parameters ``cls(...)`` accepts, read from the signatures of ``__init__``.

    An ``__init__`` that takes ``*args`` or ``**kwargs`` passes them on, so
    the next ``__init__`` along the MRO adds its parameters too.
    """
    found = _PARAMETERS.get(cls)
    if found is not None:
        return found
    params: list[inspect.Parameter] = []
    seen = {"self"}
    for klass in cls.__mro__:
        init = klass.__dict__.get("__init__")
        if init is None:
            continue
        passes_on = False
        for p in inspect.signature(init).parameters.values():
            if p.kind in _VARIADIC:
                passes_on = True
            elif p.name not in seen:
                seen.add(p.name)
                params.append(p)
        if not passes_on:
            break
    _PARAMETERS[cls] = found = tuple(params)
    return found


def _checks_keywords(init: Any) -> Any:
    """Wrap ``__init__`` so an unknown keyword is answered with the nearest valid one.

    The wrapper keeps ``__init__``'s signature (``__wrapped__``), so
    ``inspect.signature(cls)`` shows every parameter.
    """

    own = {p.name for p in inspect.signature(init).parameters.values() if p.kind not in _VARIADIC}

    @functools.wraps(init)
    def __init__(self: Any, *args: Any, **kwargs: Any) -> None:
        if not kwargs.keys() <= own:
            cls = type(self)
            names = tuple(p.name for p in constructor_parameters(cls))
            require_known_keywords(cls.__name__, kwargs, names, cls._keyword_hints)
        init(self, *args, **kwargs)

    return __init__


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
    :meth:`_td_step` (any table pair) and its form for the learner's own
    tables, :meth:`_td_main`, which learners with a Python-float target call
    directly; it is written nowhere else. ``_learn`` receives a plain tuple in
    :class:`Transition` field order and unpacks it by position.

    The values live in a numpy array (``_values``, shown read-only as
    :attr:`table`) and, for the per-step path, in a row cache (``_rows``:
    one entry per state, None or the row as a list of Python floats, loaded
    by :meth:`_load_row`). Subclasses read rows with :meth:`_row`, and write
    entries with :meth:`_td_step` or :meth:`_set_value`, which keep array
    and cache in step. Code that writes the array in any other way drops
    the rows it changed (``_rows[s] = None``) or calls :meth:`_forget_rows`.
    Taking the ``_q`` attribute (the writable array) forgets every row, so a
    bulk write through ``_q`` stays correct as long as it reads no row
    between taking ``_q`` and writing.

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

    #: Advice for keywords a user may bring from another learner (see TD0).
    _keyword_hints: ClassVar[dict[str, str]] = {}

    #: Whether the learner discounts: :meth:`for_env` passes on the env's ``gamma``
    #: if so, and refuses a ``gamma`` if not (the average-reward learners).
    _discounts: ClassVar[bool] = True

    #: The learned state :mod:`tdkit.store` saves, as ``(attribute, kind)`` pairs;
    #: subclasses declare only their own fields (see :mod:`tdkit.store` for the kinds).
    _saved_state: ClassVar[tuple[tuple[str, str], ...]] = (
        ("_q", "values"), ("_visits", "counts"), ("steps_", "counter"),
        ("episodes_", "counter"), ("_steps_at_episode_end", "counter"),
        ("_pending", "per_episode"),
    )

    # Views onto the tables and other per-process helpers of the per-step path.
    # They are rebuilt from the tables (``_bind_tables``), never state: slots keep
    # them out of ``vars(agent)``, and pickling drops them (``__getstate__``).
    __slots__ = (
        "__dict__",
        "__weakref__",
        "_actions_plain",
        "_all_actions",
        "_draw",
        "_eps_const",
        "_eps_rule",
        "_own_choose",
        "_own_td_step",
        "_qv",
        "_rows",
        "_sets",
        "_states_plain",
        "_vv",
        "_width",
    )

    def __init_subclass__(cls, **kwargs: Any) -> None:
        super().__init_subclass__(**kwargs)
        init = cls.__dict__.get("__init__")
        if init is not None and not hasattr(init, "__wrapped__"):
            cls.__init__ = _checks_keywords(init)  # type: ignore[method-assign]

    @_checks_keywords
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
        self.n_states = require_positive_int(name, "n_states", n_states)
        self.n_actions = require_positive_int(name, "n_actions", n_actions)
        self.gamma = require_in_range(name, "gamma", gamma, 0.0, 1.0)
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
        self._require_encoders()
        self._init_tables(initial_value)
        self._pending: list[tuple[Any, ...]] = []  # Transition fields, by position
        self.steps_ = 0
        self.episodes_ = 0
        self._steps_at_episode_end = 0
        self._bind_tables()

    @property
    def _q(self) -> np.ndarray:
        """The value array, writable; taking it forgets the row cache (see the class notes)."""
        values = self._values
        self._rows = [None] * len(values)
        return values

    @_q.setter
    def _q(self, values: np.ndarray) -> None:
        if not values.flags.c_contiguous:  # pragma: no cover - tables are built contiguous
            raise RuntimeError(f"{type(self).__name__}: tables must be C-contiguous.")
        self._values = values
        self._qv = memoryview(values).cast("B").cast("d")
        self._rows = [None] * len(values)

    def _forget_rows(self) -> None:
        """Drop every cached row (after writing ``_values`` other than entry by entry)."""
        self._rows = [None] * len(self._values)

    def _load_row(self, s: int) -> list[float]:
        """Row ``s`` of ``_values`` as a list of Python floats, now cached in ``_rows``."""
        row: list[float] = self._values[s].tolist()
        self._rows[s] = row
        return row

    def _set_value(self, s: int, a: int, value: float) -> None:
        """Write ``Q(s, a) = value`` to the array and to the row cache."""
        value = float(value)
        self._qv[s * self._width + a] = value
        row = self._rows[s]
        if row is not None:
            row[a] = value

    def _bind_tables(self) -> None:
        """(Re)build the per-step views onto the value and count arrays (C-contiguous, 2-D)."""
        self._q = self._values  # the memory view and an empty row cache
        visits = self._visits
        if not visits.flags.c_contiguous:  # pragma: no cover
            raise RuntimeError(f"{type(self).__name__}: tables must be C-contiguous.")
        self._width = self._values.shape[1]
        self._vv = memoryview(visits).cast("B").cast("q")
        self._draw = self._rng.random
        self._sets = ActionSets(self.n_actions)
        self._all_actions = range(self.n_actions)
        explore = self._explore
        self._eps_rule = explore if type(explore) is EpsilonGreedy else None
        # A constant epsilon of that rule, read once here (None: a schedule or another rule).
        self._eps_const = None if self._eps_rule is None else self._eps_rule._fixed
        # act goes straight to _pick unless a subclass overrides _choose.
        self._own_choose = type(self)._choose is TabularAgent._choose
        # Learners call _td_main directly only when no subclass overrides _td_step.
        self._own_td_step = type(self)._td_step is TabularAgent._td_step
        # Without encoders, a Python int in range is its own index: the per-step
        # methods test ``type(x) is int and 0 <= x < _states_plain`` before calling
        # the encoder (-1 when there is an encoder, so the test always fails).
        self._states_plain = self.n_states if self.state_encoder is None else -1
        self._actions_plain = self.n_actions if self.action_encoder is None else -1

    def __getstate__(self) -> dict[str, Any]:
        return dict(self.__dict__)

    def __setstate__(self, state: dict[str, Any]) -> None:
        if "_q" in state:  # pickled before the value array was named _values
            state = {("_values" if k == "_q" else k): v for k, v in state.items()}
        self.__dict__.update(state)
        self._bind_tables()

    # ------------------------------------------------------------------ set-up
    def _init_tables(self, initial_value: InitialValue) -> None:
        table = ActionValueTable(
            self.n_states, self.n_actions, initial_value=initial_value, rng=self._rng,
            owner=type(self).__name__, bytes_per_row=8,  # the row cache's slot per state
        )
        self._q = table.values
        self._visits = table.visits

    def _require_encoders(self) -> None:
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
        if isinstance(obs, (bool, np.bool_)):
            raise InvalidParameterError(
                f"{type(self).__name__}: observation {obs!r} is a bool, not a state index. "
                "Pass integer states (or a state_encoder from tdkit.encoders)."
            )
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
        discount is used. Learners that do not discount (the average-reward
        ones) read no discount from ``env`` and refuse a ``gamma`` keyword.

        Raises
        ------
        InvalidParameterError
            If ``env`` has no observation or action space and no encoder is
            given for it, or a learner that does not discount gets ``gamma``.

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

        if not cls._discounts and "gamma" in kwargs:
            raise InvalidParameterError(
                f"{cls.__name__}.for_env: {cls.__name__} does not discount (an average-reward "
                f"learner) and takes no gamma; got gamma={kwargs['gamma']!r}. Drop it, or use "
                "a discounted learner."
            )
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
        if cls._discounts and "gamma" not in kwargs:
            env_gamma = getattr(getattr(env, "unwrapped", env), "gamma", None)
            if isinstance(env_gamma, (int, float)):
                kwargs["gamma"] = float(env_gamma)
        return cls(
            kwargs["state_encoder"].n_states, kwargs["action_encoder"].n_actions, **kwargs
        )

    def get_params(self) -> dict[str, Any]:
        """Constructor arguments, as given: one entry per parameter of the class's signature."""
        return {p.name: getattr(self, p.name) for p in constructor_parameters(type(self))}

    def __repr__(self) -> str:
        """The class and its constructor arguments, leaving out those that are None."""
        shown = ", ".join(f"{k}={v!r}" for k, v in self.get_params().items() if v is not None)
        return f"{type(self).__name__}({shown})"

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
        s = obs if type(obs) is int and 0 <= obs < self._states_plain else self._encode(obs)
        if self._own_choose:
            a = self._pick(s, None if mask is None else self._sets.get(mask), explore)
            return a if self._actions_plain > 0 else self._env_action(a)
        if mask is not None:
            mask = self._sets.get(mask).mask
        return self._env_action(self._choose(s, mask, explore))

    def _row(self, s: int) -> list[float]:
        """Row ``s`` of the values as a list of Python floats (the cache's: never change it)."""
        return self._rows[s] or self._load_row(s)

    def _allowed(self, mask: np.ndarray | None) -> Sequence[int]:
        """The allowed actions of a mask as transitions carry it (all actions for None).

        This is the ``allowed`` argument of the functions in
        :mod:`tdkit.learners._targets`.
        """
        return self._all_actions if mask is None else self._sets.of(mask).indices

    def _choose(self, s: int, mask: np.ndarray | None, explore: bool) -> int:
        """The behaviour (``explore``) or greedy action in ``s``; ``mask`` as transitions carry it.

        Subclasses may override it; :meth:`act` then calls it instead of :meth:`_pick`.
        """
        return self._pick(s, None if mask is None else self._sets.of(mask), explore)

    def _pick(self, s: int, allowed: ActionSet | None, explore: bool) -> int:
        """:meth:`_choose` for an :class:`~tdkit._greedy.ActionSet` (None: every action).

        ε-greedy (:class:`~tdkit.exploration.EpsilonGreedy` itself) runs in
        pure Python; other rules get the numpy row. Both draw the same numbers.
        The action is a Python int.
        """
        if explore:
            eps = self._eps_const
            if eps is None:
                rule = self._eps_rule
                if rule is None:
                    return int(self._explore.select(
                        self._values[s], None if allowed is None else allowed.mask, self._rng,
                        step=self.steps_, counts=self._counts_for(s),
                    ))
                eps = rule.current(self.steps_)
            if eps > 0.0 and self._draw() < eps:
                if allowed is None:
                    return int(self._draw() * self._width)
                indices = allowed.indices
                return indices[int(self._draw() * len(indices))]
        row = self._rows[s] or self._load_row(s)
        # A single maximum needs no draw; ties and NaN go to greedy_index.
        if allowed is None:
            top = max(row)
            if row.count(top) == 1 and top == top:
                return row.index(top)
        else:
            values = allowed.take(row)
            top = max(values)
            if values.count(top) == 1 and top == top:
                return allowed.indices[values.index(top)]
        return greedy_index(row, allowed, self._draw)

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
        """Record one transition; :meth:`update` applies it.

        ``reward`` must be a real number (not a bool or a string) and finite;
        ``terminated`` and ``truncated`` must be booleans (Python or numpy).
        Anything else raises :class:`~tdkit.InvalidParameterError` and records
        nothing.
        """
        r = reward if type(reward) is float else _real_reward(self, reward)
        if r - r != 0.0:  # inf or NaN
            raise InvalidParameterError(
                f"{type(self).__name__}.observe: reward must be finite; got {reward!r}. "
                "The table was not changed."
            )
        if terminated is not True and terminated is not False:
            terminated = _flag(self, "terminated", terminated)
        if truncated is not True and truncated is not False:
            truncated = _flag(self, "truncated", truncated)
        if next_mask is not None:
            next_mask = self._sets.get(next_mask, "next_mask").mask
        n = self._states_plain
        s = obs if type(obs) is int and 0 <= obs < n else self._encode(obs)
        s2 = next_obs if type(next_obs) is int and 0 <= next_obs < n else self._encode(next_obs)
        a = (
            action
            if type(action) is int and 0 <= action < self._actions_plain
            else self._action_index(action)
        )
        pending = self._pending
        if pending and len(pending) >= self._pile_up_limit - 1:  # empty after every update()
            self._warn_pile_up(len(pending) + 1)
        pending.append((s, a, r, s2, terminated, truncated, next_mask))
        self.steps_ += 1

    #: Pending transitions at which ``observe`` warns that ``update`` is not called
    #: (no correct loop reaches it: train calls update after every observe).
    _pile_up_limit: int = 100_000

    def _warn_pile_up(self, count: int) -> None:
        warnings.warn(
            f"{type(self).__name__}: {count} transitions were observed without an update(); "
            "they are held in memory and nothing is learned until update() is called. Call "
            "agent.update() after each observe() (tdkit.train does).",
            RuntimeWarning,
            stacklevel=3,
        )
        self._pile_up_limit = sys.maxsize  # warn once per learner

    def update(self) -> tuple[float, ...]:
        """Apply the pending updates; return their TD errors (``()`` if none)."""
        pending = self._pending
        if len(pending) == 1:
            transition = pending.pop()
            errors = self._learn(transition)
            if transition[4] or transition[5]:
                self._close_episode(self.steps_)
            return errors
        if not pending:
            return ()
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
                pending[-1] = (*last[:5], True, *last[6:])
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
        self,
        values: np.ndarray,
        visits: np.ndarray,
        s: int,
        a: int,
        target: float,
        weight: float = 1.0,
    ) -> float:
        r"""Apply :math:`Q(s,a) \leftarrow Q(s,a) + \alpha\,\rho\,[G - Q(s,a)]`; return the error.

        ``weight`` is :math:`\rho` (an importance-sampling ratio; 1 for
        on-policy updates), and the returned error is :math:`\rho\,[G - Q(s,a)]`.
        ``visits[s, a]`` is incremented first, so per-pair schedules see the
        count including this update. An update that would overflow the entry
        to inf or NaN (rewards near the float limit) raises
        :class:`~tdkit.InvalidParameterError` naming the step, and leaves the
        table and the counts as they were.
        """
        if values is self._values and visits is self._visits:
            return self._td_main(s, a, float(target), float(weight))
        alpha = self._count_visit(visits, s, a)
        q = values[s, a]
        delta = target - q
        if weight != 1.0:
            delta = weight * delta
        new = q + alpha * delta
        if not math.isfinite(new):
            visits[s, a] -= 1
            self._refuse_overflow(s, a, target, new)
        values[s, a] = new
        return float(delta)

    def _td_main(self, s: int, a: int, target: float, weight: float = 1.0) -> float:
        """:meth:`_td_step` on ``_q`` and ``_visits``, through their flat views.

        The error is returned as computed: a Python float when ``target`` and
        ``weight`` are (:meth:`_td_step` converts them), so learners whose
        target is a Python float call this directly when ``_own_td_step`` (no
        subclass overrides :meth:`_td_step`). The
        table and the count are written only after the new value is known to
        be finite.
        """
        k = s * self._width + a
        vv = self._vv
        n = vv[k] + 1
        alpha = self._alpha_const
        if alpha is None:
            alpha = float(self._step_size.value(self.steps_, n))
        row = self._rows[s] or self._load_row(s)
        old = row[a]
        delta = target - old
        if weight != 1.0:
            delta = weight * delta
        new = old + alpha * delta
        if not _LOWEST <= new <= _HIGHEST:  # inf or NaN (no numpy warning for numpy floats)
            self._refuse_overflow(s, a, target, new)
        row[a] = new
        self._qv[k] = new
        vv[k] = n
        return delta

    def _refuse_overflow(self, s: int, a: int, target: float, new: float) -> None:
        """Raise for an update whose new value is not finite (the caller changed nothing)."""
        raise InvalidParameterError(
            f"{type(self).__name__}: the update at step {self.steps_} (state {s}, action {a}, "
            f"target {float(target)!r}) overflows Q to {float(new)!r}. Rewards and values this "
            "close to the float limit cannot be learned; rescale the rewards. The table was "
            "not changed."
        )

    def _count_visit(self, visits: np.ndarray, s: int, a: int) -> float:
        """Increment ``visits[s, a]`` and return the step size for this update."""
        if visits is self._visits:
            k = s * self._width + a
            n = self._vv[k] + 1
            self._vv[k] = n
        else:
            n = int(visits[s, a]) + 1
            visits[s, a] = n
        alpha = self._alpha_const
        if alpha is None:
            alpha = self._step_size.value(self.steps_, n)
        return alpha

    # ------------------------------------------------------------ inspection
    @property
    def table(self) -> np.ndarray:
        """The ``(n_states, n_actions)`` action values (read-only view)."""
        return read_only(self._values)

    @property
    def visits(self) -> np.ndarray:
        """Update counts ``n(s, a)`` (read-only view)."""
        return read_only(self._visits)

    def q_values(self, obs: Any) -> np.ndarray:
        """The action values of ``obs``, shape ``(n_actions,)`` (a copy)."""
        return self._values[self._encode(obs)].copy()

    @property
    def rng(self) -> np.random.Generator:
        """The learner's own random generator."""
        return self._rng

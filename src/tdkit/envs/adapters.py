"""One step contract for every kind of environment.

(This module is ``adapters``, not ``adapt``, so that the submodule never
shadows the function ``tdkit.envs.adapt``: tools that import modules by path,
such as pytest's ``--doctest-modules``, set the submodule as an attribute of
its package.)

:func:`adapt` turns an environment of any common flavour into an object that
speaks the gymnasium step contract (Towers et al., 2024, "Gymnasium: A Standard
Interface for Reinforcement Learning Environments", arXiv:2407.17032)::

    obs, info = env.reset(seed=None, options=None)
    obs, reward, terminated, truncated, info = env.step(action)

with ``reward`` a Python ``float``, ``terminated`` and ``truncated`` Python
``bool`` and ``info`` a ``dict``. ``terminated`` means the episode reached a
terminal state (no bootstrap from ``obs``); ``truncated`` means it was cut short,
usually by a time limit (bootstrap from ``obs``, then start a new episode).

Flavours understood
-------------------
``"gymnasium"``
    ``reset`` returns ``(obs, info)``, ``step`` returns the 5-tuple above. A
    :class:`gymnasium.Env` is returned unchanged (no wrapper, no overhead);
    any other object of this flavour (a hand-written simulator, an env of
    ``gym`` >= 0.26) is wrapped only to check and normalise its results.
``"legacy"``
    The ``gym`` < 0.26 API: ``reset()`` returns ``obs`` and ``step`` returns
    ``(obs, reward, done, info)``. Following gym's ``TimeLimit`` wrapper
    (gym 0.21, ``gym/wrappers/time_limit.py``), ``info["TimeLimit.truncated"]``
    marks a time limit: ``truncated = done and info["TimeLimit.truncated"]``
    and ``terminated = done and not truncated``. Seeds go to ``reset(seed=...)``
    when ``reset`` takes one, else to ``env.seed(seed)``.
``"dm_env"``
    DeepMind's ``dm_env`` interface (``dm_env/_environment.py``): ``reset`` and
    ``step`` return time steps with attributes ``step_type``, ``reward``,
    ``discount`` and ``observation`` (duck-typed: no ``dm_env`` import needed).
    ``step_type`` is an enum with ``first()``/``mid()``/``last()`` methods or an
    int 0/1/2 (FIRST/MID/LAST). A LAST step with ``discount == 0`` is
    *terminated*; a LAST step with ``discount > 0`` is *truncated* (the
    episode was cut, the next state still has value). ``reward`` is ``None``
    on FIRST steps and then becomes 0.0. The step's ``info`` is
    ``{"discount": timestep.discount}``.

With ``api="auto"`` (the default) the flavour is read off the first results:
a time step object means dm_env; a 5-tuple from ``step`` means gymnasium and a
4-tuple means legacy. A ``reset`` result is taken as ``(obs, info)`` only when
it is a 2-tuple **whose second element is a dict**; anything else is the
observation itself. So a legacy env whose states are pairs ``(x, y)`` works,
but one whose states are ``(something, dict)`` would be misread: pass
``api="legacy"`` (or ``"gymnasium"``/``"dm_env"``) to remove that ambiguity.
With a forced ``api`` every result must be of that flavour, and ``reset`` and
``step`` are not detected independently. Once detected, ``step`` is a single
pre-chosen function: no per-step flavour tests.

Action masks
------------
Masks travel in ``info["action_mask"]`` (the gymnasium convention, used by
e.g. ``Taxi``): the adapters leave ``info`` untouched and the training loop
reads the mask from there. A dm_env-style observation that is a dict with an
``"action_mask"`` key is also passed through as is.

Examples
--------
>>> from tdkit.envs import adapt
>>> class Coin:                                  # a legacy 4-tuple simulator
...     def reset(self):
...         self.t = 0
...         return self.t
...     def step(self, action):
...         self.t += 1
...         return self.t, 1, self.t == 3, {"TimeLimit.truncated": True}
>>> env = adapt(Coin())
>>> env.reset()
(0, {})
>>> env.step(0)
(1, 1.0, False, False, {'TimeLimit.truncated': True})
>>> env.step(0)[2:4], env.step(0)[2:4]         # third step: time limit
((False, False), (False, True))
"""

from __future__ import annotations

import inspect
import numbers
import warnings
from collections.abc import Callable, Mapping
from typing import Any

import gymnasium
import numpy as np

from .._errors import EnvironmentProtocolError, InvalidParameterError
from .._text import describe as _describe
from .._text import short as _short

__all__ = ["EnvAdapter", "adapt"]

_APIS = ("auto", "gymnasium", "legacy", "dm_env")

_GYMNASIUM_STEP = "a 5-tuple (obs, reward, terminated, truncated, info) (gymnasium API)"
_LEGACY_STEP = "a 4-tuple (obs, reward, done, info) (legacy gym API)"
_DM_STEP = "a dm_env-style time step with attributes step_type, reward, discount and observation"
_ANY_STEP = f"{_GYMNASIUM_STEP}, {_LEGACY_STEP} or {_DM_STEP}"


def adapt(env_or_id: Any, *, api: str = "auto", **make_kwargs: Any) -> gymnasium.Env:
    """Return an environment that speaks the gymnasium reset/step contract.

    Parameters
    ----------
    env_or_id : gymnasium.Env, str, gymnasium.envs.registration.EnvSpec or object
        A gymnasium environment (returned unchanged), an environment id or spec
        for :func:`gymnasium.make`, or any object with ``reset`` and ``step``
        methods in the gymnasium, legacy gym or dm_env flavour (see the module
        docstring).
    api : {"auto", "gymnasium", "legacy", "dm_env"}, default "auto"
        Flavour of ``env_or_id``. ``"auto"`` detects it from the first
        ``reset``/``step`` results; forcing a flavour removes the one ambiguity
        of detection (a legacy ``reset`` returning a pair ``(x, dict)``) and
        makes a :class:`gymnasium.Env` subclass that returns legacy tuples
        usable (``api="legacy"``).
    **make_kwargs
        Passed to :func:`gymnasium.make` when ``env_or_id`` is an id or spec
        (for example ``max_episode_steps=50`` or ``is_slippery=False``).

    Returns
    -------
    gymnasium.Env
        ``env_or_id`` itself when it is already a :class:`gymnasium.Env` (and
        ``api`` is "auto" or "gymnasium"), else an :class:`EnvAdapter`. A
        gymnasium env is not checked step by step: its results are what it
        returns (``FrozenLake-v1`` gives ``int`` rewards, for instance).

    Raises
    ------
    InvalidParameterError
        For an unknown ``api``, an id gymnasium cannot make, or
        ``make_kwargs`` given with an environment object.
    EnvironmentProtocolError
        If ``env_or_id`` has no callable ``reset``/``step`` (or is a class, not
        an instance), and later when the environment returns results that
        break its flavour's contract.

    Examples
    --------
    >>> from tdkit.envs import adapt
    >>> env = adapt("FrozenLake-v1", is_slippery=False)
    >>> env.reset(seed=0)
    (0, {'prob': 1})
    >>> obs, reward, terminated, truncated, info = env.step(2)   # move right
    >>> obs, terminated, truncated
    (1, False, False)
    """
    if api not in _APIS:
        raise InvalidParameterError(
            f"adapt: api must be one of {', '.join(map(repr, _APIS))}; got {api!r}."
        )
    if isinstance(env_or_id, str | gymnasium.envs.registration.EnvSpec):
        if api not in ("auto", "gymnasium"):
            raise InvalidParameterError(
                f"adapt: gymnasium.make({_id_of(env_or_id)!r}) always gives a gymnasium-API "
                f"environment; got api={api!r}. Drop api= or pass an environment object."
            )
        return _make(env_or_id, make_kwargs)
    if make_kwargs:
        raise InvalidParameterError(
            f"adapt: keyword arguments {sorted(make_kwargs)} are passed to gymnasium.make and "
            f"only apply when env_or_id is an id string; got an object of type "
            f"{type(env_or_id).__name__}. Configure the object before adapting it."
        )
    if isinstance(env_or_id, EnvAdapter):
        if api in ("auto", env_or_id.api):
            return env_or_id
        return EnvAdapter(env_or_id.env, api=api)
    if isinstance(env_or_id, gymnasium.Env) and api in ("auto", "gymnasium"):
        return env_or_id
    return EnvAdapter(env_or_id, api=api)


class EnvAdapter(gymnasium.Env):
    """Gymnasium-contract view of a legacy gym, dm_env-style or plain env.

    Usually made by :func:`adapt`. It subclasses :class:`gymnasium.Env`, so
    gymnasium wrappers (``TimeLimit``, ``RecordEpisodeStatistics``, ...) can
    wrap it.

    Parameters
    ----------
    env : object
        Any object with callable ``reset`` and ``step``.
    api : {"auto", "gymnasium", "legacy", "dm_env"}, default "auto"
        Flavour of ``env`` (see the module docstring).

    Attributes
    ----------
    env : object
        The wrapped object.
    api : str
        The flavour asked for (``"auto"`` stays ``"auto"`` after detection).
    observation_space, action_space : gymnasium.spaces.Space or None
        The wrapped object's spaces when it has them, else ``None``.
    unwrapped : object
        The innermost environment (``env.unwrapped`` when ``env`` has one).

    Notes
    -----
    The step function of the flavour (``_step``) is chosen once, when the
    flavour is known, and then only checks types with identity tests on its
    fast path. It returns the wrapped
    env's own tuple when that is already well-formed (a gymnasium-flavour
    object returning ``float``/``bool``/``dict``).
    """

    def __init__(self, env: Any, *, api: str = "auto") -> None:
        if api not in _APIS:
            raise InvalidParameterError(
                f"EnvAdapter: api must be one of {', '.join(map(repr, _APIS))}; got {api!r}."
            )
        _require_reset_step(env)
        self.env = env
        self.api = api
        self.observation_space = getattr(env, "observation_space", None)
        self.action_space = getattr(env, "action_space", None)
        self.render_mode = getattr(env, "render_mode", None)
        metadata = getattr(env, "metadata", None)
        self.metadata = dict(metadata) if isinstance(metadata, Mapping) else {"render_modes": []}
        self._takes_seed, self._takes_options = _reset_keywords(env.reset)
        self._warned_unseedable = False
        # Flavour of reset results ("pair", "bare", "timestep") and of step results
        # ("gymnasium", "legacy", "dm_env", "dm_env_methods"); None until detected.
        self._reset_kind: str | None = None
        self._step_kind: str | None = None
        self._step: Callable[[Any], tuple] = self._detect_and_step
        if api == "gymnasium":
            self._reset_kind = "pair"
            self._install_step("gymnasium")
        elif api == "legacy":
            self._reset_kind = "bare"
            self._install_step("legacy")
        elif api == "dm_env":
            self._reset_kind = "timestep"
            # the step function is installed on the first step, which shows whether
            # step_type is an int or an enum with first()/mid()/last() methods.

    # -- the contract --------------------------------------------------------------------

    def reset(self, *, seed: int | None = None, options: dict | None = None) -> tuple:
        """Reset the wrapped env and return ``(obs, info)``.

        ``seed`` goes to the wrapped ``reset(seed=...)`` when it accepts one, else
        to ``env.seed(seed)`` when that exists; otherwise a warning (once) says
        that the env cannot be seeded.
        """
        kwargs: dict[str, Any] = {}
        if seed is not None:
            if self._takes_seed:
                kwargs["seed"] = seed
            else:
                self._seed_fallback(seed)
        if options is not None:
            if not self._takes_options:
                raise EnvironmentProtocolError(
                    f"{self._name()}.reset() takes no 'options' argument; got "
                    f"options={_short(options)}. Drop options= or add an options "
                    "parameter to the environment's reset."
                )
            kwargs["options"] = options
        result = self.env.reset(**kwargs)
        kind = self._reset_kind
        if kind is None:
            kind = self._reset_kind = _detect_reset_kind(result)
        if kind == "pair":
            if type(result) is tuple and len(result) == 2 and isinstance(result[1], dict):
                return result
            raise self._reset_error(result, "a 2-tuple (obs, info) with info a dict")
        if kind == "bare":
            if result is None:
                raise self._reset_error(result, "the first observation (legacy gym API)")
            return result, {}
        return self._reset_timestep(result), {}

    def step(self, action: Any) -> tuple:
        """Advance one step; return ``(obs, reward, terminated, truncated, info)``.

        The first call detects the flavour from the result; every call then goes
        through the step function of that flavour (``_step``).
        """
        return self._step(action)

    def _detect_and_step(self, action: Any) -> tuple:
        result = self.env.step(action)
        kind = self._step_kind_of(result, action)
        self._install_step(kind)
        return self._normalise(kind, result, action)

    def close(self) -> None:
        """Close the wrapped env when it has a ``close`` method."""
        close = getattr(self.env, "close", None)
        if callable(close):
            close()

    def render(self) -> Any:
        """Return the wrapped env's ``render()`` (``None`` when it has none)."""
        render = getattr(self.env, "render", None)
        return render() if callable(render) else None

    @property
    def unwrapped(self) -> Any:
        """The innermost environment: ``env.unwrapped`` if it has one, else ``env``."""
        inner = getattr(self.env, "unwrapped", None)
        return self.env if inner is None else inner

    def __repr__(self) -> str:
        flavour = self._step_kind or self._reset_kind or "undetected"
        return f"EnvAdapter({_short(self.env)}, api={self.api!r}, flavour={flavour!r})"

    __str__ = __repr__

    # copy / pickle: the installed step closure refers to the wrapped env's bound
    # method, so it is rebuilt rather than copied.
    def __getstate__(self) -> dict:
        state = self.__dict__.copy()
        state.pop("_step", None)  # a closure over the wrapped env's bound step
        return state

    def __setstate__(self, state: dict) -> None:
        self.__dict__.update(state)
        self._step = self._detect_and_step
        if self._step_kind is not None:
            self._install_step(self._step_kind)

    # -- internals -------------------------------------------------------------------------

    def _name(self) -> str:
        return type(self.env).__name__

    def _seed_fallback(self, seed: Any) -> None:
        seeder = getattr(self.env, "seed", None)
        if callable(seeder):
            seeder(seed)
        elif not self._warned_unseedable:
            self._warned_unseedable = True
            warnings.warn(
                f"{self._name()} cannot be seeded: its reset() takes no seed argument and it "
                f"has no seed() method, so reset(seed={seed!r}) does not make runs "
                "reproducible. Give the environment a reset(seed=...) or seed(seed) method, "
                "or seed it yourself before training.",
                UserWarning,
                stacklevel=3,
            )

    def _reset_error(self, result: Any, expected: str) -> EnvironmentProtocolError:
        return EnvironmentProtocolError(
            f"{self._name()}.reset() returned {_describe(result)}; expected {expected}. "
            f"(adapt api={self.api!r}; pass api= to state the environment's flavour.)"
        )

    def _reset_timestep(self, ts: Any) -> Any:
        try:
            step_type, obs = ts.step_type, ts.observation
        except AttributeError:
            raise self._reset_error(ts, _DM_STEP) from None
        first = step_type.first() if hasattr(step_type, "first") else step_type == 0
        if not first:
            raise self._reset_error(ts, "a time step whose step_type is FIRST (0)")
        return obs

    def _step_kind_of(self, result: Any, action: Any) -> str:
        api = self.api
        where = f"{self._name()}.step({_short(action)})"
        if api in ("auto", "dm_env") and _is_timestep(result):
            step_type = result.step_type
            if isinstance(step_type, numbers.Integral):
                if step_type not in (0, 1, 2):
                    raise EnvironmentProtocolError(
                        f"{where} returned a time step with step_type={step_type!r}; "
                        "expected 0, 1 or 2 (FIRST, MID, LAST)."
                    )
                return "dm_env"
            if callable(getattr(step_type, "last", None)):
                return "dm_env_methods"
            raise EnvironmentProtocolError(
                f"{where} returned a time step whose step_type is {_describe(step_type)}; "
                "expected an int 0/1/2 or an enum with first()/mid()/last() methods."
            )
        if api == "auto" and isinstance(result, tuple | list) and len(result) in (4, 5):
            return "gymnasium" if len(result) == 5 else "legacy"
        if api == "auto":
            raise EnvironmentProtocolError(
                f"{where} returned {_describe(result)}; expected {_ANY_STEP}."
            )
        raise EnvironmentProtocolError(
            f"{where} returned {_describe(result)}; expected {_DM_STEP} "
            "(adapt was called with api='dm_env')."
        )

    def _normalise(self, kind: str, result: Any, action: Any) -> tuple:
        name = self._name()
        if kind == "gymnasium":
            return _normalise_gymnasium(result, name, action)
        if kind == "legacy":
            return _normalise_legacy(result, name, action)
        return _normalise_dm(result, name, action, by_int=kind == "dm_env")

    def _install_step(self, kind: str) -> None:
        self._step_kind = kind
        self._step = _STEP_FACTORIES[kind](self.env.step, self._name())


# -- step functions, one per flavour ----------------------------------------------------------
# Each factory returns a closure over the wrapped env's bound ``step`` (not over the
# adapter, so no reference cycle). The fast path uses identity tests only; anything
# else goes through the ``_normalise_*`` function of the flavour, which converts
# numpy scalars and raises EnvironmentProtocolError with the offending value.


def _gymnasium_step(env_step: Callable, name: str) -> Callable:
    def step(action: Any) -> tuple:
        result = env_step(action)
        if type(result) is tuple and len(result) == 5:
            obs, reward, terminated, truncated, info = result
            if (
                (terminated is True or terminated is False)
                and (truncated is True or truncated is False)
                and type(info) is dict
            ):
                if type(reward) is float:
                    return result
                return obs, _as_reward(reward, result, name, action), terminated, truncated, info
        return _normalise_gymnasium(result, name, action)

    return step


def _legacy_step(env_step: Callable, name: str) -> Callable:
    def step(action: Any) -> tuple:
        result = env_step(action)
        if type(result) is tuple and len(result) == 4:
            obs, reward, done, info = result
            if (done is True or done is False) and type(info) is dict:
                if type(reward) is not float:
                    reward = _as_reward(reward, result, name, action)
                if done:
                    truncated = bool(info.get("TimeLimit.truncated", False))
                    return obs, reward, not truncated, truncated, info
                return obs, reward, False, False, info
        return _normalise_legacy(result, name, action)

    return step


def _dm_step_factory(by_int: bool) -> Callable:
    def factory(env_step: Callable, name: str) -> Callable:
        def step(action: Any) -> tuple:
            ts = env_step(action)
            try:
                step_type = ts.step_type
                reward = ts.reward
                discount = ts.discount
                obs = ts.observation
            except AttributeError:
                return _normalise_dm(ts, name, action, by_int=by_int)
            if type(reward) is not float:
                reward = _dm_reward(reward, step_type, ts, name, action, by_int)
            if step_type == 2 if by_int else step_type.last():
                d = _as_discount(discount, ts, name, action)
                return obs, reward, d == 0.0, d != 0.0, {"discount": discount}
            return obs, reward, False, False, {"discount": discount}

        return step

    return factory


_STEP_FACTORIES: dict[str, Callable[[Callable, str], Callable]] = {
    "gymnasium": _gymnasium_step,
    "legacy": _legacy_step,
    "dm_env": _dm_step_factory(by_int=True),
    "dm_env_methods": _dm_step_factory(by_int=False),
}


def _normalise_gymnasium(result: Any, name: str, action: Any) -> tuple:
    if not isinstance(result, tuple | list) or len(result) != 5:
        raise _step_error(result, name, action, _GYMNASIUM_STEP)
    obs, reward, terminated, truncated, info = result
    normal = (
        obs,
        _as_reward(reward, result, name, action),
        _as_flag(terminated, "terminated", result, name, action),
        _as_flag(truncated, "truncated", result, name, action),
        _as_info(info, result, name, action),
    )
    if type(result) is tuple and all(a is b for a, b in zip(normal, result, strict=True)):
        return result
    return normal


def _normalise_legacy(result: Any, name: str, action: Any) -> tuple:
    if not isinstance(result, tuple | list) or len(result) != 4:
        raise _step_error(result, name, action, _LEGACY_STEP)
    obs, reward, done, info = result
    reward = _as_reward(reward, result, name, action)
    done = _as_flag(done, "done", result, name, action)
    info = _as_info(info, result, name, action)
    truncated = done and _as_flag(
        info.get("TimeLimit.truncated", False),
        "info['TimeLimit.truncated']",
        result,
        name,
        action,
    )
    return obs, reward, done and not truncated, truncated, info


def _normalise_dm(ts: Any, name: str, action: Any, *, by_int: bool) -> tuple:
    if not _is_timestep(ts):
        raise _step_error(ts, name, action, _DM_STEP)
    step_type = ts.step_type
    reward = _dm_reward(ts.reward, step_type, ts, name, action, by_int)
    last = step_type == 2 if by_int else step_type.last()
    if not last:
        return ts.observation, reward, False, False, {"discount": ts.discount}
    d = _as_discount(ts.discount, ts, name, action)
    return ts.observation, reward, d == 0.0, d != 0.0, {"discount": ts.discount}


# -- value checks (slow paths) -----------------------------------------------------------------


def _as_reward(reward: Any, result: Any, name: str, action: Any) -> float:
    if type(reward) is int or isinstance(reward, float):  # cheap tests first (np.float64 too)
        return float(reward)
    if isinstance(reward, numbers.Real) and not isinstance(reward, bool | np.bool_):
        return float(reward)
    if isinstance(reward, np.ndarray) and reward.ndim == 0 and reward.dtype.kind in "iuf":
        return float(reward)
    hint = (
        " A bool reward often means the tuple's items are out of order."
        if isinstance(reward, bool | np.bool_)
        else ""
    )
    raise EnvironmentProtocolError(
        f"{name}.step({_short(action)}) returned a reward that is not a real number: "
        f"{_describe(reward)}, in {_describe(result)}. Return the reward as a float.{hint}"
    )


def _dm_reward(reward: Any, step_type: Any, ts: Any, name: str, action: Any, by_int: bool) -> float:
    if reward is None:
        first = step_type == 0 if by_int else step_type.first()
        if first:
            return 0.0
    return _as_reward(reward, ts, name, action)


def _as_flag(value: Any, label: str, result: Any, name: str, action: Any) -> bool:
    if value is True or value is False:
        return value
    if isinstance(value, np.bool_) or (
        isinstance(value, np.ndarray) and value.shape == () and value.dtype.kind == "b"
    ):
        return bool(value)
    if isinstance(value, numbers.Integral) and value in (0, 1):
        return bool(value)
    raise EnvironmentProtocolError(
        f"{name}.step({_short(action)}) returned {label}={_describe(value)}, which is not a "
        f"bool, in {_describe(result)}. Return True or False."
    )


def _as_info(info: Any, result: Any, name: str, action: Any) -> dict:
    if isinstance(info, dict):
        return info
    if isinstance(info, Mapping):
        return dict(info)
    raise EnvironmentProtocolError(
        f"{name}.step({_short(action)}) returned info={_describe(info)}, which is not a dict, "
        f"in {_describe(result)}. Return a dict (use {{}} for no information)."
    )


def _as_discount(discount: Any, ts: Any, name: str, action: Any) -> float:
    if (
        isinstance(discount, numbers.Real | np.ndarray)
        and not isinstance(discount, bool | np.bool_)
        and np.ndim(discount) == 0
    ):
        d = float(discount)
        if d >= 0.0:
            return d
    raise EnvironmentProtocolError(
        f"{name}.step({_short(action)}) returned a LAST time step with discount="
        f"{_describe(discount)}; expected a number >= 0 (0 ends the episode in a terminal "
        f"state, > 0 marks a truncation). Time step: {_describe(ts)}."
    )


def _step_error(result: Any, name: str, action: Any, expected: str) -> EnvironmentProtocolError:
    return EnvironmentProtocolError(
        f"{name}.step({_short(action)}) returned {_describe(result)}; expected {expected}."
    )


# -- helpers ---------------------------------------------------------------------------------------


def _make(env_id: Any, make_kwargs: dict) -> gymnasium.Env:
    name = _id_of(env_id)
    try:
        return gymnasium.make(env_id, **make_kwargs)
    except gymnasium.error.UnregisteredEnv as exc:
        raise InvalidParameterError(
            f"adapt: gymnasium has no environment with id {name!r} ({exc}). Check the "
            "spelling and version (ids look like 'FrozenLake-v1'), import the package that "
            "registers it first, or pass an environment object instead."
        ) from exc
    except gymnasium.error.Error as exc:
        raise InvalidParameterError(f"adapt: gymnasium.make({name!r}) failed: {exc}") from exc


def _id_of(env_id: Any) -> str:
    return env_id if isinstance(env_id, str) else getattr(env_id, "id", repr(env_id))


def _require_reset_step(env: Any) -> None:
    if isinstance(env, type):
        raise EnvironmentProtocolError(
            f"adapt: got the class {env.__name__}, not an instance; pass {env.__name__}(...)."
        )
    if isinstance(env, gymnasium.vector.VectorEnv):
        raise EnvironmentProtocolError(
            f"adapt: {type(env).__name__} is a vector environment (batched reset/step); "
            "tdkit's tabular learners step one environment at a time. Pass a single env."
        )
    missing = [m for m in ("reset", "step") if not callable(getattr(env, m, None))]
    if missing:
        raise EnvironmentProtocolError(
            f"adapt: an object of type {type(env).__name__} has no callable "
            f"{' or '.join(missing)}; an environment needs reset() and step(action) "
            "(gymnasium, legacy gym or dm_env style), or pass a gymnasium id string."
        )


def _reset_keywords(reset: Callable) -> tuple[bool, bool]:
    """Whether ``reset`` accepts ``seed=`` and ``options=`` keywords."""
    try:
        params = inspect.signature(reset).parameters.values()
    except (TypeError, ValueError):  # builtins and extension types without a signature
        return False, False
    if any(p.kind is inspect.Parameter.VAR_KEYWORD for p in params):
        return True, True
    names = {
        p.name
        for p in params
        if p.kind in (inspect.Parameter.KEYWORD_ONLY, inspect.Parameter.POSITIONAL_OR_KEYWORD)
    }
    return "seed" in names, "options" in names


def _is_timestep(x: Any) -> bool:
    return all(hasattr(x, a) for a in ("step_type", "reward", "discount", "observation"))


def _detect_reset_kind(result: Any) -> str:
    if _is_timestep(result):
        return "timestep"
    if type(result) is tuple and len(result) == 2 and isinstance(result[1], dict):
        return "pair"
    return "bare"

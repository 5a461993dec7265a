"""Tests of tdkit.envs.adapt: one gymnasium step contract for every env flavour.

The legacy 4-tuple contract and its ``info["TimeLimit.truncated"]`` flag follow
gym 0.21 (``gym/wrappers/time_limit.py``); the time step contract follows
DeepMind's dm_env (``dm_env/_environment.py``: StepType FIRST=0, MID=1, LAST=2;
a LAST step with discount 0 is terminal). Both are imitated by tiny classes
here, so neither package is needed.
"""

from __future__ import annotations

import copy
import enum
import pickle
import warnings
from typing import Any, NamedTuple

import gymnasium
import numpy as np
import pytest

from tdkit._errors import EnvironmentProtocolError, InvalidParameterError
from tdkit.envs import EnvAdapter, adapt


def _registered(*ids: str) -> str:
    """The first of ``ids`` registered in this gymnasium (ids move between versions)."""
    for env_id in ids:
        if env_id in gymnasium.registry:
            return env_id
    pytest.skip(f"none of {ids} is registered in gymnasium {gymnasium.__version__}")


# FrozenLake (gymnasium toy text); CliffWalking: Sutton & Barto (2018), Example 6.6;
# Taxi: Dietterich (2000), "Hierarchical RL with the MAXQ value function decomposition".
GYMNASIUM_IDS = [
    ("FrozenLake-v1",),
    ("CliffWalking-v1", "CliffWalking-v0"),
    ("Taxi-v4", "Taxi-v3"),
]


# -- fake environments ------------------------------------------------------------------------


class LegacyWalk:
    """gym < 0.26 style random walk on 0..n: reset() -> obs, step -> (obs, r, done, info).

    Ends at 0 or n (terminal), or after ``limit`` steps with
    info["TimeLimit.truncated"] = True, as gym 0.21's TimeLimit wrapper did.
    """

    observation_space = gymnasium.spaces.Discrete(7)
    action_space = gymnasium.spaces.Discrete(2)

    def __init__(self, n: int = 6, limit: int = 1000, flag_type: Any = bool) -> None:
        self.n, self.limit, self.flag_type = n, limit, flag_type
        self.rng = np.random.default_rng()
        self.closed = False

    def seed(self, seed: int | None = None) -> list:
        self.rng = np.random.default_rng(seed)
        return [seed]

    def reset(self) -> int:
        self.pos, self.t = self.n // 2, 0
        return self.pos

    def step(self, action: int) -> tuple:
        move = 1 if self.rng.random() < (0.8 if action == 1 else 0.2) else -1
        self.pos += move
        self.t += 1
        info: dict[str, Any] = {}
        done = self.pos in (0, self.n)
        if not done and self.t >= self.limit:
            done = True
            info["TimeLimit.truncated"] = self.flag_type(True)
        return self.pos, int(self.pos == self.n), done, info

    def close(self) -> None:
        self.closed = True


class LegacySeedKeyword(LegacyWalk):
    """gym 0.22-0.25 style: reset(seed=None) still returns the bare observation."""

    seed = None  # type: ignore[assignment]  # no seed() method: reset takes the seed

    def reset(self, seed: int | None = None) -> int:  # type: ignore[override]
        if seed is not None:
            self.rng = np.random.default_rng(seed)
        return super().reset()


class Unseedable(LegacyWalk):
    """A legacy env with neither reset(seed=) nor seed()."""

    seed = None  # type: ignore[assignment]


class StepType(enum.IntEnum):
    """Mirrors dm_env.StepType: an IntEnum with first()/mid()/last() methods."""

    FIRST = 0
    MID = 1
    LAST = 2

    def first(self) -> bool:
        return self is StepType.FIRST

    def mid(self) -> bool:
        return self is StepType.MID

    def last(self) -> bool:
        return self is StepType.LAST


class MethodStepType:
    """A step type that is not an int at all, only first()/mid()/last()."""

    def __init__(self, code: int) -> None:
        self.code = code

    def first(self) -> bool:
        return self.code == 0

    def mid(self) -> bool:
        return self.code == 1

    def last(self) -> bool:
        return self.code == 2


class TimeStep(NamedTuple):
    step_type: Any
    reward: Any
    discount: Any
    observation: Any


class DmCorridor:
    """dm_env-style corridor 0..n: action 1 moves right, 0 left; n is terminal.

    After ``limit`` steps it returns LAST with discount 1.0 (a time limit, as
    dm_control's suites do). ``step_types`` picks how step types are spelled.
    """

    def __init__(self, n: int = 3, limit: int = 100, step_types: str = "enum") -> None:
        self.n, self.limit = n, limit
        self.kind = {"enum": StepType, "int": int, "methods": MethodStepType}[step_types]
        self.with_mask = False

    def _obs(self) -> Any:
        if self.with_mask:
            return {"pos": self.pos, "action_mask": np.array([self.pos > 0, True])}
        return self.pos

    def reset(self) -> TimeStep:
        self.pos, self.t = 0, 0
        return TimeStep(self.kind(0), None, None, self._obs())

    def step(self, action: int) -> TimeStep:
        self.pos = max(0, self.pos + (1 if action == 1 else -1))
        self.t += 1
        if self.pos == self.n:
            return TimeStep(self.kind(2), 1.0, 0.0, self._obs())
        if self.t >= self.limit:
            return TimeStep(self.kind(2), 0.0, 1.0, self._obs())
        return TimeStep(self.kind(1), 0.0, 1.0, self._obs())


class GridSim:
    """Hand-written new-API simulator whose states are (row, col) tuples.

    A 2 x 3 grid from (0, 0) to the goal (1, 2); actions are the strings
    "right" and "down"; ``limit`` steps truncate.
    """

    def __init__(self, limit: int = 100, bare_reset: bool = False) -> None:
        self.limit, self.bare_reset = limit, bare_reset

    def reset(self, *, seed: int | None = None, options: dict | None = None) -> Any:
        self.state, self.t = (0, 0), 0
        self.last_options = options
        return self.state if self.bare_reset else (self.state, {"start": True})

    def step(self, action: str) -> tuple:
        r, c = self.state
        self.state = (r, min(c + 1, 2)) if action == "right" else (min(r + 1, 1), c)
        self.t += 1
        terminated = self.state == (1, 2)
        return self.state, -1.0, terminated, self.t >= self.limit and not terminated, {}


class Scripted:
    """Returns pre-set results from reset and step, to feed the adapter anything."""

    def __init__(self, reset_result: Any = 0, step_result: Any = None) -> None:
        self.reset_result, self.step_result = reset_result, step_result

    def reset(self) -> Any:
        return self.reset_result

    def step(self, action: Any) -> Any:
        return self.step_result


def rollout(env: Any, seed: int | None, actions: list) -> list[tuple]:
    """Reset with ``seed`` and play ``actions`` until the episode ends."""
    obs, _ = env.reset(seed=seed)
    trace: list[tuple] = [obs]
    for a in actions:
        obs, reward, terminated, truncated, _ = env.step(a)
        trace.append((obs, reward, terminated, truncated))
        if terminated or truncated:
            break
    return trace


# -- gymnasium environments --------------------------------------------------------------------


@pytest.mark.parametrize("ids", GYMNASIUM_IDS, ids=lambda ids: ids[0])
def test_gymnasium_instance_is_returned_unchanged(ids: tuple[str, ...]) -> None:
    env = gymnasium.make(_registered(*ids))
    assert adapt(env) is env
    assert adapt(env, api="gymnasium") is env


@pytest.mark.parametrize("ids", GYMNASIUM_IDS, ids=lambda ids: ids[0])
def test_gymnasium_id_is_made_and_seeds_reproduce_trajectories(ids: tuple[str, ...]) -> None:
    env_id = _registered(*ids)
    env = adapt(env_id)
    assert isinstance(env, gymnasium.Env)
    assert env.spec is not None and env.spec.id == env_id
    actions = np.random.default_rng(123).integers(env.action_space.n, size=60).tolist()
    first = rollout(env, 7, actions)
    assert rollout(adapt(env_id), 7, actions) == first
    assert rollout(env, 7, actions) == first


def test_make_kwargs_reach_gymnasium_make() -> None:
    env = adapt("FrozenLake-v1", is_slippery=False)
    env.reset(seed=0)
    # Deterministic lake: right (action 2) from the start state 0 is state 1 (gymnasium's
    # FrozenLake-v1 default 4x4 map "SFFF/FHFH/FFFH/HFFG", states numbered row by row).
    assert env.step(2)[0] == 1


def test_gymnasium_time_limit_truncation_is_preserved() -> None:
    env = adapt(_registered("CliffWalking-v1", "CliffWalking-v0"), max_episode_steps=5)
    env.reset(seed=0)
    flags = [env.step(0)[2:4] for _ in range(5)]  # action 0 = up: never reaches the goal
    assert flags == [(False, False)] * 4 + [(False, True)]


def test_gymnasium_termination_is_preserved() -> None:
    env = adapt("FrozenLake-v1", is_slippery=False)
    env.reset(seed=0)
    # Same 4x4 map; actions 0-3 are left, down, right, up (gymnasium FrozenLake-v1 docs).
    for a in (1, 1, 2, 2, 1):  # down, down, right, right, down: (3, 2) ...
        obs, reward, terminated, truncated, _ = env.step(a)
    obs, reward, terminated, truncated, _ = env.step(2)  # ... right to the goal (3, 3)
    assert (obs, reward, terminated, truncated) == (15, 1.0, True, False)


def test_taxi_action_mask_stays_in_info() -> None:
    env = adapt(_registered("Taxi-v4", "Taxi-v3"))
    _, info = env.reset(seed=3)
    assert info["action_mask"].shape == (6,)
    assert "action_mask" in env.step(0)[4]


@pytest.mark.parametrize("bad", ["NoSuchEnv-v0", "FrozenLake-v99", "not a valid id!", "nope/X-v0"])
def test_bad_id_names_the_id(bad: str) -> None:
    with pytest.raises(InvalidParameterError) as info:
        adapt(bad)
    assert repr(bad) in str(info.value)
    assert isinstance(info.value, ValueError)


def test_api_argument_is_validated() -> None:
    with pytest.raises(InvalidParameterError, match="api must be one of"):
        adapt(LegacyWalk(), api="gym")
    with pytest.raises(InvalidParameterError, match="api='legacy'"):
        adapt("FrozenLake-v1", api="legacy")


def test_make_kwargs_with_an_object_are_refused() -> None:
    with pytest.raises(InvalidParameterError, match=r"\['max_episode_steps'\].*LegacyWalk"):
        adapt(LegacyWalk(), max_episode_steps=10)


@pytest.mark.parametrize("obj", [object(), 42, {"reset": 1}])
def test_objects_without_reset_step_are_refused(obj: Any) -> None:
    with pytest.raises(EnvironmentProtocolError) as info:
        adapt(obj)
    text = str(info.value)
    assert type(obj).__name__ in text and "reset" in text and "step" in text
    assert isinstance(info.value, TypeError)


def test_a_class_instead_of_an_instance_is_refused() -> None:
    with pytest.raises(EnvironmentProtocolError, match=r"class LegacyWalk.*LegacyWalk\(\.\.\.\)"):
        adapt(LegacyWalk)


def test_vector_envs_are_refused() -> None:
    venv = gymnasium.vector.SyncVectorEnv([lambda: gymnasium.make("FrozenLake-v1")] * 2)
    with pytest.raises(EnvironmentProtocolError, match="vector environment"):
        adapt(venv)


# -- legacy gym flavour ------------------------------------------------------------------------


def test_legacy_reset_and_step_speak_the_new_contract() -> None:
    env = adapt(LegacyWalk())
    assert isinstance(env, EnvAdapter) and isinstance(env, gymnasium.Env)
    obs, info = env.reset(seed=0)
    assert (obs, info) == (3, {})
    obs, reward, terminated, truncated, info = env.step(1)
    assert type(reward) is float and type(terminated) is bool and type(truncated) is bool
    assert isinstance(info, dict)


@pytest.mark.parametrize("flag_type", [bool, np.bool_])
def test_legacy_time_limit_flag_means_truncated(flag_type: Any) -> None:
    # limit=1 from the middle of 0..6: the first step cannot reach an end, so it is cut.
    env = adapt(LegacyWalk(limit=1, flag_type=flag_type))
    env.reset(seed=0)
    _, _, terminated, truncated, info = env.step(1)
    assert (terminated, truncated) == (False, True)
    assert info["TimeLimit.truncated"]  # info is passed on unchanged


def test_legacy_done_without_flag_means_terminated() -> None:
    env = adapt(LegacyWalk(n=2))  # start at 1: any move ends at 0 or 2, both terminal
    env.reset(seed=0)
    assert env.step(1)[2:4] == (True, False)


def test_legacy_done_with_false_flag_means_terminated() -> None:
    env = adapt(Scripted(0, (1, 0.5, True, {"TimeLimit.truncated": False})))
    env.reset()
    assert env.step(0) == (1, 0.5, True, False, {"TimeLimit.truncated": False})


def test_legacy_not_done_means_neither_flag() -> None:
    env = adapt(Scripted(0, (1, 2, False, {"TimeLimit.truncated": True})))
    env.reset()
    assert env.step(0)[1:4] == (2.0, False, False)


def test_legacy_numpy_values_are_normalised() -> None:
    env = adapt(Scripted(0, (1, np.float32(0.5), np.bool_(True), {})))
    env.reset()
    _, reward, terminated, truncated, _ = env.step(0)
    assert (reward, terminated, truncated) == (0.5, True, False)
    assert type(reward) is float and type(terminated) is bool


@pytest.mark.parametrize("factory", [LegacyWalk, LegacySeedKeyword], ids=["seed()", "reset(seed)"])
def test_legacy_seeding_reproduces_trajectories(factory: Any) -> None:
    actions = [1, 0, 1, 1, 0, 1, 0, 0, 1, 1] * 5
    env = adapt(factory())
    first = rollout(env, 11, actions)
    assert rollout(env, 11, actions) == first
    assert rollout(adapt(factory()), 11, actions) == first
    others = [rollout(env, s, actions) for s in range(5)]
    assert any(t != first for t in others)  # the seed matters


def test_unseedable_env_warns_once() -> None:
    env = adapt(Unseedable())
    with pytest.warns(UserWarning, match="Unseedable cannot be seeded"):
        env.reset(seed=1)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        env.reset(seed=2)
        env.reset()


def test_reset_without_seed_does_not_seed() -> None:
    env = LegacyWalk()
    calls: list = []
    env.seed = lambda seed=None: calls.append(seed)  # type: ignore[method-assign]
    adapted = adapt(env)
    adapted.reset()
    adapted.reset(seed=5)
    assert calls == [5]


def test_gymnasium_time_limit_wraps_an_adapted_legacy_env() -> None:
    env = gymnasium.wrappers.TimeLimit(adapt(LegacyWalk(n=100)), max_episode_steps=3)
    env.reset(seed=0)
    assert [env.step(1)[2:4] for _ in range(3)][-1] == (False, True)


def test_gymnasium_env_with_legacy_results_can_be_forced() -> None:
    class OldStyleEnv(gymnasium.Env):
        observation_space = gymnasium.spaces.Discrete(2)
        action_space = gymnasium.spaces.Discrete(2)

        def reset(self, *, seed=None, options=None):
            return 0

        def step(self, action):
            return 1, 1, True, {}

    raw = OldStyleEnv()
    assert adapt(raw) is raw  # auto trusts a gymnasium.Env
    env = adapt(raw, api="legacy")
    assert env.reset() == (0, {}) and env.step(0) == (1, 1.0, True, False, {})


# -- dm_env flavour ------------------------------------------------------------------------------


@pytest.mark.parametrize("step_types", ["enum", "int", "methods"])
def test_dm_env_terminal_step_is_terminated(step_types: str) -> None:
    env = adapt(DmCorridor(n=2, step_types=step_types))
    assert env.reset() == (0, {})
    assert env.step(1) == (1, 0.0, False, False, {"discount": 1.0})
    assert env.step(1) == (2, 1.0, True, False, {"discount": 0.0})


@pytest.mark.parametrize("step_types", ["enum", "int", "methods"])
def test_dm_env_last_step_with_discount_is_truncated(step_types: str) -> None:
    env = adapt(DmCorridor(n=5, limit=2, step_types=step_types), api="dm_env")
    env.reset()
    assert env.step(1)[2:4] == (False, False)
    assert env.step(1)[2:4] == (False, True)


def test_dm_env_first_reward_none_is_zero() -> None:
    ts_first = TimeStep(StepType.FIRST, None, None, 9)
    env = adapt(Scripted(ts_first, ts_first))  # a step that restarts the episode
    assert env.reset() == (9, {})
    assert env.step(0)[:4] == (9, 0.0, False, False)


def test_dm_env_dict_observation_with_mask_is_passed_through() -> None:
    corridor = DmCorridor()
    corridor.with_mask = True
    env = adapt(corridor)
    obs, _ = env.reset()
    assert set(obs) == {"pos", "action_mask"}
    assert obs["action_mask"].tolist() == [False, True]
    assert env.step(1)[0]["action_mask"].tolist() == [True, True]


def test_dm_env_unseedable_warns() -> None:
    env = adapt(DmCorridor())
    with pytest.warns(UserWarning, match="cannot be seeded"):
        env.reset(seed=0)


# -- plain new-API objects ---------------------------------------------------------------------


def test_plain_object_with_tuple_states() -> None:
    env = adapt(GridSim(limit=10))
    obs, info = env.reset(seed=0)
    assert obs == (0, 0) and info == {"start": True}
    trace = rollout(env, 0, ["right", "right", "down"])
    assert trace[1:] == [
        ((0, 1), -1.0, False, False),
        ((0, 2), -1.0, False, False),
        ((1, 2), -1.0, True, False),
    ]


def test_plain_object_truncation() -> None:
    env = adapt(GridSim(limit=2))
    env.reset()
    assert [env.step("down")[2:4] for _ in range(2)] == [(False, False), (False, True)]


def test_plain_object_with_bare_reset_and_five_tuple_step() -> None:
    env = adapt(GridSim(bare_reset=True))
    assert env.reset() == ((0, 0), {})  # a pair whose second item is not a dict is the state
    assert env.step("down")[:4] == ((1, 0), -1.0, False, False)


def test_well_formed_results_pass_without_copy() -> None:
    result = ((0, 1), -1.0, False, False, {})
    env = adapt(Scripted(((0, 0), {}), result))
    env.reset()
    assert env.step(0) is result
    assert env.step(0) is result  # the installed fast path too


def test_options_reach_reset_when_accepted() -> None:
    sim = GridSim()
    env = adapt(sim)
    env.reset(options={"level": 2})
    assert sim.last_options == {"level": 2}
    with pytest.raises(EnvironmentProtocolError, match="takes no 'options'"):
        adapt(LegacyWalk()).reset(options={"level": 2})


def test_reset_pair_ambiguity_and_forced_api() -> None:
    # A legacy env whose state is (position, dict) reads as (obs, info) under "auto" ...
    state = (3, {"colour": "red"})
    env = adapt(Scripted(state, (state, 0, False, {})))
    assert env.reset() == state
    # ... and as the state itself once the flavour is stated.
    env = adapt(Scripted(state, (state, 0, False, {})), api="legacy")
    assert env.reset() == (state, {})
    assert env.step(0)[0] == state


def test_unwrapped_spaces_and_close() -> None:
    inner = LegacyWalk()
    env = adapt(inner)
    assert env.unwrapped is inner
    assert env.observation_space is inner.observation_space
    assert env.action_space is inner.action_space
    env.close()
    assert inner.closed
    bare = adapt(GridSim())
    assert bare.observation_space is None and bare.action_space is None
    bare.close()  # no close() on the simulator: nothing to do

    class Outer(GridSim):
        unwrapped = "the model"

    assert adapt(Outer()).unwrapped == "the model"


def test_adapt_is_idempotent() -> None:
    env = adapt(LegacyWalk())
    assert adapt(env) is env
    assert adapt(env, api="legacy") is not env
    assert adapt(env, api="legacy").env is env.env


def test_copies_step_their_own_env() -> None:
    env = adapt(GridSim())
    env.reset()
    env.step("right")  # installs the step function
    for clone in (copy.deepcopy(env), pickle.loads(pickle.dumps(env))):
        clone.step("right")
        assert clone.env.state == (0, 2)
        assert env.env.state == (0, 1)
    assert "gymnasium" in repr(env)


# -- malformed results ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("step_result", "fragments"),
    [
        ((1, 0.0, False), ["step(0) returned tuple (1, 0.0, False)", "expected", "5-tuple"]),
        (None, ["returned NoneType None", "4-tuple"]),
        (np.zeros(4), ["returned ndarray array([0., 0., 0., 0.])", "dm_env"]),
        ((1, "ten", False, False, {}), ["reward that is not a real number", "str 'ten'"]),
        ((1, True, False, {}), ["bool True", "out of order"]),
        ((1, 0.0, "no", False, {}), ["terminated=str 'no'", "not a bool"]),
        ((1, 0.0, False, None, {}), ["truncated=NoneType None"]),
        ((1, 0.0, False, False, [1]), ["info=list [1]", "not a dict"]),
        ((1, 0.0, 2, {}), ["done=int 2"]),
    ],
)
def test_malformed_step_results_raise_with_what_was_returned(
    step_result: Any, fragments: list[str]
) -> None:
    env = adapt(Scripted(0, step_result))
    env.reset()
    with pytest.raises(EnvironmentProtocolError) as info:
        env.step(0)
    for fragment in fragments:
        assert fragment in str(info.value)
    assert "Scripted.step(0)" in str(info.value)


def test_malformed_result_after_detection_is_caught_too() -> None:
    env = adapt(Scripted(0, (1, 0.0, False, {})))
    env.reset()
    env.step(0)
    env.env.step_result = (1, 0.0, False, {}, "extra")
    with pytest.raises(EnvironmentProtocolError, match="expected a 4-tuple"):
        env.step(0)


def test_long_results_are_cut_in_messages() -> None:
    env = adapt(Scripted(0, ("x" * 10_000, 0.0)))
    env.reset()
    with pytest.raises(EnvironmentProtocolError) as info:
        env.step(0)
    assert len(str(info.value)) < 800 and "..." in str(info.value)


@pytest.mark.parametrize(
    ("api", "reset_result", "fragment"),
    [
        ("auto", None, "returned NoneType None"),
        ("gymnasium", 5, "expected a 2-tuple (obs, info)"),
        ("gymnasium", (5, [1]), "expected a 2-tuple (obs, info)"),
        ("dm_env", 5, "dm_env-style time step"),
        ("dm_env", TimeStep(2, 0.0, 0.0, 5), "step_type is FIRST"),
    ],
)
def test_malformed_reset_results(api: str, reset_result: Any, fragment: str) -> None:
    env = adapt(Scripted(reset_result, None), api=api)
    with pytest.raises(EnvironmentProtocolError) as info:
        env.reset()
    assert fragment in str(info.value) and "Scripted.reset()" in str(info.value)


@pytest.mark.parametrize(
    ("step_result", "fragment"),
    [
        (TimeStep(StepType.LAST, 1.0, None, 0), "discount=NoneType None"),
        (TimeStep(StepType.LAST, 1.0, -1.0, 0), "expected a number >= 0"),
        (TimeStep(StepType.MID, None, 1.0, 0), "reward that is not a real number"),
        (TimeStep(7, 0.0, 1.0, 0), "step_type=7"),
        (TimeStep("mid", 0.0, 1.0, 0), "step_type is str 'mid'"),
    ],
)
def test_malformed_dm_env_steps(step_result: Any, fragment: str) -> None:
    env = adapt(Scripted(TimeStep(StepType.FIRST, None, None, 0), step_result))
    env.reset()
    with pytest.raises(EnvironmentProtocolError) as info:
        env.step(0)
    assert fragment in str(info.value)


def test_forced_api_rejects_other_flavours() -> None:
    env = adapt(GridSim(), api="legacy")
    env.reset()
    with pytest.raises(EnvironmentProtocolError, match="4-tuple"):
        env.step("right")
    env = adapt(LegacyWalk(), api="dm_env")
    with pytest.raises(EnvironmentProtocolError, match="dm_env"):
        env.reset()


def test_docstring_examples_run() -> None:
    import doctest

    import tdkit.envs.adapters as module

    assert doctest.testmod(module, optionflags=doctest.ELLIPSIS).failed == 0


def test_the_adapter_never_replaces_its_own_step_method():
    """The flavour's step function is an attribute; ``step`` stays the class method."""
    import gymnasium as gym

    from tdkit.envs.adapters import EnvAdapter

    env = EnvAdapter(gym.make("FrozenLake-v1"))
    env.reset(seed=0)
    env.step(0)
    assert "step" not in vars(env)
    assert type(env).step is EnvAdapter.step

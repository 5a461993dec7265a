"""The compiled path of :func:`tdkit.batch.train_batch` (numba; imported only when used).

One kernel, :func:`_run_chunk`, runs a block of steps for every learner.
Its bootstrap values, random choices and successor sampling are the
functions of :mod:`tdkit.learners._targets` and :mod:`tdkit.envs._successors`
compiled as they are (:func:`_compile`), so the math is not written a second
time here; it consumes the same pre-drawn uniform numbers as the numpy path
(:func:`tdkit.batch._setup.uniform_blocks`), so both paths give the same
result for the same seed.

Under ``NUMBA_DISABLE_JIT=1`` the kernel runs as plain Python (slowly), which
is how the test suite measures its coverage.
"""

from __future__ import annotations

import hashlib
import types
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numba
import numpy as np

from ... import _greedy
from ...envs import _successors
from ...learners import _targets
from ._result import BatchResult, batch_result
from ._setup import LEARNERS, Setup, schedule_values, step_size_kind, uniform_blocks

__all__ = ["run_compiled"]

_CACHE = True
"""Keep compiled code in numba's on-disk cache (``__pycache__``).

numba keys a cached function by its own source file and bytecode only. The
kernel inlines the functions of ``_targets.py`` (with the tie rule it takes
from ``_greedy.py``) and ``_successors.py``, so it is built in a closure over
:data:`_STAMP`, a hash of those sources: numba puts closure contents into the
cache key, so editing them compiles afresh.
"""

_STAMP = int(hashlib.sha256(b"".join(
    Path(m.__file__).read_bytes()  # type: ignore[arg-type]
    for m in (_greedy, _targets, _successors)
)).hexdigest()[:15], 16)


def _compile(module: types.ModuleType, names: tuple[str, ...]) -> dict[str, Callable[..., Any]]:
    """``numba.njit`` of the functions ``names`` of ``module``, calling each other compiled.

    Each function is copied with a namespace in which its siblings are the
    compiled versions (numba resolves global names when it compiles), so the
    module itself stays free of numba.
    """
    namespace = dict(vars(module))
    compiled: dict[str, Callable[..., Any]] = {}
    for name in names:
        f = getattr(module, name)
        copy = types.FunctionType(f.__code__, namespace, f.__name__, f.__defaults__,
                                  f.__closure__)
        compiled[name] = namespace[name] = numba.njit(cache=_CACHE, inline="always")(copy)
    return compiled


_T = _compile(_targets, (
    "greedy_max", "greedy_index", "uniform_index", "epsilon_greedy_index", "softmax_index",
    "expected_epsilon_greedy", "expected_softmax", "double_coin", "double_value",
    "sampled_value",
))
_S = _compile(_successors, ("sample_slot",))
greedy_max = _T["greedy_max"]
epsilon_greedy_index = _T["epsilon_greedy_index"]
softmax_index = _T["softmax_index"]
expected_epsilon_greedy = _T["expected_epsilon_greedy"]
expected_softmax = _T["expected_softmax"]
double_coin = _T["double_coin"]
double_value = _T["double_value"]
sampled_value = _T["sampled_value"]
sample_slot = _S["sample_slot"]

_Q_LEARNING, _SARSA, _EXPECTED_SARSA, _DOUBLE_Q = range(4)
_CONSTANT, _BY_STEP, _VISIT_COUNT = range(3)


def _make_kernel(stamp: int) -> Callable[..., int]:
    """The kernel, compiled in a closure over ``stamp`` (see :data:`_CACHE`)."""

    def _run_chunk(
        code, softmax, alpha_kind, alpha_constant, power, gamma, max_steps,
        q, behaviour, visits, total_visits,
        cumulative, next_states, rewards, terminal, start_cumulative, masked, allowed, n_allowed,
        u, parameter, alphas,
        state, action, fresh, ret, length,
        end_ids, end_returns, end_lengths, status,
    ):
        """Advance every learner by ``u.shape[1]`` steps; return the number of ended episodes.

        ``status[0]`` is set to the index of a learner whose values became NaN
        (its greedy choice is undefined); the chunk then stops.
        """
        if stamp < 0:  # never: references the stamp so that it enters the cache key
            return -1
        n = u.shape[1]
        n_learners = state.shape[0]
        n_actions = q.shape[3]
        every = allowed[0, :n_actions]  # without masks: every action, one row kept hot
        n_ended = 0
        for k in range(n_learners):
            s = state[k]
            a = action[k]
            is_fresh = fresh[k]
            total = ret[k]
            steps_taken = length[k]
            for i in range(n):
                # -- act
                if code != _SARSA or is_fresh:
                    here = allowed[s, :n_allowed[s]] if masked else every
                    if softmax:
                        a = softmax_index(behaviour[k, s], here, parameter[i], u[k, i, 2])
                    else:
                        a = epsilon_greedy_index(behaviour[k, s], here, parameter[i], u[k, i, 2])
                    if a < 0:
                        status[0] = k
                        return n_ended
                # -- environment
                o = s * n_actions + a
                j = sample_slot(cumulative[o], u[k, i, 0])
                s2 = next_states[o, j]
                r = rewards[o, j]
                terminated = terminal[s2]
                steps_taken += 1
                total += r
                ended = terminated or (max_steps > 0 and steps_taken >= max_steps)
                # -- bootstrap value
                table = 0
                boot = 0.0
                a2 = -1
                allowed2 = allowed[s2, :n_allowed[s2]] if masked else every
                if code == _DOUBLE_Q:
                    table, u_tie = double_coin(u[k, i, 3])
                    if not terminated:
                        boot = double_value(q[table, k, s2], q[1 - table, k, s2], allowed2,
                                            u_tie)
                elif code == _SARSA:
                    if softmax:
                        a2 = softmax_index(q[0, k, s2], allowed2, parameter[i + 1], u[k, i, 3])
                    else:
                        a2 = epsilon_greedy_index(q[0, k, s2], allowed2, parameter[i + 1],
                                                  u[k, i, 3])
                    if a2 < 0:
                        status[0] = k
                        return n_ended
                    boot = sampled_value(q[0, k, s2], a2)
                elif not terminated:
                    if code == _EXPECTED_SARSA:
                        if softmax:
                            boot = expected_softmax(q[0, k, s2], allowed2, parameter[i + 1])
                        else:
                            boot = expected_epsilon_greedy(q[0, k, s2], allowed2, parameter[i + 1])
                    else:
                        boot = greedy_max(q[0, k, s2], allowed2)
                target = r if terminated else r + gamma * boot
                # -- update
                count = visits[table, k, s, a] + 1
                visits[table, k, s, a] = count
                if alpha_kind == _CONSTANT:
                    alpha = alpha_constant
                elif alpha_kind == _BY_STEP:
                    alpha = alphas[i]
                else:
                    alpha = 1.0 if count <= 1 else float(count) ** -power
                old = q[table, k, s, a]
                q[table, k, s, a] = old + alpha * (target - old)
                if code == _DOUBLE_Q:
                    behaviour[k, s, a] = q[0, k, s, a] + q[1, k, s, a]
                    total_visits[k, s, a] += 1
                # -- episode bookkeeping
                if code == _SARSA:
                    a = a2
                    is_fresh = ended
                if ended:
                    end_ids[n_ended] = k
                    end_returns[n_ended] = total
                    end_lengths[n_ended] = steps_taken
                    n_ended += 1
                    total = 0.0
                    steps_taken = 0
                    s2 = sample_slot(start_cumulative, u[k, i, 1])
                s = s2
            state[k] = s
            action[k] = a
            fresh[k] = is_fresh
            ret[k] = total
            length[k] = steps_taken
        return n_ended

    return numba.njit(cache=_CACHE)(_run_chunk)


_run_chunk = _make_kernel(_STAMP)


def run_compiled(
    setup: Setup, q: np.ndarray, rng: np.random.Generator, steps: int
) -> BatchResult:
    """The compiled counterpart of :func:`tdkit.batch._numpy.run_numpy` (same arguments)."""
    learner = setup.learner
    n_tables, K, S, A = q.shape
    q = np.ascontiguousarray(q)
    visits = np.zeros((n_tables, K, S, A), dtype=np.int64)
    double = learner == "double_q"
    behaviour = q[0] + q[1] if double else q[0]
    total_visits = np.zeros((K, S, A), dtype=np.int64) if double else visits[0]
    model = setup.model
    # Fresh writable C-order copies: numba compiles one kernel per array type, and
    # read-only or broadcast inputs would each cost a compilation of their own.
    cumulative = np.array(model.cumulative.reshape(S * A, -1), dtype=np.float64, order="C")
    next_states = np.array(model.next_states.reshape(S * A, -1), dtype=np.int64, order="C")
    rewards = np.array(model.rewards.reshape(S * A, -1), dtype=np.float64, order="C")
    terminal = np.array(model.terminal, dtype=np.bool_, order="C")
    start_cumulative = np.array(model.start_cumulative, dtype=np.float64, order="C")
    allowed = np.array(setup.allowed, dtype=np.int64, order="C")
    n_allowed = np.array(setup.n_allowed, dtype=np.int64, order="C")
    kind = step_size_kind(setup.step_size)
    alpha_kind = {"constant": _CONSTANT, "by_step": _BY_STEP, "visit_count": _VISIT_COUNT}[kind]
    alpha_constant = float(setup.step_size.constant) if kind == "constant" else 0.0
    power = float(setup.step_size.power) if kind == "visit_count" else 0.0
    max_steps = setup.max_episode_steps or 0
    code = LEARNERS.index(learner)

    start_u = rng.random(K)
    state = np.array([_successors.sample_slot(start_cumulative, x) for x in start_u],
                     dtype=np.int64)
    action = np.zeros(K, dtype=np.int64)
    fresh = np.ones(K, dtype=np.bool_)
    ret = np.zeros(K)
    length = np.zeros(K, dtype=np.int64)
    status = np.full(1, -1, dtype=np.int64)
    ids: list[np.ndarray] = []
    returns: list[np.ndarray] = []
    lengths: list[np.ndarray] = []
    no_alphas = np.zeros(0)
    for t0, block in uniform_blocks(rng, steps, learner, K):
        n = block.shape[1]
        parameter = schedule_values(setup.parameter, t0, n + 1)
        alphas = schedule_values(setup.step_size, t0 + 1, n) if kind == "by_step" else no_alphas
        end_ids = np.empty(n * K, dtype=np.int64)
        end_returns = np.empty(n * K)
        end_lengths = np.empty(n * K, dtype=np.int64)
        n_ended = _run_chunk(
            code, setup.softmax, alpha_kind, alpha_constant, power, setup.gamma, max_steps,
            q, behaviour, visits, total_visits,
            cumulative, next_states, rewards, terminal, start_cumulative, setup.mask is not None,
            allowed, n_allowed, block, parameter, alphas,
            state, action, fresh, ret, length,
            end_ids, end_returns, end_lengths, status,
        )
        if status[0] >= 0:
            bad = int(status[0])
            raise FloatingPointError(
                f"greedy choice is undefined for learner {bad}: its action values contain "
                "NaN. Check rewards and step sizes for overflow."
            )
        if n_ended:
            ids.append(end_ids[:n_ended].copy())
            returns.append(end_returns[:n_ended].copy())
            lengths.append(end_lengths[:n_ended].copy())
    return batch_result(learner, q, total_visits, (ids, returns, lengths), steps, "compiled")

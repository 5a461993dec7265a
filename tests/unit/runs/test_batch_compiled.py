"""The compiled path of tdkit.batch.train_batch against the numpy path and the scalar learners.

1. Same draws, same run: both paths consume the same pre-drawn uniform numbers
   (tdkit.runs.batch._setup.uniform_blocks), so for every learner, exploration
   rule, step-size kind, with and without masks and time limits, the compiled
   tables, visit counts, returns and lengths equal the numpy ones bit for bit.
2. With the randomness removed (deterministic model, ε = 0, distinct starting
   values) and action masks on, the compiled learners equal the scalar
   learners trained by tdkit.train on the model's env with
   ``info["action_mask"]``.
3. Statistics of the compiled choices: tie fairness under masks, soft-max
   frequencies (Pearson chi-square, level 1e-3 each).
4. The kernel's code runs uncompiled under ``NUMBA_DISABLE_JIT=1`` (a
   subprocess) and gives the same results, so coverage tools see it.

The kernel is compiled once per test session (about 5-15 s of CPU; later
sessions load it from numba's cache).
"""

from __future__ import annotations

import math
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import gymnasium as gym
import numpy as np
import pytest
from scipy import stats

import tdkit
from tdkit import FiniteMDP, InvalidParameterError
from tdkit.batch import LEARNERS, train_batch
from tdkit.envs.problems import garnet
from tdkit.exploration import Softmax
from tdkit.schedules import Linear, Schedule, VisitCount

pytest.importorskip("numba")

SRC = next(p for p in Path(__file__).resolve().parents if (p / "pyproject.toml").exists()) / "src"


def stochastic_model() -> FiniteMDP:
    """A Garnet (Archibald, McKinnon & Thomas 1995) with two terminal states, per-outcome
    rewards and a start distribution over the others: terminations, truncations and
    restarts all happen within a few hundred steps."""
    g = garnet(12, 4, 3, gamma=0.9, seed=5)
    nxt, probs, _ = g.successors
    rewards = np.random.default_rng(5).uniform(-1.0, 1.0, size=nxt.shape)
    terminal = np.zeros(12, dtype=bool)
    terminal[[3, 8]] = True
    initial = np.where(terminal, 0.0, 1.0)
    return FiniteMDP.from_successors(nxt, probs, rewards, gamma=0.9, terminal=terminal,
                                     initial=initial / initial.sum())


def random_masks(mdp: FiniteMDP, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    masks = rng.random((mdp.n_states, mdp.n_actions)) < 0.6
    masks[np.arange(mdp.n_states), rng.integers(0, mdp.n_actions, mdp.n_states)] = True
    return masks


def assert_same_run(a, b) -> None:
    np.testing.assert_array_equal(a.tables, b.tables)
    np.testing.assert_array_equal(a.visits, b.visits)
    if a.double_tables is not None:
        np.testing.assert_array_equal(a.double_tables, b.double_tables)
    assert len(a.episode_returns) == len(b.episode_returns)
    for x, y in zip(a.episode_returns, b.episode_returns, strict=True):
        np.testing.assert_array_equal(x, y)
    for x, y in zip(a.episode_lengths, b.episode_lengths, strict=True):
        np.testing.assert_array_equal(x, y)


def exp_is_libm_exp() -> bool:
    """Soft-max weights use exp: numpy's vectorised exp and the scalar exp the kernel calls
    agree on this machine (checked on 10^5 values in the range the weights use)?"""
    x = np.random.default_rng(0).uniform(-60.0, 0.0, 100_000)
    return bool((np.exp(x) == np.array([math.exp(v) for v in x])).all())


EXPLORATION = {
    "epsilon": 0.3,
    "epsilon_linear": Linear(1.0, 0.05, duration=150),
    "softmax": Softmax(0.5),
    "softmax_linear": Softmax(Linear(2.0, 0.2, duration=150)),
}
STEP_SIZES = {
    "constant": 0.3,
    "visit_count": VisitCount(power=0.7),
    "linear": Linear(1.0, 0.05, duration=200),
}


# --------------------------------------------------------------------------- 1. same draws
@pytest.mark.parametrize("masked", [False, True], ids=["all_actions", "masked"])
@pytest.mark.parametrize("step_size", STEP_SIZES)
@pytest.mark.parametrize("exploration", EXPLORATION)
@pytest.mark.parametrize("learner", LEARNERS)
def test_compiled_equals_numpy_for_the_same_draws(learner, exploration, step_size, masked):
    if exploration.startswith("softmax") and not exp_is_libm_exp():
        pytest.skip("numpy's exp differs from the C library's exp on this machine")
    mdp = stochastic_model()
    kwargs = {
        "n_learners": 3, "steps": 400, "step_size": STEP_SIZES[step_size],
        "exploration": EXPLORATION[exploration], "max_episode_steps": 15, "seed": 7,
        "initial_value": (-0.5, 0.5), "masks": random_masks(mdp) if masked else None,
    }
    numpy_run = train_batch(mdp, learner, backend="numpy", **kwargs)
    compiled = train_batch(mdp, learner, backend="compiled", **kwargs)
    assert (numpy_run.backend, compiled.backend) == ("numpy", "compiled")
    assert_same_run(numpy_run, compiled)
    # The run went through terminations and truncations.
    lengths = np.concatenate(compiled.episode_lengths)
    assert (lengths < 15).any() and (lengths == 15).any()


def test_compiled_equals_numpy_across_chunks_of_draws(monkeypatch):
    # Small blocks of uniforms (997 numbers: 6 steps of 40 SARSA learners, and a last
    # partial block), so state, action, episode records and the step count of the
    # schedules carry over between many kernel calls.
    from tdkit.runs.batch import _setup

    monkeypatch.setattr(_setup, "_CHUNK_NUMBERS", 997)
    mdp = stochastic_model()
    kwargs = {"n_learners": 40, "steps": 1003, "exploration": Linear(0.5, 0.05, 500),
              "step_size": Linear(1.0, 0.1, 700), "max_episode_steps": 30, "seed": 3}
    assert_same_run(train_batch(mdp, "sarsa", backend="numpy", **kwargs),
                    train_batch(mdp, "sarsa", backend="compiled", **kwargs))


def test_auto_picks_compiled_and_falls_back_for_user_schedules():
    class PerVisit(Schedule):  # a user-defined per-pair schedule: numpy only
        per_visit = True

        def value(self, step: int, visits: int = 1) -> float:
            return 0.1 + 0.4 / max(visits, 1)

        def bounds(self) -> tuple[float, float]:
            return (0.1, 0.5)

        def describe(self) -> dict:
            return {"kind": "per_visit"}

    mdp = garnet(5, 2, 2, seed=0)
    assert train_batch(mdp, "q_learning", n_learners=2, steps=5).backend == "compiled"
    res = train_batch(mdp, "q_learning", n_learners=2, steps=5, step_size=PerVisit())
    assert res.backend == "numpy"
    with pytest.raises(InvalidParameterError, match=r"backend='compiled'.*PerVisit"):
        train_batch(mdp, "q_learning", n_learners=2, steps=5, step_size=PerVisit(),
                    backend="compiled")
    with pytest.raises(InvalidParameterError, match=r"backend must be one of.*'gpu'"):
        train_batch(mdp, "q_learning", n_learners=2, steps=5, backend="gpu")


# --------------------------------------------------------------------------- 2. scalar learners
class _MaskInfo(gym.Wrapper):
    """Adds ``info["action_mask"]`` of the current state, as masked gymnasium envs do."""

    def __init__(self, env: gym.Env, masks: np.ndarray) -> None:
        super().__init__(env)
        self.masks = masks

    def reset(self, **kwargs):
        obs, info = self.env.reset(**kwargs)
        return obs, {**info, "action_mask": self.masks[obs].copy()}

    def step(self, action):
        obs, reward, terminated, truncated, info = self.env.step(action)
        return obs, reward, terminated, truncated, {**info, "action_mask": self.masks[obs].copy()}


def masked_chain(n: int = 7) -> tuple[FiniteMDP, np.ndarray]:
    """Deterministic chain 0 .. n-1, terminal n; actions: back, forward, stay, jump two.
    Distinct rewards from U(-1.5, -0.5); 'jump' is allowed only in even states and
    'back' is masked in state 1, so the masks change the greedy choices and targets."""
    rng = np.random.default_rng(0)
    nxt = np.zeros((n + 1, 4, 1), dtype=np.intp)
    for s in range(n):
        nxt[s, :, 0] = (max(s - 1, 0), s + 1, s, min(s + 2, n))
    nxt[n] = n
    rewards = rng.uniform(-1.5, -0.5, size=(n + 1, 4))
    terminal = np.zeros(n + 1, dtype=bool)
    terminal[n] = True
    initial = np.zeros(n + 1)
    initial[0] = 1.0
    masks = np.ones((n + 1, 4), dtype=bool)
    masks[1::2, 3] = False
    masks[1, 0] = False
    mdp = FiniteMDP.from_successors(nxt, np.ones((n + 1, 4, 1)), rewards, gamma=0.9,
                                    terminal=terminal, initial=initial)
    return mdp, masks


SCALAR = {
    "q_learning": tdkit.QLearning,
    "sarsa": tdkit.Sarsa,
    "expected_sarsa": tdkit.ExpectedSarsa,
}


@pytest.mark.parametrize("step_size", ["constant", "visit_count", "linear"])
@pytest.mark.parametrize("learner", SCALAR)
def test_compiled_with_masks_equals_the_scalar_learners(learner, step_size):
    # Exploration 0 and distinct starting values: no random choice is left, so the
    # compiled learner must make exactly the scalar learner's updates, including the
    # masked maxima / expectations of the targets (Sutton & Barto 2018, Eqs. 6.7-6.9
    # over the allowed actions).
    mdp, masks = masked_chain()
    start = np.random.default_rng(1).uniform(-0.1, 0.1, size=(3, mdp.n_states, mdp.n_actions))
    steps, horizon = 500, 10
    res = train_batch(mdp, learner, n_learners=3, steps=steps, step_size=STEP_SIZES[step_size],
                      exploration=0.0, initial_value=start, max_episode_steps=horizon,
                      masks=masks, backend="compiled")
    ends = 0
    for i in range(3):
        agent = SCALAR[learner](mdp.n_states, mdp.n_actions, gamma=mdp.gamma,
                                step_size=STEP_SIZES[step_size], exploration=0.0, seed=0)
        agent._q[:] = start[i]  # test-only access: the batch learner's starting table
        history = tdkit.train(agent, _MaskInfo(mdp.to_env(), masks), steps=steps,
                              max_episode_steps=horizon, seed=0)
        finished = history.ends != 2  # History codes: 0 terminated, 1 truncated, 2 unfinished
        np.testing.assert_array_equal(res.tables[i], agent.table)
        np.testing.assert_array_equal(res.visits[i], agent.visits)
        np.testing.assert_array_equal(res.episode_returns[i], history.returns[finished])
        ends += int((history.ends == 0).sum())
        # No masked action was ever taken or updated.
        assert not agent.visits[~masks].any()
    assert ends >= 3


# --------------------------------------------------------------------------- 3. statistics
def chi_square_p(counts, probabilities) -> float:
    counts = np.asarray(counts, dtype=float)
    probabilities = np.asarray(probabilities, dtype=float)
    support = probabilities > 0
    assert counts[~support].sum() == 0, "an outcome of probability 0 was drawn"
    expected = counts.sum() * probabilities[support]
    statistic = float(((counts[support] - expected) ** 2 / expected).sum())
    return float(stats.chi2.sf(statistic, int(support.sum()) - 1))


def one_step_model(n_actions: int = 4) -> FiniteMDP:
    """State 0 (start): every action ends the episode in terminal state 1."""
    nxt = np.ones((2, n_actions, 1), dtype=np.intp)
    return FiniteMDP.from_successors(nxt, np.ones((2, n_actions, 1)), np.zeros((2, n_actions)),
                                     gamma=0.9, terminal=[False, True], initial=[1.0, 0.0])


@pytest.mark.parametrize("learner", LEARNERS)
def test_compiled_ties_are_shared_uniformly_among_allowed_actions(learner):
    # Row (1, 0, 1, 1) with action 3 masked: ties {0, 2}, each with probability 1/2.
    # 6000 one-step learners; Pearson chi-square at level 1e-3 (1 degree of freedom;
    # "first tie wins" gives a statistic of 6000, p ~ 0). Checked over seeds 0..199:
    # 0 of 200 runs fell below 1e-3 (expected 0.2 at this level).
    mdp = one_step_model()
    q0 = np.zeros((2, 4))
    q0[0] = [1.0, 0.0, 1.0, 1.0]
    masks = np.array([[True, True, True, False], [True, True, True, True]])
    res = train_batch(mdp, learner, n_learners=6000, steps=1, exploration=0.0,
                      initial_value=q0, masks=masks, seed=31, backend="compiled")
    actions = res.visits[:, 0, :].argmax(axis=1)
    assert (res.visits[:, 0, :].sum(axis=1) == 1).all()
    assert chi_square_p(np.bincount(actions, minlength=4), [0.5, 0.0, 0.5, 0.0]) > 1e-3


def test_compiled_softmax_frequencies_follow_the_boltzmann_probabilities():
    # pi(a) proportional to exp(Q(a) / tau) (Sutton & Barto 2018, Eq. 13.2), from the
    # scalar Softmax.probabilities; 8000 one-step learners, chi-square at level 1e-3.
    # Checked over seeds 0..199: 0 of 200 runs fell below 1e-3 (expected 0.2).
    mdp = one_step_model()
    q0 = np.zeros((2, 4))
    q0[0] = [0.2, 0.9, -0.4, 0.1]
    rule = Softmax(0.5)
    res = train_batch(mdp, "q_learning", n_learners=8000, steps=1, exploration=rule,
                      initial_value=q0, seed=32, backend="compiled")
    counts = res.visits[:, 0, :].sum(axis=0)
    assert chi_square_p(counts, rule.probabilities(q0[0], None)) > 1e-3


# --------------------------------------------------------------------------- 4. uncompiled
_UNCOMPILED = textwrap.dedent("""
    import numpy as np
    import numba
    from numba.core import config
    assert config.DISABLE_JIT
    from tdkit.batch import LEARNERS, train_batch
    from tdkit.runs.batch import _kernels
    from tdkit.envs.problems import garnet
    from tdkit.exploration import Softmax
    from tdkit.schedules import Linear, VisitCount
    assert not hasattr(_kernels._run_chunk, "signatures")  # plain Python under the flag
    mdp = garnet(6, 3, 2, gamma=0.9, seed=1)
    masks = np.ones((6, 3), dtype=bool); masks[::2, 1] = False
    for learner in LEARNERS:
        for exploration, step_size, m in ((0.3, VisitCount(0.8), masks),
                                          (Softmax(0.7), Linear(1.0, 0.1, 40), None)):
            kw = dict(n_learners=2, steps=60, exploration=exploration, step_size=step_size,
                      max_episode_steps=9, masks=m, seed=2, initial_value=(0.0, 1.0))
            a = train_batch(mdp, learner, backend="numpy", **kw)
            b = train_batch(mdp, learner, backend="compiled", **kw)
            assert np.array_equal(a.tables, b.tables), learner
            assert np.array_equal(a.visits, b.visits), learner
            assert all(np.array_equal(x, y) for x, y in zip(a.episode_returns, b.episode_returns))
    print("uncompiled kernel ok")
""")


def test_kernel_runs_uncompiled_and_agrees():
    path = os.pathsep.join(p for p in (str(SRC), os.environ.get("PYTHONPATH", "")) if p)
    env = {**os.environ, "NUMBA_DISABLE_JIT": "1", "PYTHONPATH": path}
    done = subprocess.run([sys.executable, "-c", _UNCOMPILED], env=env, capture_output=True,
                          text=True, check=False)
    assert done.returncode == 0, done.stderr[-3000:]
    assert "uncompiled kernel ok" in done.stdout


def test_import_tdkit_does_not_import_numba():
    # numba is an optional extra, imported when the compiled path first runs.
    code = "import sys, tdkit, tdkit.batch; print('numba' in sys.modules)"
    path = os.pathsep.join(p for p in (str(SRC), os.environ.get("PYTHONPATH", "")) if p)
    done = subprocess.run([sys.executable, "-c", code], env={**os.environ, "PYTHONPATH": path},
                          capture_output=True, text=True, check=True)
    assert done.stdout.strip() == "False"

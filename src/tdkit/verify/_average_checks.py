r"""The verifier's check for average-reward agents: the learned gain on a probe.

An average-reward agent (one with an ``average_reward`` attribute, such as
:class:`tdkit.DifferentialQLearning`) is trained on a small continuing probe
whose optimal gain :math:`\rho^*` is known exactly
(:func:`tdkit.relative_value_iteration`), and its estimate :math:`\bar R` is
compared with it. Prediction agents (``values`` and no ``q_values``) get the
probe with one action, so whatever policy they follow, the gain they must
find is that of the probe's only policy.

The probe (:func:`average_probe`) runs in episodes cut by a time limit every
``PROBE_TIME_LIMIT`` steps, so an agent that treats the time limit as a
terminal state (and stops bootstrapping there) learns a different gain.
Its numbers are invented for the check; nothing is recalled from a source.

How the check decides
---------------------
After a burn-in of half the steps, :math:`\bar R` is read after every
update and the readings are grouped into ``N_BATCHES = 10`` batches of
consecutive steps (iterate averaging; Polyak, B. T. & Juditsky, A. B.
(1992), SIAM J. Control Optim. 30(4)). Each batch mean :math:`m_i` averages
500 steps, far longer than the memory :math:`1/(\eta\alpha)` of the
average's update for usual step sizes (100 steps at the defaults), so the
batch means are treated as independent draws around the agent's limit (the method of
batch means; Law, A. M. & Kelton, W. D. (2000), Simulation Modeling and
Analysis, 3rd ed., McGraw-Hill, Section 9.5.3). The agent passes when

.. math::
    |\bar m - \rho^*| \le t_{0.9995,\,9}\; \frac{s_m}{\sqrt{10}} + \text{floor},

with :math:`\bar m` and :math:`s_m` the mean and standard deviation of the
batch means and :math:`t_{0.9995, 9} = 4.781` the two-sided 1/1000 quantile
of Student's t with 9 degrees of freedom: for a correct agent whose batch
means are unbiased and normal, the false-alarm rate is exactly 1/1000. The
``floor`` (``FLOOR`` = 0.05, 2.5% of the optimal gain, common practice)
allows for the small bias a constant step size leaves. The
measured false-alarm rate over many seeds is printed by
``benchmarks/calibrate_average_check.py`` (see docs/average-reward.md).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from ..dp_average import relative_value_iteration
from ..envs.finite import FiniteMDP
from ._driver import AgentFault, Watcher, agent_kind, build_agent, run_episodes

__all__ = [
    "FLOOR",
    "N_BATCHES",
    "PROBE_EPISODES",
    "PROBE_TIME_LIMIT",
    "START_REWARD",
    "T_QUANTILE",
    "average_probe",
    "check_average_reward",
]

PROBE_TIME_LIMIT = 25
"""Steps per probe episode (then ``truncated``)."""

PROBE_EPISODES = 400
"""Training episodes (10,000 steps); readings come from the second half."""

N_BATCHES = 10
"""Batches of consecutive readings in the decision (500 steps each)."""

T_QUANTILE = 4.781
"""Student's t quantile at 1 - 1/2000 with 9 degrees of freedom (two-sided 1/1000)."""

FLOOR = 0.05
"""Allowance for constant-step-size bias: 2.5% of the probe's optimal gain 2."""

START_REWARD = -10.0
"""Reward of the probe's transient start state (see :func:`average_probe`)."""

_START = np.array([0.0, 0.0, 0.0, 1.0])


def average_probe(*, prediction: bool = False) -> FiniteMDP:
    r"""The continuing probe: a choice in state 0, noisy rewards, a costly start.

    * State 0, action 0: reward 1, then state 0 or state 1 with probability
      1/2 each. Action 1: reward 0, then state 2.
    * State 1 (both actions): reward 0, then state 0.
    * State 2 (both actions): reward 0 or 6 with probability 1/2 each (mean
      3), then state 0 or state 2 with probability 1/2 each.

    * State 3 (both actions), the start state of every episode: reward
      ``START_REWARD`` = -10, then state 0. It is transient, so it does not
      change any gain of the continuing task; but an agent that reads the
      time limit as the end of the task (bootstrapping from the next start, or
      not at all) pays it every ``PROBE_TIME_LIMIT`` steps, which moves its
      gain by about -10/25 = -0.4.

    Always taking action 0 earns :math:`\rho = 2/3`; always taking action 1
    earns :math:`\rho^* = 2` (stationary distribution 1/3, 0, 2/3, 0). With
    ``prediction=True`` the model has one action, the 50/50 mixture of the
    two, whose gain is 14/9 (stationary distribution 4/9, 1/9, 4/9, 0).
    No terminal state; ``gamma`` is irrelevant (0.9).

    Examples
    --------
    >>> from tdkit import relative_value_iteration
    >>> round(relative_value_iteration(average_probe()).gain, 9)
    2.0
    """
    full = FiniteMDP.from_successors(*_noisy_slots(*_probe_arrays()), gamma=0.9,
                                     initial=_START)
    if not prediction:
        return full
    nxt, probs, rewards = full.successors
    return FiniteMDP.from_successors(
        np.concatenate([nxt[:, 0], nxt[:, 1]], axis=1)[:, None],
        np.concatenate([probs[:, 0], probs[:, 1]], axis=1)[:, None] / 2,
        np.concatenate([rewards[:, 0], rewards[:, 1]], axis=1)[:, None],
        gamma=0.9,
        initial=_START,
    )


def _noisy_slots(P: np.ndarray, R: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Successor slots in which state 2's reward is 0 or 6 (mean 3) with equal chance."""
    n, m, _ = P.shape
    width = 2 * n
    nxt = np.zeros((n, m, width), dtype=np.intp)
    probs = np.zeros((n, m, width))
    rewards = np.zeros((n, m, width))
    for s in range(n):
        for a in range(m):
            k = 0
            for s2 in np.flatnonzero(P[s, a] > 0):
                spread = (0.0, 6.0) if R[s, a, s2] == 3.0 else (R[s, a, s2], R[s, a, s2])
                for r in spread:
                    nxt[s, a, k], probs[s, a, k], rewards[s, a, k] = s2, P[s, a, s2] / 2, r
                    k += 1
    return nxt, probs, rewards


def _probe_arrays() -> tuple[np.ndarray, np.ndarray]:
    """Dense ``P`` and per-transition mean rewards ``R`` of the probe."""
    P = np.zeros((4, 2, 4))
    R = np.zeros((4, 2, 4))
    P[0, 0, 0] = P[0, 0, 1] = 0.5
    R[0, 0, :] = 1.0
    P[0, 1, 2] = 1.0
    P[1, :, 0] = 1.0
    P[2, :, 0] = P[2, :, 2] = 0.5
    R[2, :, :] = 3.0
    P[3, :, 0] = 1.0
    R[3, :, :] = START_REWARD
    return P, R


class _Readings(Watcher):
    """Reads the agent's ``average_reward`` after every update."""

    def __init__(self, agent: Any) -> None:
        self.agent = agent
        self.values: list[float] = []

    def after_update(
        self, episode: int, step: int, transition: tuple, errors: tuple[float, ...]
    ) -> None:
        value = getattr(self.agent, "average_reward", None)
        try:
            self.values.append(float(value))  # type: ignore[arg-type]
        except (TypeError, ValueError):
            raise AgentFault(
                f"average_reward is {value!r}; an average-reward agent keeps its gain estimate "
                "there as a number",
                f"episode {episode}, step {step}",
            ) from None


def check_average_reward(
    make_agent: Callable[[Any, int], Any], seed: int = 0
) -> tuple[bool, str]:
    r"""Train an average-reward agent on :func:`average_probe`; compare its gain with the exact one.

    Parameters
    ----------
    make_agent : callable
        ``make_agent(env, seed) -> agent``; the agent exposes
        ``average_reward`` (its estimate of the gain). On-policy agents
        converge to the gain of their exploring policy, so their factories
        should decay exploration (e.g. ``tdkit.schedules.Exponential(0.2,
        0.999, 0.01)``).
    seed : int, default 0
        Seeds the agent factory and the environment (episode seeds as in
        :func:`tdkit.train`).

    Returns
    -------
    (bool, str)
        Whether the agent passed, and a message with the numbers (or the
        fault) and how to reproduce it.

    Examples
    --------
    >>> import tdkit
    >>> def make(env, seed):
    ...     return tdkit.DifferentialQLearning.for_env(env, seed=seed)
    >>> passed, message = check_average_reward(make, seed=0)
    >>> passed
    True
    """
    env = average_probe().to_env(PROBE_TIME_LIMIT)

    def reproduce(prediction: bool) -> str:
        return (
            f"reproduce: env = tdkit.verify._average_checks.average_probe(prediction="
            f"{prediction}).to_env({PROBE_TIME_LIMIT}); agent = make_agent(env, {seed}); "
            f"tdkit.train(agent, env, episodes={PROBE_EPISODES}, seed={seed})"
        )

    prediction = False
    try:
        agent = build_agent(make_agent, env, seed)
        obs, _ = env.reset(seed=seed)
        prediction = agent_kind(agent, obs).prediction
        if prediction:
            env = average_probe(prediction=True).to_env(PROBE_TIME_LIMIT)
            agent = build_agent(make_agent, env, seed)
        if not hasattr(agent, "average_reward"):
            return False, (
                f"{type(agent).__name__} has no average_reward attribute: the average-reward "
                "check needs the agent's estimate of the gain there"
            )
        readings = _Readings(agent)
        run_episodes(agent, env, episodes=PROBE_EPISODES, seed=seed, watcher=readings)
    except AgentFault as fault:
        return False, f"{fault} (seed {seed}); {reproduce(prediction)}"
    exact = relative_value_iteration(env.unwrapped.mdp).gain
    values = readings.values
    tail = np.asarray(values[len(values) - len(values) // 2:])
    tail = tail[len(tail) % N_BATCHES:]
    if not np.isfinite(tail).all():
        return False, (
            f"average_reward became non-finite (seed {seed}); {reproduce(prediction)}"
        )
    batches = tail.reshape(N_BATCHES, -1).mean(axis=1)
    mean = float(batches.mean())
    spread = float(batches.std(ddof=1))
    floor = FLOOR
    margin = T_QUANTILE * spread / np.sqrt(N_BATCHES) + floor
    error = mean - exact
    text = (
        f"learned gain {mean:.4f} (mean of {N_BATCHES} batch means over the last "
        f"{tail.size} steps, spread {spread:.4f}) vs exact {exact:.4f}: error "
        f"{error:+.4f}, allowed {margin:.4f} (t-quantile for 1/1000 false alarms + floor "
        f"{floor:.3f})"
    )
    if abs(error) <= margin:
        return True, text
    return False, f"{text}; seed {seed}; {reproduce(prediction)}"

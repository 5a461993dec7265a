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
update and the readings are grouped into ``N_BATCHES = 20`` batches of
consecutive steps (iterate averaging; Polyak, B. T. & Juditsky, A. B.
(1992), SIAM J. Control Optim. 30(4)). Each batch mean :math:`m_i` averages
500 steps, far longer than the memory :math:`1/(\eta\alpha)` of the
average's update for usual step sizes (100 steps at the defaults), so the
batch means are treated as independent draws around the agent's limit (the method of
batch means; Law, A. M. & Kelton, W. D. (2000), Simulation Modeling and
Analysis, 3rd ed., McGraw-Hill, Section 9.5.3). The agent passes when
:math:`\bar m` lies within

.. math::
    t\; \frac{s_m}{\sqrt{20}} + \text{floor}

of the target, with :math:`\bar m` and :math:`s_m` the mean and standard
deviation of the batch means and :math:`t` = ``T_QUANTILE`` = 5.95 the
Student-t quantile (19 degrees of freedom) for a two-sided
``AVERAGE_FALSE_ALARM`` = 1e-5: for a correct agent whose batch means are
unbiased and normal the false-alarm rate is 1e-5 per run. 1e-5 rather than
the 1e-3 every check aims at, because a calibration runs this check on every
average-reward learner hundreds of times (about 1,200 runs), where a rate of
1e-3 would expect a false alarm. The ``floor`` (``FLOOR`` = 0.05, 2.5% of the
optimal gain, common practice) allows for the small bias a constant step size
leaves.

The target is the optimal gain :math:`\rho^*`; an agent with ``q_values``
whose one-step targets read as on-policy, or cannot be read (see
:class:`~tdkit.verify._behaviour.BehaviourReading`), may instead reach the
gain of the best epsilon-greedy policy for the exploration rate it was
measured to show (anywhere in its 99.9% interval;
:func:`best_epsilon_greedy_gain`): a correct differential SARSA with a
constant epsilon converges there, not to :math:`\rho^*` (on this probe 1.966
instead of 2 at epsilon = 0.1). Any gain between the two is accepted. An
agent whose targets bootstrap on the maximum is held to :math:`\rho^*`.

Measured: see docs/average-reward.md and the "Error rates" of docs/verify.md
(``benchmarks/calibrate_average_check.py`` and
``benchmarks/calibrate_verify.py``).
"""

from __future__ import annotations

import itertools
from collections.abc import Callable
from typing import Any

import numpy as np

from .._errors import InvalidParameterError
from ..dp_average import policy_gain, relative_value_iteration
from ..envs.finite import FiniteMDP
from ..stats import student_t_isf
from ._behaviour import BehaviourReading
from ._driver import AgentFault, Watcher, agent_kind, build_agent, run_episodes

__all__ = [
    "AVERAGE_FALSE_ALARM",
    "FLOOR",
    "N_BATCHES",
    "PROBE_EPISODES",
    "PROBE_TIME_LIMIT",
    "START_REWARD",
    "T_QUANTILE",
    "average_probe",
    "best_epsilon_greedy_gain",
    "check_average_reward",
]

PROBE_TIME_LIMIT = 25
"""Steps per probe episode (then ``truncated``)."""

PROBE_EPISODES = 800
"""Training episodes (20,000 steps); readings come from the second half."""

N_BATCHES = 20
"""Batches of consecutive readings in the decision (500 steps each)."""

AVERAGE_FALSE_ALARM = 1e-5
"""False-alarm rate the margin is built for, per run (see the module notes)."""

T_QUANTILE = student_t_isf(AVERAGE_FALSE_ALARM / 2, N_BATCHES - 1)
"""Student's t quantile for a two-sided ``AVERAGE_FALSE_ALARM``, 19 degrees of freedom (5.95)."""

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


def best_epsilon_greedy_gain(mdp: FiniteMDP, epsilon: float) -> float:
    r"""The largest gain of an epsilon-greedy policy on ``mdp``: the on-policy fixed point.

    An on-policy learner that keeps exploring with rate :math:`\varepsilon`
    (differential SARSA with a constant epsilon) improves its policy only
    within the epsilon-greedy policies, and ends at the best of them
    (epsilon-soft policy improvement; Sutton & Barto 2018, Section 5.4). Each
    candidate takes its greedy action with probability :math:`1 - \varepsilon
    + \varepsilon / A` and every other with :math:`\varepsilon / A`; its gain
    is exact (:func:`tdkit.policy_gain`). Every deterministic greedy choice is
    tried, so this suits the verifier's small probes only (at most 4,096
    candidates). Candidates without a single gain (multichain, possible only
    at epsilon = 0) are passed over.
    """
    n, m = mdp.n_states, mdp.n_actions
    if m ** n > 4096:
        raise InvalidParameterError(
            f"best_epsilon_greedy_gain: {m}^{n} candidate policies ({n} states, {m} actions) "
            "are too many to enumerate; use it on probes of at most 4,096 deterministic policies."
        )
    best = -np.inf
    rows = np.arange(n)
    for choice in itertools.product(range(m), repeat=n):
        probs = np.full((n, m), epsilon / m)
        probs[rows, list(choice)] += 1.0 - epsilon
        try:
            best = max(best, policy_gain(mdp, probs))
        except InvalidParameterError:  # multichain: no single gain to compare
            continue
    return float(best)


class _Readings(Watcher):
    """Reads the agent's ``average_reward`` after every update, and in the second half of
    training (agents with ``q_values``) the exploration it shows and the kind of its targets."""

    def __init__(self, agent: Any, q_values: bool) -> None:
        self.agent = agent
        self.values: list[float] = []
        self.reading = (
            BehaviourReading(agent, 1.0, baseline=lambda: agent.average_reward)
            if q_values else None
        )

    def after_act(self, episode: int, step: int, obs: Any, action: Any) -> None:
        if self.reading is not None and episode >= PROBE_EPISODES // 2:
            self.reading.after_act(obs, action)

    def before_observe(self, episode: int, step: int, transition: tuple) -> None:
        if self.reading is not None and episode >= PROBE_EPISODES // 2:
            self.reading.before_observe(transition)

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
        if self.reading is not None and episode >= PROBE_EPISODES // 2:
            self.reading.after_update(transition, errors)


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
        kind = agent_kind(agent, obs)
        prediction = kind.prediction
        if prediction:
            env = average_probe(prediction=True).to_env(PROBE_TIME_LIMIT)
            agent = build_agent(make_agent, env, seed)
        if not hasattr(agent, "average_reward"):
            return False, (
                f"{type(agent).__name__} has no average_reward attribute: the average-reward "
                "check needs the agent's estimate of the gain there"
            )
        readings = _Readings(agent, kind.q_values and not prediction)
        run_episodes(agent, env, episodes=PROBE_EPISODES, seed=seed, watcher=readings)
    except AgentFault as fault:
        return False, f"{fault} (seed {seed}); {reproduce(prediction)}"
    mdp = env.unwrapped.mdp
    exact = relative_value_iteration(mdp).gain
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
    low, target = exact, f"exact {exact:.4f}"
    reading = readings.reading
    measured = None if reading is None else reading.exploration()
    if measured is not None and reading.policy_kind != "off-policy":
        gains = [best_epsilon_greedy_gain(mdp, e) for e in (measured[0], measured[2])]
        low = min(exact, *gains)
        target = (
            f"exact {exact:.4f}, or for {reading.policy_kind} targets the epsilon-greedy gain "
            f"{min(gains):.4f}-{max(gains):.4f} of the measured exploration {measured[1]:.3g} "
            f"[{measured[0]:.3g}, {measured[2]:.3g}]"
        )
    error = mean - low if mean < low else (mean - exact if mean > exact else 0.0)
    text = (
        f"learned gain {mean:.4f} (mean of {N_BATCHES} batch means over the last "
        f"{tail.size} steps, spread {spread:.4f}) vs {target}: error "
        f"{error:+.4f}, allowed {margin:.4f} (t-quantile for {AVERAGE_FALSE_ALARM:g} false "
        f"alarms + floor {floor:.3f})"
    )
    if abs(error) <= margin:
        return True, text
    return False, f"{text}; seed {seed}; {reproduce(prediction)}"

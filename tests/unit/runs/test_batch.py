"""K learners in lockstep (tdkit.batch.train_batch) against the scalar learners and exact DP.

1. Exact equivalence: with the randomness removed (deterministic model,
   exploration 0, distinct random starting values so that greedy has no
   ties) every batch learner ends with the same table, visit counts, episode
   returns and lengths as the scalar learner trained by ``tdkit.train`` on
   ``mdp.to_env()``, bit for bit, through terminations, time-limit
   truncations and self-loops. Where exploration is on, single updates are
   checked exactly against the published update equations (Sutton & Barto
   2018, Eqs. 6.7 and 6.9; van Hasselt 2010).
2. Statistics: ties, ε-greedy, next states, per-outcome rewards and start
   states follow their distributions (Pearson chi-square / binomial bounds
   with thresholds from scipy.stats).
3. Published examples (Sutton & Barto 2018, Examples 6.6 and 6.7) and
   convergence to the exact solutions of dynamic programming on Garnets
   (Archibald, McKinnon & Thomas 1995) within derived bounds, for every
   learner of the batch.
4. Reproducibility and argument validation.
"""

from __future__ import annotations

import math

import gymnasium as gym
import numpy as np
import pytest
from scipy import stats

import tdkit
from tdkit import FiniteMDP, InvalidParameterError
from tdkit._greedy import greedy_action, greedy_rows
from tdkit.batch import LEARNERS, BatchResult, train_batch
from tdkit.dp import action_values, evaluate_policy, value_iteration
from tdkit.envs.problems import cliff_walking, garnet, maximization_bias
from tdkit.exploration import UCB, EpsilonGreedy
from tdkit.schedules import Exponential, Linear, Schedule, VisitCount

SCALAR = {
    "q_learning": tdkit.QLearning,
    "sarsa": tdkit.Sarsa,
    "expected_sarsa": tdkit.ExpectedSarsa,
    "double_q": tdkit.DoubleQLearning,
}


# --------------------------------------------------------------------------- helpers
def chain(n: int = 7, *, seed: int = 0, gamma: float = 0.9) -> FiniteMDP:
    """A deterministic chain 0 .. n-1 with terminal state n, start at 0.

    Action 0 steps back (state 0 stays), 1 steps forward, 2 stays (a
    self-loop). Rewards are distinct draws from U(-1.5, -0.5): with starting
    values near 0 the learners are optimistic, so greedy behaviour explores
    the chain, early episodes hit the time limit and later ones terminate.
    """
    rng = np.random.default_rng(seed)
    nxt = np.zeros((n + 1, 3, 1), dtype=np.intp)
    for s in range(n):
        nxt[s, :, 0] = (max(s - 1, 0), s + 1, s)
    nxt[n] = n
    rewards = rng.uniform(-1.5, -0.5, size=(n + 1, 3))
    terminal = np.zeros(n + 1, dtype=bool)
    terminal[n] = True
    initial = np.zeros(n + 1)
    initial[0] = 1.0
    return FiniteMDP.from_successors(
        nxt, np.ones((n + 1, 3, 1)), rewards, gamma=gamma, terminal=terminal, initial=initial
    )


class _Recorder(gym.Wrapper):
    """Logs (state, action, next_state, terminated) of every step."""

    def __init__(self, env: gym.Env) -> None:
        super().__init__(env)
        self.log: list[tuple[int, int, int, bool]] = []

    def reset(self, **kwargs):
        self._obs, info = self.env.reset(**kwargs)
        return self._obs, info

    def step(self, action):
        obs, reward, terminated, truncated, info = self.env.step(action)
        self.log.append((int(self._obs), int(action), int(obs), bool(terminated)))
        self._obs = obs
        return obs, reward, terminated, truncated, info


def scalar_run(learner, mdp, table, *, steps, max_episode_steps, step_size):
    """The scalar learner from ``table``, trained by tdkit.train on mdp.to_env()."""
    agent = SCALAR[learner](
        mdp.n_states, mdp.n_actions, gamma=mdp.gamma, step_size=step_size,
        exploration=0.0, seed=0,
    )
    agent._q[:] = table  # test-only access: start from the batch learner's table
    env = _Recorder(mdp.to_env())
    history = tdkit.train(agent, env, steps=steps, max_episode_steps=max_episode_steps, seed=0)
    finished = history.ends != 2  # History codes: 0 terminated, 1 truncated, 2 unfinished
    return agent, history, finished, env.log


def chi_square_p(counts, probabilities):
    """P-value of Pearson's chi-square test of ``counts`` against ``probabilities``."""
    counts = np.asarray(counts, dtype=float)
    probabilities = np.asarray(probabilities, dtype=float)
    support = probabilities > 0
    assert counts[~support].sum() == 0, "an outcome of probability 0 was drawn"
    expected = counts.sum() * probabilities[support]
    statistic = float(((counts[support] - expected) ** 2 / expected).sum())
    return stats.chi2.sf(statistic, int(support.sum()) - 1)


def first_actions(res: BatchResult, state: int) -> np.ndarray:
    """The action each learner took in ``state`` during a one-step run (from its visits)."""
    row = res.visits[:, state, :]
    assert (row.sum(axis=1) == 1).all()
    return row.argmax(axis=1)


def fork(gamma: float = 0.9) -> tuple[FiniteMDP, np.ndarray, np.ndarray]:
    """State 0 (start): every action a goes to state 1 paying r0[a]; in state 1 action
    a ends the episode (state 2) paying r1[a]. Returns the model and r0, r1."""
    r0 = np.array([0.3, -0.2, 0.7, 0.1])
    r1 = np.array([1.0, -1.0, 2.0, 0.5])
    nxt = np.zeros((3, 4, 1), dtype=np.intp)
    nxt[0], nxt[1], nxt[2] = 1, 2, 2
    rewards = np.stack([r0, r1, np.zeros(4)])
    mdp = FiniteMDP.from_successors(
        nxt, np.ones((3, 4, 1)), rewards, gamma=gamma, terminal=[False, False, True],
        initial=[1.0, 0.0, 0.0],
    )
    return mdp, r0, r1


# --------------------------------------------------------------------------- 1. exact
class _StepAndVisits(Schedule):
    """A user-defined per-pair schedule that also reads the step:
    alpha = 0.1 + 0.9 / (n + t / 100), in [0.1, 1]."""

    per_visit = True

    def value(self, step: int, visits: int = 1) -> float:
        return 0.1 + 0.9 / (max(visits, 1) + step / 100)

    def bounds(self) -> tuple[float, float]:
        return (0.1, 1.0)

    def describe(self) -> dict:
        return {"kind": "step_and_visits"}


STEP_SIZES = {
    "constant": 0.5,
    "visit_count": VisitCount(power=0.7),
    # By step: an off-by-one in the step index the batch passes would change every update.
    "linear": Linear(1.0, 0.05, duration=300),
    "custom_per_visit": _StepAndVisits(),
}


@pytest.mark.parametrize("learner", ["q_learning", "sarsa", "expected_sarsa"])
@pytest.mark.parametrize("step_size", STEP_SIZES)
@pytest.mark.parametrize("tables", ["single", "shared", "distinct"])
def test_batch_equals_scalar_learners_exactly(learner, step_size, tables):
    # single: K = 1; shared: K = 4 learners from one (S, A) table; distinct: K = 4
    # learners from four different tables (so four different trajectories).
    mdp = chain()
    steps, horizon = 600, 10
    k = 1 if tables == "single" else 4
    rng = np.random.default_rng(1)
    start = rng.uniform(-0.1, 0.1, size=(mdp.n_states, mdp.n_actions))
    if tables == "distinct":
        start = rng.uniform(-0.1, 0.1, size=(k, mdp.n_states, mdp.n_actions))
    res = train_batch(
        mdp, learner, n_learners=k, steps=steps, step_size=STEP_SIZES[step_size],
        exploration=0.0, seed=3, initial_value=start, max_episode_steps=horizon,
    )
    ends = {"terminated": 0, "truncated": 0, "self_loops": 0}
    for i in range(k):
        table = start if start.ndim == 2 else start[i]
        agent, history, finished, log = scalar_run(
            learner, mdp, table, steps=steps, max_episode_steps=horizon,
            step_size=STEP_SIZES[step_size],
        )
        np.testing.assert_array_equal(res.tables[i], agent.table)
        np.testing.assert_array_equal(res.visits[i], agent.visits)
        np.testing.assert_array_equal(res.episode_returns[i], history.returns[finished])
        np.testing.assert_array_equal(res.episode_lengths[i], history.lengths[finished])
        ends["terminated"] += int((history.ends == 0).sum())
        ends["truncated"] += int((history.ends == 1).sum())
        ends["self_loops"] += sum(s == s2 for s, _, s2, _ in log)
    # The runs really went through every case the update rules distinguish.
    assert min(ends.values()) >= 10, ends


def cliff_greedy_path(mdp: FiniteMDP, policy: np.ndarray, start: int = 36, limit: int = 100):
    """Return and cells of the greedy walk from ``start`` on the deterministic cliff model."""
    nxt, _, rewards = mdp.successors
    s, ret, path = start, 0.0, [start]
    for _ in range(limit):
        a = policy[s]
        ret += float(rewards[s, a, 0])
        s = int(nxt[s, a, 0])
        path.append(s)
        if mdp.terminal[s]:
            break
    return ret, path


@pytest.mark.parametrize("learner", ["q_learning", "sarsa", "expected_sarsa"])
def test_batch_equals_scalar_learners_on_the_cliff_walk(learner):
    # Sutton & Barto (2018), Example 6.6 (deterministic): falling off the cliff
    # (-100, back to the start) and reaching the goal both happen from these
    # starting values; exploration 0, so the comparison is exact.
    mdp = cliff_walking()
    start = np.random.default_rng(5).uniform(-0.5, 0.0, size=(3, 48, 4))
    res = train_batch(
        mdp, learner, n_learners=3, steps=1500, step_size=0.5, exploration=0.0,
        initial_value=start, max_episode_steps=200,
    )
    falls = 0
    for i in range(3):
        agent, history, finished, log = scalar_run(
            learner, mdp, start[i], steps=1500, max_episode_steps=200, step_size=0.5,
        )
        np.testing.assert_array_equal(res.tables[i], agent.table)
        np.testing.assert_array_equal(res.episode_returns[i], history.returns[finished])
        assert (history.ends == 0).sum() > 0
        falls += sum(s != 36 and s2 == 36 for s, _, s2, _ in log)
    assert falls > 0


def test_expected_sarsa_update_with_exploration_is_eq_6_9():
    # One step from state 0. Exploration follows Linear(1.0, 0.4, duration=1):
    # epsilon(0) = 1 for the behaviour (every action gets taken by some learner)
    # and epsilon(1) = 0.4 in the target, which the scalar learner uses after
    # observing one transition. Whichever action was taken, the target is
    # r0[a] + gamma * (eps * mean Q(1, .) + (1 - eps) * max Q(1, .)) with eps = 0.4
    # (Sutton & Barto 2018, Eq. 6.9 under epsilon-greedy), the same number the
    # scalar ExpectedSarsa computes for that transition.
    mdp, r0, _ = fork()
    q0 = np.array([[0.1, 0.5, -0.3, 0.2], [0.4, -0.6, 0.9, 0.05], [0.0, 0.0, 0.0, 0.0]])
    schedule, eps, alpha = Linear(1.0, 0.4, duration=1), 0.4, 0.5
    res = train_batch(mdp, "expected_sarsa", n_learners=200, steps=1, step_size=alpha,
                      exploration=schedule, initial_value=q0, seed=2)
    actions = first_actions(res, 0)
    assert len(set(actions.tolist())) == 4  # every action was taken by some learner
    for a in range(4):
        scalar = tdkit.ExpectedSarsa(3, 4, gamma=0.9, step_size=alpha, exploration=schedule)
        scalar._q[:] = q0
        scalar.observe(0, a, r0[a], 1, False, False)
        scalar.update()
        target = r0[a] + 0.9 * (eps * q0[1].mean() + (1 - eps) * q0[1].max())
        for i in np.flatnonzero(actions == a):
            assert res.tables[i, 0, a] == scalar.table[0, a]
            assert res.tables[i, 0, a] == pytest.approx(q0[0, a] + alpha * (target - q0[0, a]),
                                                        rel=1e-15)


def test_sarsa_bootstraps_on_the_action_it_then_takes():
    # Two steps: 0 -> 1 (update of Q(0, A0) with target r0 + gamma Q(1, A1)),
    # then A1 in state 1. The action a learner took in state 1 (read from its
    # visit counts) must be the one its first target used (Sutton & Barto 2018,
    # Eq. 6.7), and A1 must follow the epsilon-greedy probabilities of Q0(1, .).
    # Exploration Linear(1.0, 0.5, duration=1): epsilon(0) = 1 in state 0 and
    # epsilon(1) = 0.5 for A1, drawn after one observed transition.
    mdp, r0, _ = fork()
    q0 = np.array([[0.1, 0.5, -0.3, 0.2], [0.4, -0.6, 0.9, 0.05], [0.0, 0.0, 0.0, 0.0]])
    eps, alpha, k = 0.5, 0.5, 4000
    res = train_batch(mdp, "sarsa", n_learners=k, steps=2, step_size=alpha,
                      exploration=Linear(1.0, eps, duration=1), initial_value=q0, seed=4)
    a0, a1 = first_actions(res, 0), first_actions(res, 1)
    expected = q0[0, a0] + alpha * (r0[a0] + 0.9 * q0[1, a1] - q0[0, a0])
    np.testing.assert_array_equal(res.tables[np.arange(k), 0, a0], expected)
    # Chi-square at level 1e-3 (3 degrees of freedom; expected counts >= 500).
    probs = EpsilonGreedy(eps).probabilities(q0[1], None)
    assert chi_square_p(np.bincount(a1, minlength=4), probs) > 1e-3


def test_double_q_flips_a_fair_coin_and_evaluates_with_the_other_table():
    # One step from state 0 with alpha = 1: the updated table's Q(0, A0) becomes
    # r0 + gamma Q^other(1, argmax_a Q^updated(1, a)) (van Hasselt 2010, Algorithm 1);
    # state 1 is untouched, so both tables' rows there are their starting values.
    # The tables start from independent U(0, 1) draws and the targets lie above 1.5,
    # so exactly one of the two candidate targets is found.
    mdp, r0, _ = fork()
    r0_shift = 1.5
    shifted = FiniteMDP.from_successors(
        mdp.successors[0], mdp.successors[1], mdp.R + r0_shift * np.array([[1], [0], [0]]),
        gamma=0.9, terminal=mdp.terminal, initial=mdp.initial,
    )
    k = 2000
    res = train_batch(shifted, "double_q", n_learners=k, steps=1, step_size=1.0,
                      exploration=0.0, initial_value=(0.0, 1.0), seed=6)
    q_a, q_b = res.double_tables
    a0 = first_actions(res, 0)
    rows = np.arange(k)
    reward = r0[a0] + r0_shift
    target_a = reward + 0.9 * q_b[rows, 1, q_a[:, 1].argmax(axis=1)]
    target_b = reward + 0.9 * q_a[rows, 1, q_b[:, 1].argmax(axis=1)]
    # alpha = 1 gives old + (target - old): the target up to one rounding.
    updated_a = np.isclose(q_a[rows, 0, a0], target_a, rtol=0.0, atol=1e-12)
    updated_b = np.isclose(q_b[rows, 0, a0], target_b, rtol=0.0, atol=1e-12)
    assert (updated_a ^ updated_b).all()
    # Fair coin: |#A - k/2| <= z sqrt(k) / 2 with z = norm.isf(5e-4) = 3.29
    # (two-sided level 1e-3): |#A - 1000| <= 73.6.
    z = stats.norm.isf(5e-4)
    assert abs(int(updated_a.sum()) - k / 2) <= z * math.sqrt(k) / 2
    np.testing.assert_array_equal(res.tables, (q_a + q_b) / 2)


# --------------------------------------------------------------------------- 2. statistics
@pytest.mark.parametrize(
    ("row", "tied"),
    [([0.0, 0.0, 0.0, 0.0], [0, 1, 2, 3]), ([1.0, 0.0, 1.0, 1.0], [0, 2, 3])],
)
@pytest.mark.parametrize("learner", LEARNERS)
def test_greedy_ties_are_broken_uniformly(learner, row, tied):
    # 6000 learners take one greedy step (epsilon 0) from state 0 of the fork,
    # whose row of starting values has the given ties. Tied actions must be
    # equally likely (chi-square, level 1e-3 per case; "first index wins"
    # would put all 6000 on the first tied action: statistic >= 12,000) and
    # the others never taken.
    mdp, _, _ = fork()
    q0 = np.zeros((3, 4))
    q0[0] = row
    res = train_batch(mdp, learner, n_learners=6000, steps=1, exploration=0.0,
                      initial_value=q0, seed=11)
    counts = np.bincount(first_actions(res, 0), minlength=4)
    probs = np.isin(np.arange(4), tied) / len(tied)
    assert chi_square_p(counts, probs) > 1e-3, counts


def test_row_wise_greedy_uses_the_scalar_rule():
    # Same uniform number, same pick: tie floor(u * k) of the k tied actions,
    # as tdkit._greedy.greedy_action (which draws u from its generator only
    # when there is a tie).
    rng = np.random.default_rng(0)
    rows = rng.integers(0, 3, size=(500, 5)).astype(float)
    for values in rows:
        scalar = greedy_action(values, None, np.random.default_rng(9))
        u = np.random.default_rng(9).random()
        assert greedy_rows(values[None, :], np.array([u]))[0] == scalar


def test_epsilon_greedy_frequencies():
    # P(a) = eps / A + (1 - eps) [a greedy] (Sutton & Barto 2018, Section 2.2),
    # from the scalar EpsilonGreedy.probabilities; chi-square at level 1e-3.
    mdp, _, _ = fork()
    q0 = np.zeros((3, 4))
    q0[0] = [0.2, 0.9, -0.4, 0.1]
    res = train_batch(mdp, "q_learning", n_learners=8000, steps=1, exploration=0.3,
                      initial_value=q0, seed=12)
    counts = np.bincount(first_actions(res, 0), minlength=4)
    assert chi_square_p(counts, EpsilonGreedy(0.3).probabilities(q0[0], None)) > 1e-3


def test_next_states_and_per_outcome_rewards_follow_the_model():
    # A dense model with per-transition rewards R(s, a, s'): from state 0 the one
    # action reaches terminal states 1, 2, 3 with probabilities 0.2, 0.5, 0.3 and
    # rewards 10, -4, 1. Every one-step episode must pay one of those rewards
    # exactly (not the expected 0.3), with the model's frequencies (chi-square,
    # level 1e-3).
    P = np.zeros((4, 1, 4))
    P[0, 0, 1:] = [0.2, 0.5, 0.3]
    R = np.zeros((4, 1, 4))
    R[0, 0, 1:] = [10.0, -4.0, 1.0]
    mdp = FiniteMDP(P, R, gamma=0.9, terminal=[False, True, True, True], initial=[1, 0, 0, 0])
    assert mdp.R[0, 0] == pytest.approx(0.3)
    res = train_batch(mdp, "q_learning", n_learners=5000, steps=1, seed=13)
    returns = np.concatenate(res.episode_returns)
    assert returns.size == 5000
    counts = np.array([(returns == r).sum() for r in (10.0, -4.0, 1.0)])
    assert counts.sum() == 5000
    assert chi_square_p(counts, [0.2, 0.5, 0.3]) > 1e-3


def test_episodes_start_and_restart_from_the_initial_distribution():
    # Every action ends the episode at once and pays the index of the state it
    # was taken in, so each return names its start state. Two steps: the first
    # start and the restart. 2 x 3000 starts against initial = (0.5, 0.3, 0.2)
    # (chi-square, level 1e-3).
    P = np.zeros((4, 2, 4))
    P[:, :, 3] = 1.0
    R = np.array([[0.0, 0.0], [1.0, 1.0], [2.0, 2.0], [0.0, 0.0]])
    initial = [0.5, 0.3, 0.2, 0.0]
    mdp = FiniteMDP(P, R, gamma=1.0, terminal=[False, False, False, True], initial=initial)
    res = train_batch(mdp, "sarsa", n_learners=3000, steps=2, exploration=0.5, seed=14)
    returns = np.stack(res.episode_returns)
    assert returns.shape == (3000, 2)
    counts = np.bincount(returns.astype(int).ravel(), minlength=3)
    assert chi_square_p(counts, initial[:3]) > 1e-3


# --------------------------------------------------------------------------- 3. published examples
def test_cliff_walking_sarsa_earns_more_online_and_q_learning_learns_the_edge():
    # Sutton & Barto (2018), Example 6.6 and Figure 6.4: alpha 0.5, epsilon 0.1,
    # undiscounted. Q-learning's greedy path is the 13-step edge (return -13);
    # SARSA's online returns (about -25 in the figure) beat Q-learning's (about
    # -50; both read off the figure, recalled from memory). Margins as in
    # tests/reference/test_cliff_walking.py: a Q-learning episode falls with probability
    # about 0.27 (sd of a return about 52); the mean over 16 learners x >= 500
    # episodes has sd below 52 / sqrt(8000) < 0.6, so a gap of 10 is > 15 sd
    # below the expected 25.
    mdp = cliff_walking()
    online = {}
    for learner in ("q_learning", "sarsa"):
        res = train_batch(mdp, learner, n_learners=16, steps=20_000, step_size=0.5,
                          exploration=0.1, seed=21)
        assert min(len(r) for r in res.episode_returns) > 500
        online[learner] = float(np.mean([r[100:].mean() for r in res.episode_returns]))
        if learner == "q_learning":
            for policy in res.greedy_policies():
                assert cliff_greedy_path(mdp, policy)[0] == -13.0
    assert online["sarsa"] > online["q_learning"] + 10.0, online
    assert -70 < online["q_learning"] < -35
    assert -40 < online["sarsa"] < -15


def test_double_q_removes_the_maximisation_bias():
    # Sutton & Barto (2018), Example 6.7 and Figure 6.5 (alpha 0.1, epsilon 0.1):
    # early on Q-learning goes "left" into B far more often than Double
    # Q-learning. tdkit's model has 10 actions in A (9 behave like "right", no
    # mask in the batch), so "left" is optimal-policy-rare (epsilon / 10). An
    # episode through B has length 2. Over the first 50 episodes each learner's
    # left-fraction lies in [0, 1], so the mean over 500 independent learners has
    # sd <= 0.5 / sqrt(500) = 0.022 and a difference of two such means sd <= 0.032;
    # a gap of 0.15 is required (the figure's gap is about 0.5 at its peak).
    left = {}
    for learner in ("q_learning", "double_q"):
        res = train_batch(maximization_bias(), learner, n_learners=500, steps=200,
                          step_size=0.1, exploration=0.1, seed=22)
        assert min(len(n) for n in res.episode_lengths) >= 50
        left[learner] = float(np.mean([(n[:50] == 2).mean() for n in res.episode_lengths]))
    assert left["q_learning"] > left["double_q"] + 0.15, left


# --------------------------------------------------------------------------- convergence
K_CONVERGE = 8
STEPS_CONVERGE = 40_000
DELTA = 1e-3


def _noise_bound(spread: float, n: np.ndarray, pairs: int) -> np.ndarray:
    """Azuma-Hoeffding: the average of n martingale differences with range ``spread``
    stays below this for all ``pairs`` pairs of all K learners with probability
    >= 1 - DELTA (a union bound over 2 * pairs * K one-sided events)."""
    return spread * np.sqrt(math.log(2 * pairs * K_CONVERGE / DELTA) / (2 * n))


@pytest.mark.parametrize("seed", [0, 1])
def test_q_learning_batch_reaches_q_star_on_garnet(seed):
    r"""All K learners within a derived bound of Q* (value iteration, tol 1e-12).

    Garnet(6 states, 2 actions, 3 successors), gamma 0.25; alpha = 1/n(s, a)
    (VisitCount(1)); uniform behaviour (epsilon 1); episodes cut every 30 steps.
    With alpha = 1/n, Q(s, a) is the average of its n targets; the noise of a
    target has range L = gamma (max V* - min V*), so by Azuma-Hoeffding the
    average noise is below eps(n) for every pair of every learner with
    probability >= 1 - 1e-3. The lag of the targets is at most gamma times the
    past errors; if errors decay like c / sqrt(t) the past average is about twice
    the current error, so error <= eps + 2 gamma error, i.e. error <= eps / (1 - 2
    gamma) (heuristic reading of Szepesvari 1997, "The asymptotic convergence-rate
    of Q-learning", NIPS 10; the same bound as tests/reference/test_qlearning_exact.py).
    n is each learner's smallest visit count.
    """
    gamma = 0.25
    mdp = garnet(6, 2, 3, gamma=gamma, seed=seed)
    q_star = value_iteration(mdp, tol=1e-12).q
    res = train_batch(mdp, "q_learning", n_learners=K_CONVERGE, steps=STEPS_CONVERGE,
                      step_size=VisitCount(power=1.0), exploration=1.0, seed=seed,
                      max_episode_steps=30)
    v_star = q_star.max(axis=1)
    n_min = res.visits.min(axis=(1, 2))
    assert (n_min > 300).all()
    bound = _noise_bound(gamma * (v_star.max() - v_star.min()), n_min, 12) / (1 - 2 * gamma)
    error = np.abs(res.tables - q_star).max(axis=(1, 2))
    assert (error < bound).all(), (error, bound)


def test_double_q_batch_reaches_q_star_on_garnet():
    r"""Double Q-learning: all K learners within a derived bound of Q*.

    Setting as for Q-learning but gamma 0.1. Each table gets each pair's
    updates with probability 1/2: by Hoeffding it has at least n/2 - sqrt(n
    ln(2 pairs K / delta) / 2) of the pair's n updates (all pairs, all learners,
    probability >= 1 - 1e-3). Noise as for Q-learning with that count. Lag: the
    target Q^B(s', argmax Q^A(s')) is within e_B + 2 e_A of V*(s') (a wrong
    argmax costs at most the two errors that made it win), i.e. 3 gamma e
    instead of gamma e, so error <= eps / (1 - 6 gamma) with the same
    past-average heuristic (van Hasselt 2010 proves convergence).
    """
    gamma = 0.1
    mdp = garnet(6, 2, 3, gamma=gamma, seed=0)
    q_star = value_iteration(mdp, tol=1e-12).q
    res = train_batch(mdp, "double_q", n_learners=K_CONVERGE, steps=STEPS_CONVERGE,
                      step_size=VisitCount(power=1.0), exploration=1.0, seed=0,
                      max_episode_steps=30)
    n_min = res.visits.min(axis=(1, 2)).astype(float)
    n_table = n_min / 2 - np.sqrt(n_min * math.log(2 * 12 * K_CONVERGE / DELTA) / 2)
    assert (n_table > 300).all()
    v_star = q_star.max(axis=1)
    noise = _noise_bound(gamma * (v_star.max() - v_star.min()), n_table, 2 * 12)
    bound = noise / (1 - 6 * gamma)
    error = np.abs(res.tables - q_star).max(axis=(1, 2))
    assert (error < bound).all(), (error, bound)


def epsilon_soft_optimum(mdp: FiniteMDP, epsilon: float) -> np.ndarray:
    """Action values of the best epsilon-soft policy, by exact policy iteration over
    epsilon-greedy policies (Sutton & Barto 2018, Section 5.4)."""
    rule = EpsilonGreedy(epsilon)
    policy = np.full((mdp.n_states, mdp.n_actions), 1.0 / mdp.n_actions)
    for _ in range(100):
        q = action_values(mdp, evaluate_policy(mdp, policy))
        improved = np.array([rule.probabilities(row, None) for row in q])
        if np.array_equal(improved, policy):
            return q
        policy = improved
    raise AssertionError("epsilon-soft policy iteration did not settle")


@pytest.mark.parametrize("seed", [0, 1])
def test_sarsa_batch_with_decaying_exploration_reaches_its_fixed_point(seed):
    r"""SARSA converges to the values of the best epsilon-soft policy (on-policy).

    Exploration decays as eps_t = max(0.8, 0.99^t) (Exponential(1, 0.99, 0.8));
    alpha = 1/n(s, a); gamma 0.25; Garnet(6, 2, 3). The fixed point is Q~, the
    action values of the best 0.8-greedy policy, computed exactly by DP.

    Bound (derived like Q-learning's): the expected target r + gamma (eps mean +
    (1 - eps) max) Q(s', .) is 1-Lipschitz in Q in sup norm, so the lag term is
    gamma e and the amplification 1 / (1 - 2 gamma) as for Q-learning; noise
    range L = gamma (max Q~ - min Q~) (the sampled A' included). Exploration
    above its floor biases a pair's average by at most gamma D sum_t (eps_t -
    0.8) / n, with D = max_s (max_a Q~ - mean_a Q~) (both with Q~ for the
    current estimates, a second-order simplification) and the sum taken over
    the schedule's own values (about 4.6).

    The test discriminates on-policy from off-policy learning: Q~ differs from
    Q* by more than twice the bound (checked), so a learner converging to Q*
    fails it.
    """
    gamma, floor = 0.25, 0.8
    mdp = garnet(6, 2, 3, gamma=gamma, seed=seed)
    q_soft = epsilon_soft_optimum(mdp, floor)
    q_star = value_iteration(mdp, tol=1e-12).q
    schedule = Exponential(1.0, 0.99, floor)
    res = train_batch(mdp, "sarsa", n_learners=K_CONVERGE, steps=STEPS_CONVERGE,
                      step_size=VisitCount(power=1.0), exploration=schedule,
                      seed=seed, max_episode_steps=30)
    n_min = res.visits.min(axis=(1, 2))
    excess = sum(schedule.value(t) - floor for t in range(STEPS_CONVERGE + 1))
    spread_d = float((q_soft.max(axis=1) - q_soft.mean(axis=1)).max())
    bias = gamma * spread_d * excess / n_min
    noise = _noise_bound(gamma * (q_soft.max() - q_soft.min()), n_min, 12)
    bound = (noise + bias) / (1 - 2 * gamma)
    assert (bound < np.abs(q_star - q_soft).max() / 2).all()  # the test can tell them apart
    error = np.abs(res.tables - q_soft).max(axis=(1, 2))
    assert (error < bound).all(), (error, bound)


# --------------------------------------------------------------------------- 4. reproducibility
@pytest.mark.parametrize("learner", LEARNERS)
def test_same_seed_same_result_other_seed_other_result(learner):
    mdp = garnet(8, 3, 3, gamma=0.9, seed=4)
    kwargs = {"n_learners": 5, "steps": 700, "exploration": 0.2, "max_episode_steps": 25,
              "initial_value": (0.0, 1.0)}
    first = train_batch(mdp, learner, seed=123, **kwargs)
    again = train_batch(mdp, learner, seed=123, **kwargs)
    other = train_batch(mdp, learner, seed=124, **kwargs)
    from_generator = train_batch(mdp, learner, seed=np.random.default_rng(123), **kwargs)
    for res in (again, from_generator):
        np.testing.assert_array_equal(res.tables, first.tables)
        np.testing.assert_array_equal(res.visits, first.visits)
        for a, b in zip(res.episode_returns, first.episode_returns, strict=True):
            np.testing.assert_array_equal(a, b)
    assert not np.array_equal(other.tables, first.tables)
    # The K learners are not copies of each other.
    assert not np.array_equal(first.tables[0], first.tables[1])


def test_dense_and_sparse_forms_give_the_same_run():
    dense = FiniteMDP(garnet(7, 2, 3, seed=2).P, garnet(7, 2, 3, seed=2).R, gamma=0.9)
    a = train_batch(dense, "expected_sarsa", n_learners=3, steps=400, max_episode_steps=20)
    b = train_batch(dense.to_sparse(), "expected_sarsa", n_learners=3, steps=400,
                    max_episode_steps=20)
    np.testing.assert_array_equal(a.tables, b.tables)


def test_result_fields_and_helpers():
    mdp = garnet(5, 3, 2, gamma=0.5, seed=3)
    res = train_batch(mdp, "double_q", n_learners=4, steps=100, max_episode_steps=30)
    assert res.tables.shape == (4, 5, 3) and res.visits.shape == (4, 5, 3)
    assert res.double_tables.shape == (2, 4, 5, 3)
    assert int(res.visits.sum()) == 4 * 100 and res.steps == 100 and res.n_learners == 4
    assert [len(r) for r in res.episode_returns] == [3] * 4  # 100 steps, episodes of 30
    assert all(n.tolist() == [30, 30, 30] for n in res.episode_lengths)
    policies = res.greedy_policies()
    assert policies.shape == (4, 5)
    np.testing.assert_array_equal(policies, res.tables.argmax(axis=2))
    assert "double_q" in repr(res) and "n_learners=4" in repr(res)
    # No terminal state and no time limit: no episode ever ends.
    endless = train_batch(mdp, "q_learning", n_learners=2, steps=50)
    assert [len(r) for r in endless.episode_returns] == [0, 0]
    assert endless.double_tables is None


# --------------------------------------------------------------------------- 5. validation
MDP = garnet(4, 2, 2, seed=0)


@pytest.mark.parametrize(
    ("args", "kwargs", "words"),
    [
        ((MDP, "qlearning"), {}, ["learner", "'qlearning'", "'q_learning'"]),
        ((MDP, tdkit.QLearning), {}, ["learner", "QLearning", "'q_learning'"]),
        (("not a model", "sarsa"), {}, ["mdp", "FiniteMDP", "str"]),
        ((MDP, "sarsa"), {"n_learners": 0}, ["n_learners", ">= 1", "0"]),
        ((MDP, "sarsa"), {"n_learners": 2.5}, ["n_learners", "2.5"]),
        ((MDP, "sarsa"), {"steps": 0}, ["steps", "0"]),
        ((MDP, "sarsa"), {"step_size": 0.0}, ["step_size", "(0, 1]", "0.0"]),
        ((MDP, "sarsa"), {"step_size": 1.5}, ["step_size", "1.5", "schedule"]),
        ((MDP, "sarsa"), {"step_size": Linear(2.0, 0.1, 10)}, ["step_size", "Linear"]),
        ((MDP, "sarsa"), {"exploration": 1.5}, ["exploration", "[0, 1]", "1.5"]),
        ((MDP, "sarsa"), {"exploration": UCB(1.0)}, ["exploration", "UCB", "tdkit.train"]),
        ((MDP, "sarsa"), {"seed": -1}, ["seed", "-1"]),
        ((MDP, "sarsa"), {"initial_value": float("nan")}, ["initial_value", "nan"]),
        ((MDP, "sarsa"), {"initial_value": np.zeros((3, 2))},
         ["initial_value", "(4, 2)", "(3, 2)"]),
        ((MDP, "sarsa"), {"max_episode_steps": 0}, ["max_episode_steps", "0"]),
        ((MDP, "sarsa"), {"gamma": 1.5}, ["gamma", "[0, 1]", "1.5"]),
    ],
)
def test_bad_arguments_raise_clear_errors(args, kwargs, words):
    call = {"n_learners": 2, "steps": 10, **kwargs}
    with pytest.raises(InvalidParameterError) as info:
        train_batch(*args, **call)
    assert isinstance(info.value, ValueError)
    message = str(info.value)
    assert message.startswith("train_batch")
    for word in words:
        assert word in message, (word, message)


def test_nan_values_raise_instead_of_choosing_silently():
    # Rewards of 1e308 with gamma 1 overflow to inf and then inf - inf = NaN.
    P = np.zeros((1, 2, 1))
    P[0, :, 0] = 1.0
    mdp = FiniteMDP(P, np.full((1, 2), 1e308), gamma=1.0)
    with np.errstate(all="ignore"), pytest.raises(FloatingPointError, match="NaN"):
        train_batch(mdp, "q_learning", n_learners=2, steps=50, step_size=1.0)

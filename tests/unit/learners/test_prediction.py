"""TD(0) and TD(λ) prediction: batch TD = certainty equivalence, references, policies."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

import tdkit
from tdkit.dp import evaluate_policy
from tdkit.envs.finite import FiniteMDP
from tdkit.envs.problems import random_walk
from tdkit.learners import TD0, TDLambda

PREDICTORS = [TD0, TDLambda]
KINDS = ["accumulating", "replacing", "dutch"]


# ----------------------------------------------------------------- helpers
def random_episodes(seed, n_states, n_episodes, allow_truncation):
    """Episodes of a random Markov reward process over states 0..n_states-1.

    Each step ends the episode with probability 0.25 (terminated) or, when
    allowed, 0.05 (truncated, to be bootstrapped).
    """
    rng = np.random.default_rng(seed)
    P = rng.dirichlet(np.ones(n_states), size=n_states)
    episodes = []
    for _ in range(n_episodes):
        s = int(rng.integers(n_states))
        episode = []
        while True:
            s2 = int(rng.choice(n_states, p=P[s]))
            r = float(np.round(rng.normal(), 3))
            terminated = bool(rng.random() < 0.25)
            truncated = allow_truncation and not terminated and bool(rng.random() < 0.05)
            episode.append((s, 0, r, s2, terminated, truncated))
            if terminated or truncated:
                break
            s = s2
        episodes.append(episode)
    return episodes


def certainty_equivalence(episodes, n_states, gamma):
    """Exact values of the maximum-likelihood model of the episodes (S&B 2018, Section 6.3).

    Terminated transitions lead to an extra absorbing terminal state; states
    never left in the data are terminal too (value 0, as TD leaves them at 0).
    """
    size = n_states + 1
    counts = np.zeros((size, size))
    reward_sum = np.zeros(size)
    for episode in episodes:
        for s, _a, r, s2, terminated, _truncated in episode:
            counts[s, n_states if terminated else s2] += 1
            reward_sum[s] += r
    visits = counts.sum(axis=1)
    terminal = visits == 0
    P = np.zeros((size, 1, size))
    R = np.zeros((size, 1))
    live = ~terminal
    P[live, 0, :] = counts[live] / visits[live, None]
    R[live, 0] = reward_sum[live] / visits[live]
    P[terminal, 0, np.flatnonzero(terminal)] = 1.0
    mdp = FiniteMDP(P, R, gamma=gamma, terminal=terminal)
    return evaluate_policy(mdp, [0] * size)[:n_states]


def transitions_stream(seed, steps, n_states):
    """Transitions of one-action chains with ends and jumps (a new episode anywhere)."""
    rng = np.random.default_rng(seed)
    out, s = [], 0
    for _ in range(steps):
        s2 = int(rng.integers(n_states))
        terminated = bool(rng.random() < 0.1)
        truncated = not terminated and bool(rng.random() < 0.05)
        out.append((s, 0, float(rng.normal()), s2, terminated, truncated))
        jump = rng.random() < 0.05
        s = int(rng.integers(n_states)) if terminated or truncated or jump else s2
    return out


def feed(agent, transitions):
    for transition in transitions:
        agent.observe(*transition)
        agent.update()


def uniform_policy(n_states, n_actions):
    return np.full((n_states, n_actions), 1.0 / n_actions)


# ----------------------------------------------------------------- batch TD(0)
@settings(max_examples=40)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_states=st.integers(1, 6),
    n_episodes=st.integers(1, 8),
    gamma=st.sampled_from([0.5, 0.9, 1.0]),
    step_size=st.sampled_from([0.5, 1.0]),
)
def test_batch_td0_is_the_certainty_equivalence_estimate(
    seed, n_states, n_episodes, gamma, step_size
):
    # Sutton & Barto (2018), Section 6.3 (Example 6.4): batch TD(0) converges to
    # the certainty-equivalence estimate, the exact value of the maximum
    # likelihood model of the data. With gamma = 1 only terminating episodes
    # are used, so that model is proper.
    episodes = random_episodes(seed, n_states, n_episodes, allow_truncation=gamma < 1)
    agent = TD0(n_states, 1, policy=uniform_policy(n_states, 1), gamma=gamma,
                step_size=step_size, seed=0)
    sweeps = agent.fit_batch(episodes)
    assert sweeps >= 1
    expected = certainty_equivalence(episodes, n_states, gamma)
    np.testing.assert_allclose(agent.values_table, expected, rtol=0, atol=1e-7)


def test_batch_td0_on_example_6_4_you_are_the_predictor():
    # Sutton & Barto (2018), Example 6.4: eight episodes A,0,B,0 / B,1 (x6) / B,0.
    # Batch TD(0) gives V(B) = 3/4 and V(A) = 3/4 (batch Monte Carlo would give
    # V(A) = 0). States: A = 0, B = 1, terminal = 2; gamma = 1.
    episodes = [[(0, 0, 0.0, 1, False, False), (1, 0, 0.0, 2, True, False)]]
    episodes += [[(1, 0, 1.0, 2, True, False)]] * 6 + [[(1, 0, 0.0, 2, True, False)]]
    agent = TD0(3, 1, policy=uniform_policy(3, 1), gamma=1.0, step_size=1.0)
    agent.fit_batch(episodes)
    np.testing.assert_allclose(agent.values_table, [0.75, 0.75, 0.0], atol=1e-12)


def test_fit_batch_rejects_bad_input():
    agent = TD0(3, 1, policy=uniform_policy(3, 1), step_size=tdkit.schedules.VisitCount(1.0))
    with pytest.raises(ValueError, match="schedule"):
        agent.fit_batch([[(0, 0, 0.0, 1, True, False)]])
    agent = TD0(3, 1, policy=uniform_policy(3, 1), step_size=0.5)
    with pytest.raises(ValueError, match="transition"):
        agent.fit_batch([[(0, 0, 0.0, 1, True)]])
    with pytest.raises(ValueError, match="step_size"):
        agent.fit_batch([[(0, 0, 0.0, 1, True, False)]], step_size=1.5)
    # gamma = 1 and a loop that never ends (only truncated): no fixed point
    looping = TD0(1, 1, policy=[[1.0]], gamma=1.0, step_size=1.0)
    with pytest.raises(ValueError, match="no convergence"):
        looping.fit_batch([[(0, 0, 1.0, 0, False, True)]], max_iterations=50)
    assert agent.fit_batch([]) == 0


# ----------------------------------------------------------------- TD(λ)
@settings(max_examples=30)
@given(seed=st.integers(0, 2**32 - 1), n_states=st.integers(1, 5), trace=st.sampled_from(KINDS))
def test_td_lambda_with_lambda_0_is_td0(seed, n_states, trace):
    # Sutton & Barto (2018), Section 12.2: TD(0) is TD(lambda) with lambda = 0.
    transitions = transitions_stream(seed, 150, n_states)
    policy = uniform_policy(n_states, 1)
    td0 = TD0(n_states, 1, policy=policy, gamma=0.9, step_size=0.3)
    lam = TDLambda(n_states, 1, policy=policy, lam=0.0, trace=trace, gamma=0.9, step_size=0.3)
    feed(td0, transitions)
    feed(lam, transitions)
    np.testing.assert_allclose(lam.values_table, td0.values_table, rtol=0, atol=1e-12)


def dense_td_lambda(transitions, n_states, gamma, lam, alpha, trace):
    """TD(lambda) from the book's boxes with one-hot features and full trace vectors.

    Accumulating / replacing: Sutton & Barto (2018), Section 12.2 box
    ("Semi-gradient TD(lambda)"); dutch: Section 12.5 box ("True online
    TD(lambda)"). A transition that does not start where the previous one
    ended begins a new episode.
    """
    w = np.zeros(n_states)
    z = np.zeros(n_states)
    v_old = 0.0
    expect = None
    for s, _a, r, s2, terminated, truncated in transitions:
        if expect is not None and s != expect:
            z[:] = 0.0
            v_old = 0.0
        x = np.zeros(n_states)
        x[s] = 1.0
        v = w[s]
        v_next = 0.0 if terminated else w[s2]
        delta = r + gamma * v_next - v
        if trace == "dutch":
            z = gamma * lam * z + (1.0 - alpha * gamma * lam * z[s]) * x
            w += alpha * (delta + v - v_old) * z - alpha * (v - v_old) * x
            v_old = v_next
        else:
            z *= gamma * lam
            if trace == "accumulating":
                z += x
            else:
                z[s] = 1.0
            w += alpha * delta * z
        if terminated or truncated:
            z[:] = 0.0
            v_old = 0.0
            expect = None
        else:
            expect = s2
    return w


@settings(max_examples=30)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_states=st.integers(1, 5),
    trace=st.sampled_from(KINDS),
    lam=st.sampled_from([0.3, 0.8, 1.0]),
)
def test_td_lambda_matches_the_dense_textbook_algorithm(seed, n_states, trace, lam):
    transitions = transitions_stream(seed, 150, n_states)
    agent = TDLambda(n_states, 1, policy=uniform_policy(n_states, 1), lam=lam, trace=trace,
                     gamma=0.9, step_size=0.3, trace_cutoff=0.0)
    feed(agent, transitions)
    expected = dense_td_lambda(transitions, n_states, 0.9, lam, 0.3, trace)
    np.testing.assert_allclose(agent.values_table, expected, rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize(
    "make",
    [
        lambda: TD0(7, 1, policy=[[1.0]] * 7, gamma=1.0, step_size=0.01, seed=0),
        lambda: TDLambda(7, 1, policy=[[1.0]] * 7, lam=0.5, gamma=1.0, step_size=0.01, seed=0),
    ],
    ids=["TD0", "TDLambda"],
)
def test_learns_the_random_walk_values(make):
    """Sutton & Barto (2018), Example 6.2: true values 1/6, ..., 5/6.

    alpha = 0.01, 4000 episodes; values averaged over the last 2000 episodes
    (iterate averaging, Polyak & Juditsky 1992).

    Tolerance 0.03, derived: near the fixed point a state's value is an AR(1)
    process V <- (1 - alpha) V + alpha * target, whose target has standard
    deviation sigma = |V(s+1) - V(s-1)| / 2 = 1/6 for TD(0), so its stationary
    standard deviation is sqrt(alpha sigma^2 / (2 - alpha)) ~ 0.012 (0.024
    allowing a factor 2 for the coupling between states and the lambda-return).
    Its correlation time is about 1 / (alpha * visits per episode) <= 100
    episodes (every state is visited >= 1 time per episode on average), so the
    average of 2000 per-episode samples has about 2000 / 200 = 10 independent
    samples: standard deviation <= 0.024 / sqrt(10) ~ 0.008, and 0.03 is more
    than 3.5 of those. A wrong bootstrap or a truncation bug is off by >= 1/6.
    """
    agent = make()
    env = random_walk(5).to_env()
    true = np.arange(1, 6) / 6.0
    average = np.zeros(5)
    for episode in range(4000):
        obs, _ = env.reset(seed=episode)
        done = False
        while not done:
            action = agent.act(obs)
            nxt, reward, terminated, truncated, _ = env.step(action)
            agent.observe(obs, action, reward, nxt, terminated, truncated)
            agent.update()
            obs, done = nxt, terminated or truncated
        if episode >= 2000:
            average += agent.values_table[1:6] / 2000
    np.testing.assert_allclose(average, true, atol=0.03)


# ----------------------------------------------------------------- episode ends
@pytest.mark.parametrize("cls", PREDICTORS)
def test_terminated_does_not_bootstrap_and_truncated_does(cls):
    # V(1) = 100, gamma 0.9, alpha 1: terminated target 1, truncated 1 + 90 = 91.
    for truncated, expected in ((False, 1.0), (True, 91.0)):
        agent = cls(2, 1, policy=[[1.0], [1.0]], gamma=0.9, step_size=1.0)
        agent._q[1, 0] = 100.0
        agent.observe(0, 0, 1.0, 1, not truncated, truncated)
        assert agent.update() == pytest.approx((expected,))
        assert agent.values(0) == pytest.approx(expected)


# ----------------------------------------------------------------- acting with the policy
@pytest.mark.parametrize("cls", PREDICTORS)
def test_act_samples_the_policy_table(cls):
    # 30,000 draws from pi(.|s) = (0.2, 0.5, 0.3) (and renormalised (0.4, 0, 0.6)
    # under a mask forbidding action 1): chi-square with 2 (1) degrees of freedom
    # at the 1 - 1e-6 quantile, so a correct sampler fails with probability 1e-6.
    agent = cls(2, 3, policy=[[0.2, 0.5, 0.3], [1.0, 0.0, 0.0]], seed=3)
    n = 30_000
    counts = np.bincount([agent.act(0) for _ in range(n)], minlength=3)
    expected = n * np.array([0.2, 0.5, 0.3])
    assert ((counts - expected) ** 2 / expected).sum() < stats.chi2.ppf(1 - 1e-6, df=2)
    mask = np.array([True, False, True])
    counts = np.bincount([agent.act(0, mask=mask) for _ in range(n)], minlength=3)
    assert counts[1] == 0
    expected = n * np.array([0.4, 0.6])
    assert ((counts[[0, 2]] - expected) ** 2 / expected).sum() < stats.chi2.ppf(1 - 1e-6, df=1)
    assert {agent.act(1) for _ in range(50)} == {0}  # zero-probability actions never drawn
    assert agent.act(1, explore=False) == 0  # explore is ignored: the policy is the policy
    with pytest.raises(ValueError, match="probability 0"):
        agent.act(1, mask=np.array([False, True, True]))


@pytest.mark.parametrize("cls", PREDICTORS)
def test_callable_policy(cls):
    agent = cls(4, 2, policy=lambda obs: obs % 2)
    assert [agent.act(s) for s in range(4)] == [0, 1, 0, 1]
    assert agent.act(1, mask=[False, True]) == 1
    with pytest.raises(ValueError, match="forbids"):
        agent.act(0, mask=[False, True])


@pytest.mark.parametrize("cls", PREDICTORS)
@pytest.mark.parametrize(
    ("policy", "message"),
    [
        ([[0.5, 0.5]], "shape"),
        ([[0.5, 0.6], [0.5, 0.5]], "row 0 sums to"),
        ([[1.5, -0.5], [0.5, 0.5]], "policy\\[0, 1\\]"),
        ([[np.nan, 1.0], [0.5, 0.5]], "finite"),
        ("uniform", "probability table or a callable"),
        (None, "probability table or a callable"),
    ],
)
def test_bad_policies_are_rejected_clearly(cls, policy, message):
    with pytest.raises(ValueError, match=message) as info:
        cls(2, 2, policy=policy)
    assert cls.__name__ in str(info.value)


@pytest.mark.parametrize(
    ("kwargs", "name"),
    [({"lam": 1.1}, "lam"), ({"trace": "dutchess"}, "trace"), ({"step_size": 0.0}, "step_size"),
     ({"gamma": -1.0}, "gamma")],
)
def test_bad_hyper_parameters_are_rejected_naming_them(kwargs, name):
    with pytest.raises(ValueError, match=name):
        TDLambda(2, 1, policy=[[1.0], [1.0]], **kwargs)


# ----------------------------------------------------------------- inspection
@pytest.mark.parametrize("cls", PREDICTORS)
def test_values_views_params_and_protocol(cls):
    agent = cls(3, 2, policy=uniform_policy(3, 2), gamma=0.9, initial_value=2.0)
    assert isinstance(agent, tdkit.Agent)
    assert agent.values(1) == 2.0
    for view in (agent.values_table, agent.v, agent.table, agent.visits):
        assert view.shape == (3,) and not view.flags.writeable
    with pytest.raises(NotImplementedError, match="values"):
        agent.q_values(0)
    params = agent.get_params()
    assert "exploration" not in params and params["policy"] is agent.policy
    assert repr(agent).startswith(f"{cls.__name__}(n_states=3")
    assert agent.update() == ()


def test_fit_batch_old_keyword_max_sweeps_still_works_with_a_future_warning():
    agent = tdkit.TD0(3, 1, policy=[[1.0]] * 3, gamma=1.0, step_size=0.5)
    episodes = [[(0, 0, 0.0, 1, False, False), (1, 0, 1.0, 2, True, False)]]
    with pytest.warns(FutureWarning, match="0.3.0"):
        sweeps = agent.fit_batch(episodes, max_sweeps=10_000)
    assert sweeps == tdkit.TD0(3, 1, policy=[[1.0]] * 3, gamma=1.0, step_size=0.5).fit_batch(
        episodes, max_iterations=10_000
    )

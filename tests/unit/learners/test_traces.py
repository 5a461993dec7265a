"""Sarsa(λ) and Watkins's Q(λ): equivalences, dense references, semantics, convergence."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import tdkit
from tdkit.dp import action_values, value_iteration
from tdkit.envs.finite import FiniteMDP
from tdkit.envs.problems import garnet
from tdkit.learners import QLearning, Sarsa, SarsaLambda, WatkinsQLambda
from tdkit.schedules import VisitCount
from tdkit.testing.streams import feed, random_transitions

TRACE_LEARNERS = [SarsaLambda, WatkinsQLambda]
KINDS = ["accumulating", "replacing", "dutch"]


# ----------------------------------------------------------------- helpers
def environment_stream(seed, steps, n_states, n_actions, use_masks, truncate_rate=0.05):
    """Next states, rewards, ends, next masks and act-first flags from one generator."""
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(steps):
        s2 = int(rng.integers(n_states))
        r = float(rng.normal())
        terminated = bool(rng.random() < 0.1)
        truncated = not terminated and bool(rng.random() < truncate_rate)
        mask = None
        if use_masks:
            mask = rng.random(n_actions) < 0.6
            mask[int(rng.integers(n_actions))] = True
        restart = int(rng.integers(n_states))
        out.append((s2, r, terminated, truncated, mask, bool(rng.random() < 0.5), restart))
    return out


def run_lockstep(agents, stream, act_first_allowed=True):
    """act/observe/update loops through the same environment stream.

    Returns, per agent, the records (s, a, r, s2, terminated, truncated, a_next)
    where a_next is the action actually taken next (None at an episode end).
    """
    records = [[] for _ in agents]
    upcoming = [None] * len(agents)
    s, mask = 0, None
    for s2, r, terminated, truncated, next_mask, act_first, restart in stream:
        ended = terminated or truncated
        for i, agent in enumerate(agents):
            a = upcoming[i] if upcoming[i] is not None else agent.act(s, mask=mask)
            upcoming[i] = None
            if records[i] and records[i][-1][6] is None and not records[i][-1][4] \
                    and not records[i][-1][5]:
                records[i][-1] = (*records[i][-1][:6], a)
            agent.observe(s, a, r, s2, terminated, truncated, next_mask=next_mask)
            if act_first and act_first_allowed and not ended:
                upcoming[i] = agent.act(s2, mask=next_mask)
            agent.update()
            records[i].append((s, a, r, s2, terminated, truncated, None))
        s, mask = (restart, None) if ended else (s2, next_mask)
    return records


def masked_max(row, mask):
    return row.max() if mask is None else row[mask].max()


# ----------------------------------------------------------------- λ = 0 equivalences
@settings(max_examples=30)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_states=st.integers(1, 5),
    n_actions=st.integers(1, 4),
    use_masks=st.booleans(),
    trace=st.sampled_from(KINDS),
    step_size=st.sampled_from([0.2, 1.0, VisitCount(0.8)]),
)
def test_sarsa_lambda_with_lambda_0_is_sarsa(
    seed, n_states, n_actions, use_masks, trace, step_size
):
    # Sutton & Barto (2018), Section 12.7: with lambda = 0 only the visited
    # pair has a trace, so Sarsa(lambda) is one-step SARSA (for the dutch /
    # true online form the correction terms cancel). Same seed and stream:
    # same actions, same tables.
    kwargs = dict(gamma=0.9, step_size=step_size, exploration=0.3, seed=seed % 997)
    sarsa = Sarsa(n_states, n_actions, **kwargs)
    lam = SarsaLambda(n_states, n_actions, lam=0.0, trace=trace, **kwargs)
    stream = environment_stream(seed, 120, n_states, n_actions, use_masks)
    records = run_lockstep([sarsa, lam], stream)
    assert [r[1] for r in records[0]] == [r[1] for r in records[1]]
    np.testing.assert_allclose(lam.table, sarsa.table, rtol=0, atol=1e-12)
    np.testing.assert_array_equal(lam.visits, sarsa.visits)


@settings(max_examples=30)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_states=st.integers(1, 5),
    n_actions=st.integers(1, 4),
    use_masks=st.booleans(),
    trace=st.sampled_from(KINDS),
)
def test_watkins_q_lambda_with_lambda_0_is_q_learning(seed, n_states, n_actions, use_masks, trace):
    # Sutton & Barto (2018), Section 12.10: with lambda = 0 Watkins's Q(lambda)
    # is one-step Q-learning (Eq. 6.8).
    transitions = random_transitions(seed, 150, n_states, n_actions, masks=use_masks)
    q = QLearning(n_states, n_actions, gamma=0.9, step_size=0.3, seed=0)
    lam = WatkinsQLambda(n_states, n_actions, lam=0.0, trace=trace, gamma=0.9, step_size=0.3,
                         seed=0)
    feed(q, transitions)
    feed(lam, transitions)
    np.testing.assert_allclose(lam.table, q.table, rtol=0, atol=1e-12)


# ----------------------------------------------------------------- dense references
def dense_sarsa_lambda(records, shape, gamma, lam, alpha, trace):
    """Sarsa(lambda) written as the book's boxes, with full (S, A) trace arrays.

    Accumulating / replacing: Sutton & Barto (2018), Section 12.7 box
    ("Sarsa(lambda) with binary features", one-hot features). Dutch: Section
    12.8 box ("True online Sarsa(lambda)").
    """
    q = np.zeros(shape)
    z = np.zeros(shape)
    q_old = 0.0
    for s, a, r, s2, terminated, _truncated, a_next in records:
        q_sa = q[s, a]
        q_next = 0.0 if terminated else q[s2, a_next]
        delta = r + gamma * q_next - q_sa
        x = np.zeros(shape)
        x[s, a] = 1.0
        if trace == "dutch":
            z = gamma * lam * z + (1.0 - alpha * gamma * lam * (z * x).sum()) * x
            q += alpha * (delta + q_sa - q_old) * z - alpha * (q_sa - q_old) * x
            q_old = q_next
        else:
            if trace == "accumulating":
                z[s, a] += 1.0
            else:
                z[s, a] = 1.0
            q += alpha * delta * z
            z *= gamma * lam
        if terminated:
            z[:] = 0.0
            q_old = 0.0
    return q


@settings(max_examples=25)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_states=st.integers(1, 4),
    n_actions=st.integers(1, 3),
    use_masks=st.booleans(),
    trace=st.sampled_from(KINDS),
    lam=st.sampled_from([0.5, 0.9, 1.0]),
)
def test_sarsa_lambda_matches_the_dense_textbook_algorithm(
    seed, n_states, n_actions, use_masks, trace, lam
):
    # The sparse learner (trace_cutoff=0: exact) against the dense book
    # algorithm fed the actions the learner really took next; this also checks
    # that the committed A_{t+1} is the action used in the error. Episodes end
    # by termination only (a truncation's bootstrap action is never taken).
    agent = SarsaLambda(n_states, n_actions, lam=lam, trace=trace, gamma=0.9, step_size=0.3,
                        exploration=0.4, trace_cutoff=0.0, seed=seed % 991)
    stream = environment_stream(seed, 100, n_states, n_actions, use_masks, truncate_rate=0.0)
    stream[-1] = (stream[-1][0], stream[-1][1], True, *stream[-1][3:])  # end the last episode
    (records,) = run_lockstep([agent], stream)
    expected = dense_sarsa_lambda(records, (n_states, n_actions), 0.9, lam, 0.3, trace)
    np.testing.assert_allclose(agent.table, expected, rtol=1e-9, atol=1e-9)


def dense_watkins(transitions, shape, gamma, lam, alpha, trace):
    """Watkins's Q(lambda) with full trace arrays (Sutton & Barto 2018, Section 12.10).

    The trace is cut before the visited pair's trace is bumped when that
    pair's action is not greedy (ties count as greedy) under the current
    table and the mask of its state.
    """
    q = np.zeros(shape)
    z = np.zeros(shape)
    q_old = 0.0
    mask_now = None
    for s, a, r, s2, terminated, truncated, next_mask in transitions:
        if q[s, a] < masked_max(q[s], mask_now):
            z[:] = 0.0
        q_sa = q[s, a]
        q_next = 0.0 if terminated else masked_max(q[s2], next_mask)
        delta = r + gamma * q_next - q_sa
        x = np.zeros(shape)
        x[s, a] = 1.0
        if trace == "dutch":
            z = z + (1.0 - alpha * (z * x).sum()) * x  # stored traces are already decayed
            q += alpha * (delta + q_sa - q_old) * z - alpha * (q_sa - q_old) * x
        else:
            if trace == "accumulating":
                z[s, a] += 1.0
            else:
                z[s, a] = 1.0
            q += alpha * delta * z
        z *= gamma * lam
        q_old = q_next
        mask_now = next_mask
        if terminated or truncated:
            z[:] = 0.0
            q_old = 0.0
            mask_now = None
    return q


@settings(max_examples=25)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_states=st.integers(1, 4),
    n_actions=st.integers(1, 3),
    use_masks=st.booleans(),
    trace=st.sampled_from(KINDS),
    lam=st.sampled_from([0.5, 0.9, 1.0]),
)
def test_watkins_q_lambda_matches_the_dense_algorithm(
    seed, n_states, n_actions, use_masks, trace, lam
):
    transitions = random_transitions(seed, 120, n_states, n_actions, masks=use_masks)
    agent = WatkinsQLambda(n_states, n_actions, lam=lam, trace=trace, gamma=0.9, step_size=0.3,
                           trace_cutoff=0.0, seed=0)
    feed(agent, transitions)
    expected = dense_watkins(transitions, (n_states, n_actions), 0.9, lam, 0.3, trace)
    np.testing.assert_allclose(agent.table, expected, rtol=1e-9, atol=1e-9)


# ----------------------------------------------------------------- worked examples
@pytest.mark.parametrize(
    ("trace", "expected_first"),
    [
        # Episode (0,0) -> (0,0) -> terminal with reward 1, gamma = lambda = 1,
        # alpha = 1/2, one action. Step 1: delta = 0. Step 2: delta = 1 - 0 = 1.
        # accumulating: z(0) = 1 + 1 = 2 -> Q = 0.5 * 1 * 2 = 1.0
        ("accumulating", 1.0),
        # replacing: z(0) = 1 -> Q = 0.5
        ("replacing", 0.5),
        # dutch / true online (Section 12.8 box): step 1: z = 1, Q_old = Q' = 0;
        # step 2: z = (1 - 1/2) * 1 + 1 = 1.5, Q = 0 + 0.5 * (1 + 0 - 0) * 1.5 = 0.75
        ("dutch", 0.75),
    ],
)
def test_trace_kinds_on_a_revisit(trace, expected_first):
    for cls in TRACE_LEARNERS:
        agent = cls(2, 1, lam=1.0, trace=trace, gamma=1.0, step_size=0.5, seed=0)
        agent.observe(0, 0, 0.0, 0, False, False)
        agent.update()
        agent.observe(0, 0, 1.0, 1, True, False)
        agent.update()
        assert agent.table[0, 0] == pytest.approx(expected_first)


def test_watkins_cuts_the_trace_after_an_exploratory_action():
    # Q(1) = [1, 0]: action 1 is exploratory in state 1. The error of the second
    # step must not reach (0, 0) when A_1 = 1, and must when A_1 = 0
    # (Sutton & Barto 2018, Section 12.10; gamma = lambda = 1, alpha = 1/2).
    results = {}
    for a1 in (0, 1):
        agent = WatkinsQLambda(3, 2, lam=1.0, gamma=1.0, step_size=0.5, seed=0)
        agent._q[1] = [1.0, 0.0]
        agent.observe(0, 0, 0.0, 1, False, False)
        agent.update()  # delta = 0 + max Q(1) - 0 = 1: Q(0,0) = 0.5
        agent.observe(1, a1, 5.0, 2, True, False)
        agent.update()
        results[a1] = agent.table[0, 0]
    assert results[1] == pytest.approx(0.5)  # cut: only the first error
    # greedy: second error 5 - 1 = 4 reaches (0,0) with trace 1: 0.5 + 0.5 * 4
    assert results[0] == pytest.approx(2.5)


# ----------------------------------------------------------------- episode ends
@pytest.mark.parametrize("cls", TRACE_LEARNERS)
@pytest.mark.parametrize("trace", KINDS)
def test_terminated_does_not_bootstrap_and_truncated_does(cls, trace):
    # Q(1, .) = 100. Terminated: target r = 1. Truncated (a time limit): target
    # 1 + 0.9 * 100 = 91. A learner treating truncation as termination gives 1.
    for truncated, expected in ((False, 1.0), (True, 91.0)):
        agent = cls(2, 2, lam=0.9, trace=trace, gamma=0.9, step_size=1.0, exploration=0.0,
                    seed=0)
        agent._q[1] = [100.0, 100.0]
        agent.observe(0, 1, 1.0, 1, not truncated, truncated)
        agent.update()
        assert agent.table[0, 1] == pytest.approx(expected)
        assert agent.traces == {}


@pytest.mark.parametrize("cls", TRACE_LEARNERS)
@pytest.mark.parametrize("end", ["terminated", "truncated", "jump"])
def test_traces_do_not_cross_episodes(cls, end):
    agent = cls(5, 1, lam=1.0, gamma=1.0, step_size=0.5, seed=0)
    agent.observe(0, 0, 0.0, 1, end == "terminated", end == "truncated")
    agent.update()
    before = agent.table[0, 0]
    # next episode starts elsewhere (for "jump" without an end flag): its error
    # must not reach the pair of the previous episode
    agent.observe(3, 0, 7.0, 4, True, False)
    agent.update()
    assert agent.table[0, 0] == before
    assert agent.table[3, 0] == pytest.approx(3.5)


@pytest.mark.parametrize("cls", TRACE_LEARNERS)
def test_cutoff_bounds_the_active_traces(cls):
    # gamma * lambda = 0.5 and cutoff 1e-3: a replacing trace survives 9 decays
    # (0.5**9 ~ 2e-3 > 1e-3 >= 0.5**10), so after each step 9 traces are active
    # in a long episode that never revisits a pair (the O(active) guarantee).
    agent = cls(500, 1, lam=0.5, gamma=1.0, trace="replacing", trace_cutoff=1e-3, seed=0)
    peak = 0
    for t in range(400):
        agent.observe(t, 0, 1.0, t + 1, False, False)
        agent.update()
        peak = max(peak, len(agent.traces))
    assert peak == 9


# ----------------------------------------------------------------- convergence
def eps_soft_optimal_q(mdp, eps):
    """Action values of the best epsilon-greedy policy.

    An epsilon-greedy agent that intends action a takes it with probability
    1 - eps + eps/|A|: the optimal values of the model with
    P_eps(s, a) = (1 - eps) P(s, a) + eps * mean_b P(s, b) (and the same mix
    of rewards) are the values V_eps of the best epsilon-soft policy (Sutton &
    Barto 2018, Section 5.4), and Q_eps(s, a) = R(s, a) + gamma P(s, a) V_eps
    is the fixed point Sarsa with that fixed epsilon approaches.
    """
    P = mdp.P
    R = mdp.R
    soft = FiniteMDP(
        (1 - eps) * P + eps * P.mean(axis=1, keepdims=True),
        (1 - eps) * R + eps * R.mean(axis=1, keepdims=True),
        gamma=mdp.gamma,
    )
    return action_values(mdp, value_iteration(soft).v)


@pytest.mark.parametrize("trace", KINDS)
@pytest.mark.parametrize("cls", TRACE_LEARNERS)
def test_trace_learners_converge_on_a_small_garnet(cls, trace):
    """Q* (Watkins, off-policy) and the epsilon-greedy optimum (Sarsa, on-policy).

    Garnet MDP (Archibald et al. 1995): 5 states, 2 actions, 2 successors,
    rewards in [0, 1), gamma 0.8; episodes of 40 steps end by truncation (so
    they bootstrap) and restart uniformly. Step size 1/n(s,a)^0.8.

    Tolerance 0.1 (values are about 2.5 to 5), from an order-of-magnitude
    estimate rather than tuning: after T = 30,000 steps the rarest pair is
    updated n >= T / 5 * 0.1 = 600 times (Sarsa's non-greedy action with
    epsilon 0.2), where alpha = n^-0.8 ~ 0.006. The noise of the one-step
    target has standard deviation <= gamma * (max V - min V) / 2 ~ 0.6, so the
    stationary noise of Q is about sqrt(alpha / 2) * 0.6 ~ 0.03; the remaining
    bias decays like exp(-(1 - c) sum_k alpha_k) with sum_k alpha_k ~ 17 and
    the lambda-return contraction c = gamma (1 - lambda) / (1 - gamma lambda)
    = 0.44, i.e. below 1e-3 of the initial error. Three noise standard
    deviations stay inside 0.1.
    """
    mdp = garnet(5, 2, 2, gamma=0.8, seed=3)
    if cls is WatkinsQLambda:
        exploration, target = 0.5, value_iteration(mdp).q
    else:
        exploration = 0.2
        target = eps_soft_optimal_q(mdp, exploration)
    agent = cls(5, 2, lam=0.8, trace=trace, gamma=0.8, step_size=VisitCount(0.8),
                exploration=exploration, seed=1)
    tdkit.train(agent, mdp.to_env(max_episode_steps=40), steps=30_000, seed=2)
    assert np.abs(agent.table - target).max() < 0.1


# ----------------------------------------------------------------- behaviour basics


@pytest.mark.parametrize("cls", TRACE_LEARNERS)
def test_masked_actions_never_enter_the_error(cls):
    mask = np.array([False, True])
    for seed in range(10):
        agent = cls(3, 2, lam=0.5, gamma=1.0, step_size=1.0, exploration=1.0, seed=seed)
        agent._q[2] = [1000.0, 3.0]
        agent.observe(0, 0, 1.0, 2, False, False, next_mask=mask)
        agent.update()
        assert agent.table[0, 0] == pytest.approx(4.0)


@pytest.mark.parametrize("cls", TRACE_LEARNERS)
@pytest.mark.parametrize(
    ("kwargs", "name"),
    [
        ({"lam": -0.1}, "lam"),
        ({"lam": 1.5}, "lam"),
        ({"lam": "0.5"}, "lam"),
        ({"trace": "eligible"}, "trace"),
        ({"trace": None}, "trace"),
        ({"trace_cutoff": -1e-9}, "trace_cutoff"),
        ({"trace_cutoff": 1.0}, "trace_cutoff"),
        ({"gamma": 2.0}, "gamma"),
    ],
)
def test_bad_hyper_parameters_are_rejected_naming_them(cls, kwargs, name):
    with pytest.raises(ValueError, match=name) as info:
        cls(3, 2, **kwargs)
    assert cls.__name__ in str(info.value) and repr(next(iter(kwargs.values()))) in str(
        info.value
    )


def test_params_and_repr_report_trace_settings():
    agent = SarsaLambda(3, 2, lam=0.7, trace="dutch")
    params = agent.get_params()
    assert (params["lam"], params["trace"], params["trace_cutoff"]) == (0.7, "dutch", 1e-8)
    assert "lam=0.7" in repr(WatkinsQLambda(3, 2, lam=0.7))


def test_sarsa_lambda_commits_the_action_used_in_its_error():
    for seed in range(30):
        agent = SarsaLambda(2, 3, lam=0.5, gamma=1.0, step_size=1.0, exploration=1.0, seed=seed)
        agent._q[1] = [10.0, 20.0, 30.0]
        agent.observe(0, 0, 0.0, 1, False, False)
        (delta,) = agent.update()
        assert agent.act(1) == round(delta / 10.0) - 1


@pytest.mark.parametrize("cls", TRACE_LEARNERS)
def test_same_seed_same_run(cls):
    def run(seed):
        agent = cls(5, 3, exploration=0.5, seed=seed)
        (records,) = run_lockstep([agent], environment_stream(4, 300, 5, 3, True))
        return [r[1] for r in records], agent.table.copy()

    a1, t1 = run(3)
    a2, t2 = run(3)
    assert a1 == a2
    np.testing.assert_array_equal(t1, t2)

"""n-step SARSA and Tree Backup: equivalences, flushing, published behaviour, validation."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import tdkit
from tdkit.dp import evaluate_policy
from tdkit.envs.problems import random_walk
from tdkit.learners import ExpectedSarsa, NStepSarsa, QLearning, Sarsa, TreeBackup
from tdkit.testing.streams import feed, random_transitions

N_STEP = [NStepSarsa, TreeBackup]


# ----------------------------------------------------------------- helpers
def run_lockstep(agents, seed, steps, n_states, n_actions, use_masks, act_first_rate):
    """Drive several agents through the same random environment with act/observe/update.

    The environment (next states, rewards, ends, masks) comes from its own
    generator, so it is identical for every agent; each agent picks its own
    actions. With probability ``act_first_rate`` a step calls ``act(next_obs)``
    before ``update()`` (and that action is the one taken next). Returns the
    actions each agent took.
    """
    env_rng = np.random.default_rng(seed)
    actions = [[] for _ in agents]
    upcoming = [None] * len(agents)
    s = 0
    mask = None
    for _ in range(steps):
        s2 = int(env_rng.integers(n_states))
        r = float(env_rng.normal())
        terminated = bool(env_rng.random() < 0.1)
        truncated = not terminated and bool(env_rng.random() < 0.05)
        next_mask = None
        if use_masks:
            next_mask = env_rng.random(n_actions) < 0.6
            next_mask[int(env_rng.integers(n_actions))] = True
        act_first = bool(env_rng.random() < act_first_rate)
        for i, agent in enumerate(agents):
            a = upcoming[i] if upcoming[i] is not None else agent.act(s, mask=mask)
            upcoming[i] = None
            actions[i].append(a)
            agent.observe(s, a, r, s2, terminated, truncated, next_mask=next_mask)
            if act_first and not (terminated or truncated):
                upcoming[i] = agent.act(s2, mask=next_mask)
            agent.update()
        if terminated or truncated:
            s, mask = int(env_rng.integers(n_states)), None
        else:
            s, mask = s2, next_mask
    return actions


# ----------------------------------------------------------------- equivalences
@settings(max_examples=40)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_states=st.integers(1, 5),
    n_actions=st.integers(1, 4),
    use_masks=st.booleans(),
    act_first_rate=st.sampled_from([0.0, 0.5]),
    step_size=st.sampled_from([0.1, 0.5, 1.0, tdkit.schedules.VisitCount(0.8)]),
)
def test_n_step_sarsa_with_n_1_is_sarsa(
    seed, n_states, n_actions, use_masks, act_first_rate, step_size
):
    # Sutton & Barto (2018), Section 7.2: with n = 1 the n-step return is the
    # one-step SARSA target (Eq. 7.4 reduces to Eq. 6.7). Same seed, same
    # environment stream: the same actions and the same tables.
    kwargs = dict(gamma=0.9, step_size=step_size, exploration=0.3, seed=seed % 1000)
    sarsa = Sarsa(n_states, n_actions, **kwargs)
    nstep = NStepSarsa(n_states, n_actions, n=1, **kwargs)
    actions = run_lockstep([sarsa, nstep], seed, 120, n_states, n_actions, use_masks,
                           act_first_rate)
    assert actions[0] == actions[1]
    np.testing.assert_allclose(nstep.table, sarsa.table, rtol=0, atol=1e-12)
    np.testing.assert_array_equal(nstep.visits, sarsa.visits)


@settings(max_examples=40)
@given(
    seed=st.integers(0, 2**32 - 1),
    n_states=st.integers(1, 5),
    n_actions=st.integers(1, 4),
    use_masks=st.booleans(),
)
def test_tree_backup_with_n_1_is_q_learning_and_greedy_expected_sarsa(
    seed, n_states, n_actions, use_masks
):
    # Sutton & Barto (2018), Section 7.5: one-step tree backup is Expected
    # SARSA with the target policy; a greedy target policy makes it Q-learning.
    transitions = random_transitions(seed, 150, n_states, n_actions, masks=use_masks)
    kwargs = dict(gamma=0.9, step_size=0.4, seed=0)
    tree = TreeBackup(n_states, n_actions, n=1, exploration=0.3, **kwargs)
    q = QLearning(n_states, n_actions, exploration=0.3, **kwargs)
    expected = ExpectedSarsa(n_states, n_actions, exploration=0.0, **kwargs)
    for agent in (tree, q, expected):
        feed(agent, transitions)
    np.testing.assert_allclose(tree.table, q.table, rtol=0, atol=1e-12)
    np.testing.assert_allclose(tree.table, expected.table, rtol=0, atol=1e-12)


@settings(max_examples=25)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(1, 6))
def test_n_step_methods_agree_when_there_is_one_action(seed, n):
    # With a single action every policy is the same, so n-step SARSA, its
    # off-policy form (all ratios 1) and Tree Backup (pi(A_k) = 1) give the
    # same n-step return (Sutton & Barto 2018, Eqs. 7.4, 7.11 and 7.16).
    transitions = random_transitions(seed, 120, 4, 1, masks=False)
    agents = [
        NStepSarsa(4, 1, n=n, gamma=0.8, step_size=0.3, seed=0),
        NStepSarsa(4, 1, n=n, off_policy=True, gamma=0.8, step_size=0.3, seed=0),
        TreeBackup(4, 1, n=n, gamma=0.8, step_size=0.3, seed=0),
    ]
    for agent in agents:
        feed(agent, transitions)
    for other in agents[1:]:
        np.testing.assert_allclose(other.table, agents[0].table, rtol=0, atol=1e-12)


@pytest.mark.parametrize("cls", N_STEP)
@pytest.mark.parametrize("n", [1, 2, 3, 5])
@pytest.mark.parametrize("end", ["terminated", "truncated"])
def test_flush_at_episode_end_terminated_vs_truncated(cls, n, end):
    # A 4-step chain 0 -> 1 -> 2 -> 3 -> 4 with rewards 1, 2, 3, 4, gamma 0.5,
    # alpha 1, one action, and Q(4) = 100. The flushed updates stop at the last
    # reward after `terminated` and add gamma^k * Q(4) after `truncated`
    # (Sutton & Barto 2018, Section 7.2; the time limit is not a terminal
    # state). Treating truncation as termination would miss the 100s.
    gamma = 0.5
    agent = cls(6, 1, n=n, gamma=gamma, step_size=1.0, seed=0)
    agent._q[4, 0] = 100.0
    rewards = [1.0, 2.0, 3.0, 4.0]
    errors = []
    for t, r in enumerate(rewards):
        last = t == len(rewards) - 1
        agent.observe(t, 0, r, t + 1, last and end == "terminated", last and end == "truncated")
        errors.extend(agent.update())
    assert len(errors) == 4
    # Returns completed during the episode bootstrap from Q(t + n) = 0 (not yet
    # updated); the flushed ones from the end: 100 if truncated, nothing if terminated.
    expected = []
    for tau in range(4):
        end_i = min(tau + n, 4)
        g = sum(gamma ** (i - tau) * rewards[i] for i in range(tau, end_i))
        if end_i == 4 and end == "truncated":
            g += gamma ** (4 - tau) * 100.0
        expected.append(g)
    np.testing.assert_allclose(agent.table[:4, 0], expected, rtol=1e-12)
    assert agent._buffer == type(agent._buffer)()  # nothing left behind


@pytest.mark.parametrize("cls", N_STEP)
def test_updates_are_delayed_by_n_minus_1_steps(cls):
    agent = cls(10, 1, n=3, gamma=1.0, step_size=1.0, seed=0)
    counts = []
    for t in range(6):
        agent.observe(t, 0, 1.0, t + 1, t == 5, False)
        counts.append(len(agent.update()))
    # steps 0 and 1 complete nothing; steps 2..4 complete one return each; the
    # terminal step completes one and flushes the last two (n - 1 = 2).
    assert counts == [0, 0, 1, 1, 1, 3]
    assert agent.update() == ()


@pytest.mark.parametrize("cls", N_STEP)
def test_a_jump_without_episode_end_flushes_as_truncation(cls):
    # The stream restarts in another state without terminated/truncated (e.g.
    # a loop cut by a step budget): the pending returns bootstrap from the last
    # next state, as after a time limit, and do not mix episodes.
    agent = cls(10, 1, n=4, gamma=1.0, step_size=1.0, seed=0)
    agent._q[2, 0] = 10.0
    agent.observe(0, 0, 1.0, 1, False, False)
    agent.update()
    agent.observe(1, 0, 1.0, 2, False, False)
    assert agent.update() == ()
    agent.observe(7, 0, 0.0, 8, True, False)  # new episode starts in state 7
    errors = agent.update()
    assert len(errors) == 3
    np.testing.assert_allclose(agent.table[[0, 1, 7], 0], [12.0, 11.0, 0.0])


def test_n_step_sarsa_bootstraps_with_the_action_it_commits():
    # Q(s_n, .) takes distinct values, so the completed return tells which
    # A_{t+n} it used; the next act(s_n) must return that same action.
    for seed in range(30):
        agent = NStepSarsa(4, 3, n=2, gamma=1.0, step_size=1.0, exploration=1.0, seed=seed)
        agent._q[2] = [10.0, 20.0, 30.0]
        agent.observe(0, 0, 0.0, 1, False, False)
        agent.update()
        agent.observe(1, 0, 0.0, 2, False, False)
        (delta,) = agent.update()
        assert agent.act(2) == round(delta / 10.0) - 1


def test_off_policy_n_step_sarsa_importance_ratio():
    # Sutton & Barto (2018), Eq. 7.11: rho = prod pi(A_k|S_k) / b(A_k|S_k) over
    # k = tau+1 .. min(tau+n, T-1). Behaviour: epsilon-greedy, epsilon 0.5, two
    # actions: b(greedy) = 0.75, b(other) = 0.25. Target: greedy.
    def run(second_action):
        agent = NStepSarsa(3, 2, n=2, off_policy=True, gamma=1.0, step_size=0.5,
                           exploration=0.5, seed=0)
        agent._q[1] = [1.0, 0.0]  # greedy action in state 1 is 0
        agent.observe(0, 0, 1.0, 1, False, False)
        agent.update()
        agent.observe(1, second_action, 2.0, 2, True, False)
        return agent, agent.update()

    agent, errors = run(0)  # greedy second action: rho = 1 / 0.75
    # tau = 0: G = 1 + 2 = 3, Q = 0, weighted error 4/3 * 3 = 4, Q(0,0) = 0.5 * 4 = 2
    # tau = 1: rho = 1 (empty product), G = 2, Q(1,0) = 1 -> error 1, Q = 1.5
    assert errors == pytest.approx((4.0, 1.0))
    assert agent.table[0, 0] == pytest.approx(2.0)
    agent, errors = run(1)  # exploratory second action: rho = 0, no update of Q(0, 0)
    assert errors[0] == 0.0
    assert agent.table[0, 0] == 0.0 and agent.visits[0, 0] == 0


def test_tree_backup_weights_the_taken_action_by_the_greedy_policy():
    # Sutton & Barto (2018), Eq. 7.16 with n = 2, gamma = 1, alpha = 1.
    # Q(1) = [5, 1]. If A_1 = 1 (not greedy): pi(A_1) = 0, so G = R_1 + max Q(1) = 0 + 5.
    # If A_1 = 0 (greedy): G = R_1 + R_2 (the tree follows the taken action) = 0 + 7.
    for a1, expected in ((1, 5.0), (0, 7.0)):
        agent = TreeBackup(3, 2, n=2, gamma=1.0, step_size=1.0, seed=0)
        agent._q[1] = [5.0, 1.0]
        agent.observe(0, 0, 0.0, 1, False, False)
        agent.update()
        agent.observe(1, a1, 7.0, 2, True, False)
        agent.update()
        assert agent.table[0, 0] == pytest.approx(expected)


def test_masked_actions_never_enter_the_targets():
    # The masked action of state 2 holds a huge value; it must be ignored by the
    # Tree Backup expectation / max and never be the committed SARSA action.
    mask = np.array([False, True])
    tree = TreeBackup(3, 2, n=1, gamma=1.0, step_size=1.0, seed=0)
    tree._q[2] = [1000.0, 3.0]
    tree.observe(0, 0, 1.0, 2, False, False, next_mask=mask)
    tree.update()
    assert tree.table[0, 0] == pytest.approx(4.0)
    for seed in range(20):
        sarsa = NStepSarsa(3, 2, n=1, gamma=1.0, step_size=1.0, exploration=1.0, seed=seed)
        sarsa._q[2] = [1000.0, 3.0]
        sarsa.observe(0, 0, 1.0, 2, False, False, next_mask=mask)
        sarsa.update()
        assert sarsa.table[0, 0] == pytest.approx(4.0)
        assert sarsa.act(2, mask=mask) == 1


@pytest.mark.parametrize("cls", N_STEP)
@pytest.mark.parametrize("n", [0, -1, 2.5, True, "3"])
def test_bad_n_is_rejected_naming_it(cls, n):
    with pytest.raises(ValueError, match=r"\bn must be an integer >= 1; got") as info:
        cls(3, 2, n=n)
    assert cls.__name__ in str(info.value)


def test_bad_off_policy_flag_and_shared_parameters_are_rejected():
    with pytest.raises(ValueError, match="off_policy"):
        NStepSarsa(3, 2, off_policy="yes")
    with pytest.raises(ValueError, match="gamma"):
        TreeBackup(3, 2, gamma=1.5)
    with pytest.raises(ValueError, match="step_size"):
        NStepSarsa(3, 2, step_size=0.0)


def test_params_report_algorithm_specific_keywords():
    assert NStepSarsa(3, 2, n=5, off_policy=True).get_params()["n"] == 5
    assert NStepSarsa(3, 2, off_policy=True).get_params()["off_policy"] is True
    assert TreeBackup(3, 2, n=7).get_params()["n"] == 7
    assert "n=7" in repr(TreeBackup(3, 2, n=7))


@pytest.mark.parametrize("cls", N_STEP)
def test_same_seed_same_run(cls):
    def run(seed):
        agent = cls(5, 3, n=3, exploration=0.5, seed=seed)
        actions = run_lockstep([agent], 5, 300, 5, 3, True, 0.0)[0]
        return actions, agent.table.copy()

    a1, t1 = run(3)
    a2, t2 = run(3)
    assert a1 == a2
    np.testing.assert_array_equal(t1, t2)


# ----------------------------------------------------------------- published behaviour
def test_intermediate_n_is_best_on_the_19_state_random_walk():
    """Shape of Sutton & Barto (2018), Figure 7.2 (Example 7.1).

    19-state random walk, rewards -1 (left) and +1 (right), gamma = 1, values
    start at 0; the error of a run is the RMS error over the 19 states averaged
    over the first 10 episodes. In the figure an intermediate n (4) beats both
    n = 1 and large n at their best step sizes. With one action, n-step SARSA
    is exactly n-step TD on this Markov reward process.

    Margin (derived, not tuned): all n see the same episodes in each run, so the
    per-run differences D = err(n=4) - err(other) are paired; we require
    mean(D) < -3 * SE(D). If the true mean difference were 0 the test would
    pass with probability ~0.13% (normal approximation of a mean of 50 runs).
    The observed gaps are far larger than the margin (about 15 SE), so a
    correct learner does not fail by bad luck.
    """
    mdp = random_walk(19, left_reward=-1.0)  # terminal ends are states 0 and 20
    true = evaluate_policy(mdp, [0] * 21)[1:20]
    # Example 7.1: true values -18/20, ..., 18/20 (a check of the model we use)
    np.testing.assert_allclose(true, np.arange(-18, 19, 2) / 20.0, atol=1e-12)
    runs = 50
    env_episodes = []
    for run in range(runs):
        rng = np.random.default_rng(10_000 + run)
        episodes = []
        for _ in range(10):
            s, episode = 10, []
            while True:
                s2 = s + (1 if rng.random() < 0.5 else -1)
                done = s2 in (0, 20)
                episode.append((s, 0, (1.0 if s2 == 20 else -1.0) if done else 0.0, s2, done,
                                False))
                s = s2
                if done:
                    break
            episodes.append(episode)
        env_episodes.append(episodes)

    def errors(n, alpha):
        out = np.empty(runs)
        for run in range(runs):
            agent = NStepSarsa(21, 1, n=n, gamma=1.0, step_size=alpha, seed=0)
            total = 0.0
            for episode in env_episodes[run]:
                for transition in episode:
                    agent.observe(*transition)
                    agent.update()
                total += np.sqrt(np.mean((agent.table[1:20, 0] - true) ** 2))
            out[run] = total / 10
        return out

    alphas = (0.1, 0.2, 0.4, 0.8)
    best = {}
    for n in (1, 4, 64):
        per_alpha = [errors(n, alpha) for alpha in alphas]
        best[n] = min(per_alpha, key=np.mean)
    for other in (1, 64):
        diff = best[4] - best[other]
        se = diff.std(ddof=1) / np.sqrt(runs)
        assert diff.mean() < -3 * se, (other, diff.mean(), se)

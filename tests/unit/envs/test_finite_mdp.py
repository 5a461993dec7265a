"""FiniteMDP: validation, the dense and sparse forms, gymnasium import and to_env.

External references used here: gymnasium's own toy-text environments
(FrozenLake-v1, CliffWalking-v1, Taxi-v4) and their ``step``; scipy.stats for
chi-square quantiles; gymnasium.utils.env_checker.check_env.
"""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest
from gymnasium.utils.env_checker import check_env
from hypothesis import given, settings
from scipy import stats

from tdkit._errors import EnvironmentProtocolError, InvalidParameterError
from tdkit.dp import evaluate_policy, value_iteration
from tdkit.envs.finite import FiniteMDP
from tdkit.envs.model_env import FiniteMDPEnv
from tdkit.envs.problems import cliff_walking, garnet, gridworld_4x4
from tdkit.testing.strategies import finite_mdps


def _make(env_id: str, **kwargs):
    """gymnasium.make, falling back to the previous version of an id (Taxi-v4 -> v3)."""
    try:
        return gym.make(env_id, **kwargs)
    except gym.error.Error:
        name, version = env_id.rsplit("-v", 1)
        return gym.make(f"{name}-v{int(version) - 1}", **kwargs)


def _starting_at(mdp, state):
    """The same model with every episode starting in ``state``."""
    nxt, probs, rewards = mdp.successors
    start = np.zeros(mdp.n_states)
    start[state] = 1.0
    return FiniteMDP.from_successors(
        nxt, probs, rewards, gamma=mdp.gamma, terminal=mdp.terminal, initial=start
    )


def _chain(p=0.25):
    """Two states; action 0 stays with reward 0, action 1 moves to the terminal state 1."""
    P = np.zeros((2, 2, 2))
    P[0, 0, 0] = 1.0
    P[0, 1] = [p, 1 - p]
    P[1, :, 1] = 1.0
    R = np.array([[0.0, 1.0], [0.0, 0.0]])
    return P, R


# ---------------------------------------------------------------- validation
@pytest.mark.parametrize(
    ("kwargs", "fragments"),
    [
        ({"P": np.ones((2, 2)), "R": np.zeros((2, 2))}, ["P must have shape (S, A, S)", "(2, 2)"]),
        ({"P": np.ones((2, 1, 3)) / 3, "R": np.zeros((2, 1))}, ["(S, A, S)", "(2, 1, 3)"]),
        ({"R": np.zeros((3, 2))}, ["R must have shape", "(3, 2)"]),
        ({"gamma": 1.5}, ["gamma must be in [0, 1]", "1.5"]),
        ({"gamma": -0.1}, ["gamma", "-0.1"]),
        ({"terminal": [True]}, ["terminal", "(2,)", "(1,)"]),
        ({"terminal": [2, 0]}, ["terminal must hold booleans"]),
        ({"initial": [0.5, 0.4]}, ["initial sums to 0.9"]),
        ({"initial": [1.5, -0.5]}, ["initial[1] = -0.5 is negative"]),
        ({"initial": [0.0, 1.0], "terminal": [False, True]}, ["terminal state 1"]),
        ({"terminal": [True, True]}, ["every state is terminal"]),
        ({"R": [[np.nan, 0.0], [0.0, 0.0]]}, ["R[0, 0] = nan is not finite"]),
    ],
)
def test_invalid_arguments_name_parameter_and_value(kwargs, fragments):
    P, R = _chain()
    args = {"P": P, "R": R, "gamma": 0.9, **kwargs}
    with pytest.raises(InvalidParameterError) as info:
        FiniteMDP(args.pop("P"), args.pop("R"), **args)
    for fragment in fragments:
        assert fragment in str(info.value)


def test_negative_probability_names_state_action_and_next_state():
    P, R = _chain()
    P[0, 1] = [1.2, -0.2]
    with pytest.raises(ValueError, match=r"P\[0, 1, 1\] = -0.2.*state 0, action 1, next state 1"):
        FiniteMDP(P, R, gamma=0.9)


def test_unnormalised_row_names_state_action_and_sum():
    P, R = _chain()
    P[0, 1] = [0.5, 0.4]
    with pytest.raises(InvalidParameterError, match=r"state 0, action 1\) sums to 0.9"):
        FiniteMDP(P, R, gamma=0.9)


def test_rows_within_tolerance_are_renormalised():
    P, R = _chain()
    P[0, 1] = [0.25, 0.75 + 1e-10]
    mdp = FiniteMDP(P, R, gamma=0.9)
    assert mdp.P[0, 1].sum() == pytest.approx(1.0, abs=1e-15)


@pytest.mark.parametrize(
    ("nxt", "probs", "rewards", "fragment"),
    [
        ([[[0, 2]]], [[[0.5, 0.5]]], [[0.0]], "next_states[0, 0, 1] = 2 is out of range"),
        ([[[0.0, 0.0]]], [[[0.5, 0.5]]], [[0.0]], "must hold integers"),
        ([[[0, 0]]], [[[0.5, 0.5, 0.0]]], [[0.0]], "probs must have shape"),
        ([[[0, 0]]], [[[0.5, 0.6]]], [[0.0]], "state 0, action 0) sums to 1.1"),
        ([[[0, 0]]], [[[0.5, 0.5]]], [[0.0, 1.0]], "rewards must have shape"),
    ],
)
def test_successor_form_validation(nxt, probs, rewards, fragment):
    with pytest.raises(InvalidParameterError) as info:
        FiniteMDP.from_successors(np.array(nxt), probs, rewards, gamma=0.5)
    assert fragment in str(info.value)


def test_arrays_are_read_only():
    P, R = _chain()
    for mdp in (FiniteMDP(P, R, gamma=0.9), FiniteMDP(P, R, gamma=0.9).to_sparse()):
        for array in (mdp.P, mdp.R, mdp.terminal, mdp.initial, *mdp.successors):
            with pytest.raises(ValueError, match="read-only"):
                array[(0,) * array.ndim] = 1


def test_inputs_are_copied():
    P, R = _chain()
    mdp = FiniteMDP(P, R, gamma=0.9)
    P[0, 0, 0] = 7.0
    R[0, 0] = 7.0
    assert mdp.P[0, 0, 0] == 1.0
    assert mdp.R[0, 0] == 0.0


def test_terminal_rows_become_zero_reward_self_loops():
    # A terminal row may be anything (here all zeros, with a reward): it is replaced.
    P, R = _chain()
    P[1] = 0.0
    R[1] = 5.0
    mdp = FiniteMDP(P, R, gamma=0.9, terminal=[False, True])
    np.testing.assert_array_equal(mdp.P[1], [[0.0, 1.0], [0.0, 1.0]])
    np.testing.assert_array_equal(mdp.R[1], [0.0, 0.0])
    np.testing.assert_array_equal(mdp.initial, [1.0, 0.0])  # uniform over non-terminal


def test_per_transition_rewards_give_expected_rewards():
    P, _ = _chain(p=0.25)
    R3 = np.zeros((2, 2, 2))
    R3[0, 1] = [4.0, 8.0]
    mdp = FiniteMDP(P, R3, gamma=0.9)
    assert mdp.R[0, 1] == pytest.approx(0.25 * 4 + 0.75 * 8)
    nxt, probs, rewards = mdp.successors
    triples = zip(nxt[0, 1], probs[0, 1], rewards[0, 1], strict=True)
    slots = {int(n): float(r) for n, p, r in triples if p > 0}
    assert slots == {0: 4.0, 1: 8.0}


def test_expected_next_matches_explicit_sum():
    mdp = garnet(7, 3, 4, seed=5)
    v = np.random.default_rng(0).normal(size=7)
    explicit = np.array(
        [[sum(mdp.P[s, a, t] * v[t] for t in range(7)) for a in range(3)] for s in range(7)]
    )
    np.testing.assert_allclose(mdp.expected_next(v), explicit, rtol=0, atol=1e-13)
    np.testing.assert_allclose(mdp.to_dense().expected_next(v), explicit, rtol=0, atol=1e-13)


@settings(max_examples=60, deadline=None)
@given(finite_mdps(n_states=(1, 6), n_actions=(1, 3), gamma=(0.0, 0.99)))
def test_dense_and_sparse_forms_agree(mdp):
    """Property (issue 3): the two forms give the same model and the same answers."""
    other = mdp.to_dense() if mdp.is_sparse else mdp.to_sparse()
    assert other.is_sparse != mdp.is_sparse
    np.testing.assert_allclose(other.P, mdp.P, atol=1e-14)
    np.testing.assert_allclose(other.R, mdp.R, atol=1e-12)
    np.testing.assert_array_equal(other.terminal, mdp.terminal)
    np.testing.assert_allclose(other.initial, mdp.initial, atol=1e-15)
    v = np.linspace(-3.0, 5.0, mdp.n_states)
    np.testing.assert_allclose(other.expected_next(v), mdp.expected_next(v), atol=1e-12)
    a, b = value_iteration(mdp, tol=1e-8), value_iteration(other, tol=1e-8)
    np.testing.assert_allclose(a.v, b.v, atol=1e-8)


def test_sparse_form_with_repeated_and_padded_slots_matches_dense():
    # Splitting each successor into repeated slots and adding zero-probability
    # padding must not change the model.
    mdp = garnet(6, 2, 3, seed=2)
    nxt, probs, _ = mdp.successors
    split = FiniteMDP.from_successors(
        np.concatenate([nxt, nxt, np.zeros_like(nxt)], axis=2),
        np.concatenate([probs / 2, probs / 2, np.zeros_like(probs)], axis=2),
        mdp.R,
        gamma=mdp.gamma,
    )
    np.testing.assert_allclose(split.P, mdp.P, atol=1e-15)
    np.testing.assert_allclose(value_iteration(split).v, value_iteration(mdp).v, atol=1e-9)


def test_sparse_model_too_large_for_dense_form_says_so():
    mdp = garnet(20_000, 1, 2, seed=0)
    with pytest.raises(InvalidParameterError, match=r"Use mdp\.successors"):
        _ = mdp.P


def test_with_gamma_shares_the_model():
    mdp = gridworld_4x4()
    other = mdp.with_gamma(0.5)
    assert other.gamma == 0.5 and mdp.gamma == 1.0
    assert np.shares_memory(other.successors[1], mdp.successors[1])
    with pytest.raises(InvalidParameterError, match="gamma"):
        mdp.with_gamma(2)


# ---------------------------------------------------------------- gymnasium import
def _frozen_lake(map_name: str, slippery: bool = True):
    return gym.make("FrozenLake-v1", map_name=map_name, is_slippery=slippery)


@pytest.mark.parametrize("map_name", ["4x4", "8x8"])
def test_frozen_lake_terminal_and_start_states_match_the_map(map_name):
    env = _frozen_lake(map_name)
    mdp = FiniteMDP.from_gymnasium(env, gamma=0.95)
    desc = env.unwrapped.desc.ravel()
    assert mdp.n_states == desc.size and mdp.n_actions == 4  # no sink state needed
    np.testing.assert_array_equal(mdp.terminal, np.isin(desc, [b"H", b"G"]))
    np.testing.assert_array_equal(mdp.initial, (desc == b"S").astype(float))
    assert mdp.gamma == 0.95


def _chi_square_check(env, mdp, pairs, n_samples, seed, alpha=1e-3):
    """Chi-square goodness of fit of gymnasium's own step against the model, per pair.

    For every tested (s, a), ``env.unwrapped.s`` is set to s and ``step(a)`` is
    sampled ``n_samples`` times. Each sample must be an outcome the model has
    (same reward and same termination flag, exactly); the counts are compared
    with the model probabilities by Pearson's chi-square statistic with
    (support - 1) degrees of freedom. Threshold (derived, not tuned): under
    the null hypothesis "the model is gymnasium's distribution" the statistic
    is asymptotically chi-square, so with a Bonferroni split of alpha over the
    m pairs, P(any pair exceeds chi2.isf(alpha / m, df)) <= alpha = 1e-3.
    The smallest model probability in these envs is 0.1 (Taxi rain), so the
    expected counts are >= 0.1 * n_samples >= 40, where the asymptotic law is
    accurate (common practice: expected counts >= 5).

    Returns the largest ratio statistic / threshold (< 1 means pass).
    """
    base = env.unwrapped
    base.reset(seed=seed)
    nxt, probs, rewards = mdp.successors
    sink = mdp.n_states - 1 if mdp.n_states > base.observation_space.n else None
    worst = 0.0
    for s, a in pairs:
        support: dict[tuple[int, float], float] = {}
        for t, p, r in zip(nxt[s, a], probs[s, a], rewards[s, a], strict=True):
            if p > 0:
                support[(int(t), float(r))] = support.get((int(t), float(r)), 0.0) + p
        counts = dict.fromkeys(support, 0)
        for _ in range(n_samples):
            base.s = s
            obs, reward, terminated, _, _ = base.step(a)
            target = sink if (terminated and sink is not None) else int(obs)
            outcome = (target, float(reward))
            assert outcome in support, f"gymnasium gave {outcome} from ({s}, {a})"
            assert terminated == bool(mdp.terminal[target])
            counts[outcome] += 1
        observed = np.array([counts[o] for o in support], dtype=float)
        expected = n_samples * np.array([support[o] for o in support])
        if len(support) == 1:
            continue  # every sample landed on the single outcome: checked exactly above
        statistic = float(((observed - expected) ** 2 / expected).sum())
        threshold = stats.chi2.isf(alpha / len(pairs), len(support) - 1)
        worst = max(worst, statistic / threshold)
    return worst


def _live_pairs(mdp):
    live = np.flatnonzero(~mdp.terminal)
    return [(int(s), a) for s in live for a in range(mdp.n_actions)]


@pytest.mark.parametrize("map_name", ["4x4", "8x8"])
def test_frozen_lake_one_step_distribution_matches_gymnasium_step(map_name):
    env = _frozen_lake(map_name)
    mdp = FiniteMDP.from_gymnasium(env)
    assert _chi_square_check(env, mdp, _live_pairs(mdp), n_samples=400, seed=11) < 1.0


def test_chi_square_check_detects_a_wrong_model():
    # Power check: the slippery model against the non-slippery env must fail.
    mdp = FiniteMDP.from_gymnasium(_frozen_lake("4x4", slippery=True))
    wrong_env = _frozen_lake("4x4", slippery=False)
    with pytest.raises(AssertionError):
        # The non-slippery env hits a single outcome; the check either sees an
        # impossible outcome or a huge statistic.
        assert _chi_square_check(wrong_env, mdp, [(0, 2), (1, 2), (6, 1)], 400, 0) < 1.0


def test_taxi_adds_a_sink_state_and_matches_gymnasium():
    env = _make("Taxi-v4")
    mdp = FiniteMDP.from_gymnasium(env, gamma=0.9)
    # A drop-off ends the episode in a state that other moves enter without
    # ending it, so termination needs the extra sink with index 500.
    assert mdp.n_states == 501
    assert np.flatnonzero(mdp.terminal).tolist() == [500]
    assert mdp.initial[500] == 0.0
    np.testing.assert_allclose(mdp.initial[:500], env.unwrapped.initial_state_distrib)
    # Taxi is deterministic: the greedy policy of the exact solution, run in
    # gymnasium's env, earns exactly v*(s0) (discounted) from every start.
    sol = value_iteration(mdp, tol=1e-10)
    base = env.unwrapped
    for seed in range(5):
        obs, _ = base.reset(seed=seed)
        start, total, discount, terminated = obs, 0.0, 1.0, False
        for _ in range(200):
            obs, reward, terminated, _, _ = base.step(int(sol.policy[obs]))
            total += discount * reward
            discount *= mdp.gamma
            if terminated:
                break
        assert terminated
        assert total == pytest.approx(sol.v[start], abs=1e-9)


def test_rainy_taxi_one_step_distribution_matches_gymnasium_step():
    env = _make("Taxi-v4", is_rainy=True)
    mdp = FiniteMDP.from_gymnasium(env)
    pairs = _live_pairs(mdp)
    chosen = np.random.default_rng(3).choice(len(pairs), size=60, replace=False)
    assert _chi_square_check(env, mdp, [pairs[i] for i in chosen], 400, seed=5) < 1.0


def test_cliff_walking_import_equals_the_catalogue_model():
    # gymnasium's CliffWalking (v1 in gymnasium 1.x) lists transitions out of
    # its goal that do not terminate; the goal is still terminal because it is
    # only ever entered by terminating moves.
    env = _make("CliffWalking-v1")
    imported = FiniteMDP.from_gymnasium(env, gamma=1.0)
    ours = cliff_walking()
    assert np.flatnonzero(imported.terminal).tolist() == [47]
    np.testing.assert_allclose(imported.P, ours.P)
    np.testing.assert_allclose(imported.R, ours.R)
    np.testing.assert_allclose(imported.initial, ours.initial)
    # Sutton & Barto (2018), Example 6.6: optimal return -13 from the start
    # (13 steps along the cliff edge); recalled from memory.
    assert value_iteration(imported).v[36] == pytest.approx(-13.0, abs=1e-9)


def test_slippery_cliff_walking_matches_gymnasium_step():
    try:
        env = _make("CliffWalking-v1", is_slippery=True)
    except TypeError:
        pytest.skip("this gymnasium has no slippery CliffWalking")
    mdp = FiniteMDP.from_gymnasium(env)
    assert _chi_square_check(env, mdp, _live_pairs(mdp), n_samples=300, seed=8) < 1.0


def test_from_gymnasium_rejects_envs_without_a_table():
    with pytest.raises(EnvironmentProtocolError, match="no transition table"):
        FiniteMDP.from_gymnasium(gym.make("CartPole-v1"))


def test_from_gymnasium_reports_malformed_table():
    env = _frozen_lake("4x4")
    env.unwrapped.P = {s: {a: "junk" for a in range(4)} for s in range(16)}
    with pytest.raises(EnvironmentProtocolError, match=r"P\[0\]\[0\]"):
        FiniteMDP.from_gymnasium(env)


def test_frozen_lake_greedy_optimal_policy_earns_v_star_in_gymnasium():
    """The exact optimum of the imported model is what gymnasium's own env pays.

    Margin (derived): a discounted return of FrozenLake lies in [0, 1], so by
    Hoeffding's inequality the mean of N = 4000 independent episodes is within
    eps = 0.035 of its expectation except with probability
    2 exp(-2 N eps^2) = 2 exp(-9.8) < 1.2e-4. Episodes are cut after 1000
    steps, which biases the mean down by at most gamma^1000 < 4.4e-5.
    """
    env = _frozen_lake("4x4")
    mdp = FiniteMDP.from_gymnasium(env, gamma=0.99)
    sol = value_iteration(mdp)
    base = env.unwrapped
    base.reset(seed=123)
    returns = []
    for _ in range(4000):
        obs, _ = base.reset()
        total, discount = 0.0, 1.0
        for _ in range(1000):
            obs, reward, terminated, _, _ = base.step(int(sol.policy[obs]))
            total += discount * reward
            discount *= mdp.gamma
            if terminated:
                break
        returns.append(total)
    assert abs(np.mean(returns) - sol.v[0]) < 0.035 + 4.4e-5


# ---------------------------------------------------------------- to_env
@pytest.mark.parametrize(
    "mdp",
    [gridworld_4x4(), garnet(12, 3, 4, seed=0), cliff_walking()],
    ids=["gridworld", "garnet", "cliff"],
)
def test_to_env_passes_gymnasium_env_checker(mdp):
    env = mdp.to_env(max_episode_steps=50)
    assert isinstance(env, gym.Env)
    check_env(env, skip_render_check=True)
    assert env.unwrapped.gamma == mdp.gamma
    assert env.unwrapped.mdp is mdp
    assert env.observation_space == gym.spaces.Discrete(mdp.n_states)
    assert env.action_space == gym.spaces.Discrete(mdp.n_actions)


def test_to_env_is_reproducible_from_the_reset_seed():
    def run(seed):
        env = garnet(30, 2, 5, seed=1).to_env()
        obs, _ = env.reset(seed=seed)
        trace = [obs]
        for t in range(200):
            trace.append(env.step(t % 2)[0])
        return trace

    assert run(7) == run(7)
    assert run(7) != run(8)


def test_to_env_samples_the_model_distribution():
    """One-step and start distributions of to_env against the model (chi-square).

    State 0 has five successors with probabilities (0.1, 0.2, 0.3, 0.25, 0.15);
    the start distribution is (0.5, 0.3, 0.2) over states 0-2. With N = 20,000
    draws each, under the null the Pearson statistics are chi-square with 4 and
    2 degrees of freedom; the thresholds are their 1 - 1e-4 quantiles (derived
    from the law, so a correct sampler fails with probability 2e-4 at most).
    """
    probs = np.array([0.1, 0.2, 0.3, 0.25, 0.15])
    P = np.zeros((6, 1, 6))
    P[0, 0, 1:6] = probs
    P[1:, 0, 0] = 1.0
    R = np.zeros((6, 1, 6))
    R[0, 0, 1:6] = np.arange(1, 6)  # the reward names the successor
    start = np.array([0.5, 0.3, 0.2, 0.0, 0.0, 0.0])
    env = FiniteMDP(P, R, gamma=0.9, initial=start).to_env()
    n = 20_000
    env.reset(seed=0)
    first = np.bincount([env.reset()[0] for _ in range(n)], minlength=6)[:3]
    stat0 = ((first - n * start[:3]) ** 2 / (n * start[:3])).sum()
    assert stat0 < stats.chi2.isf(1e-4, 2)
    env = FiniteMDP(P, R, gamma=0.9, initial=[1, 0, 0, 0, 0, 0]).to_env()
    env.reset(seed=1)
    landed = []
    for _ in range(n):
        env.reset()
        nxt, reward, *_ = env.step(0)
        assert reward == float(nxt)
        landed.append(nxt)
    counts = np.bincount(landed, minlength=6)[1:]
    stat1 = ((counts - n * probs) ** 2 / (n * probs)).sum()
    assert stat1 < stats.chi2.isf(1e-4, 4)


def test_to_env_termination_and_truncation():
    env = _starting_at(gridworld_4x4(), 1).to_env(max_episode_steps=3)  # next to corner 0
    assert env.reset(seed=0)[0] == 1
    obs, reward, terminated, truncated, _ = env.step(3)  # left
    assert (obs, reward, terminated, truncated) == (0, -1.0, True, False)
    env = _starting_at(gridworld_4x4(), 5).to_env(max_episode_steps=3)
    env.reset(seed=0)
    results = [env.step(0)[2:4] for _ in range(3)]  # up, up (wall), up (wall)
    assert results == [(False, False), (False, False), (False, True)]


def test_to_env_rejects_bad_use():
    env = gridworld_4x4().to_env()
    with pytest.raises(EnvironmentProtocolError, match="reset"):
        env.step(0)
    env.reset(seed=0)
    with pytest.raises(InvalidParameterError, match=r"integer in \[0, 4\); got 4"):
        env.step(4)
    with pytest.raises(InvalidParameterError, match="max_episode_steps"):
        gridworld_4x4().to_env(max_episode_steps=0)


def test_to_env_gives_a_finite_mdp_env():
    assert isinstance(gridworld_4x4().to_env(), FiniteMDPEnv)


def test_model_value_by_monte_carlo_through_to_env():
    """Returns sampled through to_env average to the exact value of the policy.

    A Garnet MDP with gamma = 0.5, episodes starting in state 0: returns lie in
    [0, 2] (rewards in [0, 1)); truncation after 60 steps biases by at most
    0.5^60 * 2 < 2e-18. Hoeffding with N = 5000 episodes: |mean - v| < eps = 0.06
    except with probability 2 exp(-2 N eps^2 / 2^2) = 2 exp(-9) < 2.5e-4.
    """
    mdp = _starting_at(garnet(10, 2, 3, gamma=0.5, seed=4), 0)
    policy = np.arange(10) % 2
    v = evaluate_policy(mdp, policy)
    env = mdp.to_env()
    env.reset(seed=9)
    totals = []
    for _ in range(5000):
        obs, _ = env.reset()
        assert obs == 0
        total, discount = 0.0, 1.0
        for _ in range(60):
            obs, reward, *_ = env.step(int(policy[obs]))
            total += discount * reward
            discount *= mdp.gamma
        totals.append(total)
    assert abs(np.mean(totals) - v[0]) < 0.06

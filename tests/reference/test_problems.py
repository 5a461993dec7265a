"""Published values of the catalogue problems, each with its source beside it.

Source: Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
Introduction, 2nd ed., MIT Press (cited as "S&B 2018"). No copy of the book
was at hand while writing these tests: every figure value below is RECALLED
FROM MEMORY of the published figure, and says so. Values that follow from a
closed form are derived in the comment and need no memory. Where a memory
could be wrong, the exact DP on the model built from the recalled layout
must reproduce the recalled figure, which cross-checks both.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from tdkit._errors import InvalidParameterError
from tdkit.dp import (
    action_values,
    bellman_expectation_operator,
    evaluate_policy,
    greedy_policy,
    policy_iteration,
    value_iteration,
)
from tdkit.envs.problems import (
    blocking_maze,
    cliff_walking,
    dyna_maze,
    gamblers_problem,
    garnet,
    gridworld_4x4,
    gridworld_5x5,
    maximization_bias,
    maximization_bias_mask,
    random_walk,
    shortcut_maze,
    windy_gridworld,
)


def _uniform(mdp):
    return np.full((mdp.n_states, mdp.n_actions), 1.0 / mdp.n_actions)


def _greedy_path(mdp, policy, max_steps=1000):
    """States visited by a deterministic policy from the (single) start state."""
    state = int(np.argmax(mdp.initial))
    path = [state]
    nxt, probs, _ = mdp.successors
    while not mdp.terminal[state] and len(path) <= max_steps:
        state = int(nxt[state, policy[state], np.argmax(probs[state, policy[state]])])
        path.append(state)
    return path


# ---------------------------------------------------------------- random walk
def test_random_walk_true_values_example_6_2():
    # S&B 2018, Example 6.2: true values of A..E are 1/6, 2/6, 3/6, 4/6, 5/6
    # (recalled from memory; also the gambler's-ruin closed form i / (n + 1)).
    v = evaluate_policy(random_walk(5), np.zeros(7, dtype=int))
    np.testing.assert_allclose(v[1:-1], np.arange(1, 6) / 6, atol=1e-12)
    assert v[0] == v[-1] == 0.0


def test_random_walk_true_values_example_7_1():
    # S&B 2018, Example 7.1: 19 states, -1 on the left exit; true values
    # -18/20 ... 18/20 in steps of 2/20 (recalled from memory; closed form
    # -1 + 2 i / 20).
    v = evaluate_policy(random_walk(19, left_reward=-1.0), np.zeros(21, dtype=int))
    np.testing.assert_allclose(v[1:-1], np.arange(-18, 19, 2) / 20, atol=1e-12)


def test_random_walk_starts_in_the_middle():
    assert np.argmax(random_walk(5).initial) == 3  # C, S&B 2018 Example 6.2
    assert np.argmax(random_walk(19).initial) == 10


# ---------------------------------------------------------------- 4x4 gridworld
def test_gridworld_4x4_random_policy_values_figure_4_1():
    # S&B 2018, Example 4.1, Figure 4.1 (k = infinity column): values of the
    # equiprobable random policy, recalled from memory.
    published = [
        [0, -14, -20, -22],
        [-14, -18, -20, -20],
        [-20, -20, -18, -14],
        [-22, -20, -14, 0],
    ]
    mdp = gridworld_4x4()
    v = evaluate_policy(mdp, _uniform(mdp))
    np.testing.assert_allclose(v.reshape(4, 4), published, atol=1e-9)


def test_gridworld_4x4_greedy_of_random_values_is_optimal_figure_4_1():
    # S&B 2018, Figure 4.1 (right column): the greedy policy with respect to
    # the random policy's values is already optimal (recalled from memory).
    mdp = gridworld_4x4()
    v_random = evaluate_policy(mdp, _uniform(mdp))
    greedy = greedy_policy(action_values(mdp, v_random)).stochastic()
    np.testing.assert_allclose(evaluate_policy(mdp, greedy), value_iteration(mdp).v, atol=1e-9)


def test_gridworld_4x4_iterative_policy_evaluation_k_1_and_k_2():
    # S&B 2018, Figure 4.1, k = 1 (every non-terminal -1.0) and k = 2 (-1.7
    # next to a terminal, -2.0 elsewhere), recalled from memory. One sweep of
    # the expectation operator from 0 is iterative policy evaluation's k = 1.
    mdp = gridworld_4x4()
    v1 = bellman_expectation_operator(mdp, np.zeros(16), _uniform(mdp))
    v2 = bellman_expectation_operator(mdp, v1, _uniform(mdp))
    np.testing.assert_allclose(v1[1:15], -1.0)
    assert v2[1] == pytest.approx(-1.75)  # printed as -1.7 in the figure
    assert v2[2] == pytest.approx(-2.0)


# ---------------------------------------------------------------- 5x5 gridworld
def test_gridworld_5x5_random_policy_values_figure_3_2():
    # S&B 2018, Example 3.5, Figure 3.2 (right): values of the equiprobable
    # random policy, gamma = 0.9, printed to one decimal; recalled from memory.
    published = [
        [3.3, 8.8, 4.4, 5.3, 1.5],
        [1.5, 3.0, 2.3, 1.9, 0.5],
        [0.1, 0.7, 0.7, 0.4, -0.4],
        [-1.0, -0.4, -0.4, -0.6, -1.2],
        [-1.9, -1.3, -1.2, -1.4, -2.0],
    ]
    mdp = gridworld_5x5()
    v = evaluate_policy(mdp, _uniform(mdp))
    np.testing.assert_allclose(v.reshape(5, 5), published, atol=0.05 + 1e-9)


def test_gridworld_5x5_optimal_values_figure_3_5():
    # S&B 2018, Example 3.8, Figure 3.5 (middle): v*, printed to one decimal;
    # recalled from memory.
    published = [
        [22.0, 24.4, 22.0, 19.4, 17.5],
        [19.8, 22.0, 19.8, 17.8, 16.0],
        [17.8, 19.8, 17.8, 16.0, 14.4],
        [16.0, 17.8, 16.0, 14.4, 13.0],
        [14.4, 16.0, 14.4, 13.0, 11.7],
    ]
    sol = value_iteration(gridworld_5x5(), tol=1e-10)
    np.testing.assert_allclose(sol.v.reshape(5, 5), published, atol=0.05 + 1e-9)
    # Closed form (derived): from A the optimal cycle is A -> A' (+10) and four
    # steps back up to A, so v*(A) = 10 / (1 - 0.9^5) = 24.419...
    assert sol.v[1] == pytest.approx(10 / (1 - 0.9**5), abs=1e-9)


# ---------------------------------------------------------------- windy gridworld
def test_windy_gridworld_optimal_path_has_15_steps_example_6_5():
    # S&B 2018, Example 6.5, Figure 6.3: the optimal trajectory takes 15 steps
    # (recalled from memory); with -1 per step and gamma = 1, v*(start) = -15.
    mdp = windy_gridworld()
    sol = value_iteration(mdp)
    assert sol.v[30] == pytest.approx(-15.0, abs=1e-9)
    assert len(_greedy_path(mdp, sol.policy)) - 1 == 15


def test_windy_gridworld_kings_moves_exercise_6_9():
    # S&B 2018, Exercise 6.9: with king's moves the optimal path takes 7 steps,
    # and the ninth "stay" action does not shorten it (recalled from memory).
    assert value_iteration(windy_gridworld(king_moves=True)).v[30] == pytest.approx(-7.0)
    kings_stay = windy_gridworld(king_moves=True, stay=True)
    assert value_iteration(kings_stay).v[30] == pytest.approx(-7.0)


def test_windy_gridworld_stochastic_wind_exercise_6_10_is_a_distribution():
    mdp = windy_gridworld(king_moves=True, stochastic_wind=True)
    np.testing.assert_allclose(mdp.P.sum(axis=2), 1.0)
    # Row 3, column 3 (wind 1), moving right: the wind lifts by 0, 1 or 2
    # rows, 1/3 each, landing in column 4 on rows 3, 2, 1 (cells 34, 24, 14).
    nxt, probs, _ = mdp.successors
    row = {int(n): float(p) for n, p in zip(nxt[33, 1], probs[33, 1], strict=True) if p > 0}
    assert row == pytest.approx({34: 1 / 3, 24: 1 / 3, 14: 1 / 3})
    with pytest.raises(InvalidParameterError, match="stay=True needs king_moves=True"):
        windy_gridworld(stay=True)


# ---------------------------------------------------------------- cliff walking
def test_cliff_walking_optimal_return_example_6_6():
    # S&B 2018, Example 6.6, Figure 6.4: the optimal path runs along the cliff
    # edge, 13 steps, return -13 (recalled from memory).
    mdp = cliff_walking()
    sol = value_iteration(mdp)
    assert sol.v[36] == pytest.approx(-13.0, abs=1e-9)
    path = _greedy_path(mdp, sol.policy)
    assert path == [36, 24, *range(25, 36), 47]  # up, 11 x right, down


# ---------------------------------------------------------------- maximisation bias
def test_maximization_bias_example_6_7():
    # S&B 2018, Example 6.7: "left" leads to B whose actions have mean reward
    # -0.1, so q*(A, left) = -0.1 and the optimal action in A is "right"
    # (value 0); recalled from memory.
    mdp = maximization_bias()
    sol = value_iteration(mdp)
    assert sol.q[0, 0] == pytest.approx(-0.1)
    assert sol.v[0] == 0.0 and sol.policy[0] != 0
    np.testing.assert_allclose(sol.q[1], -0.1)
    # The two-point reward keeps the normal's mean and variance (N(-0.1, 1)).
    _, probs, rewards = mdp.successors
    mean = (probs[1, 0] * rewards[1, 0]).sum()
    var = (probs[1, 0] * (rewards[1, 0] - mean) ** 2).sum()
    assert (mean, var) == pytest.approx((-0.1, 1.0))
    mask = maximization_bias_mask()
    assert mask.shape == (3, 10) and mask[0].sum() == 2 and mask[1].all()


# ---------------------------------------------------------------- gambler's problem
def test_gamblers_problem_values_bold_play():
    # S&B 2018, Example 4.3 and Figure 4.3, p_h = 0.4. For p_h <= 1/2 bold play
    # (stake min(s, 100 - s)) is optimal (Dubins & Savage 1965, How to Gamble
    # If You Must). Its values follow by hand from f(x) = p f(2x) for
    # x <= 1/2 and p + (1 - p) f(2x - 1) above (derived):
    # v*(50) = 0.4, v*(25) = 0.4^2 = 0.16, v*(75) = 0.4 + 0.6 * 0.4 = 0.64.
    mdp = gamblers_problem(0.4)
    sol = value_iteration(mdp, tol=1e-12)
    assert sol.v[[25, 50, 75]] == pytest.approx([0.16, 0.4, 0.64], abs=1e-10)
    bold = np.array([min(s, 100 - s) for s in range(101)])
    np.testing.assert_allclose(evaluate_policy(mdp, bold), sol.v, atol=1e-10)
    assert sol.v[0] == sol.v[100] == 0.0
    # The curve of Figure 4.3 (recalled from memory) rises from 0 to 1.
    assert np.all(np.diff(sol.v[:100]) > 0)


def test_gamblers_problem_fair_coin_value_is_capital_fraction():
    # Fair coin: every policy that ends the game wins with probability s / 100
    # (a martingale; derived), so v*(s) = s / 100.
    sol = policy_iteration(gamblers_problem(0.5))
    np.testing.assert_allclose(sol.v[:100], np.arange(100) / 100, atol=1e-9)


# ---------------------------------------------------------------- mazes
def test_dyna_maze_shortest_path_example_8_1():
    # S&B 2018, Example 8.1, Figures 8.2-8.3: the shortest path takes 14 steps
    # (recalled from memory). Reward +1 at the goal, gamma = 0.95, so
    # v*(start) = 0.95^13 (derived).
    mdp = dyna_maze()
    sol = value_iteration(mdp)
    assert sol.v[18] == pytest.approx(0.95**13, abs=1e-9)
    assert len(_greedy_path(mdp, sol.policy)) - 1 == 14


@pytest.mark.parametrize(
    ("maze", "lengths", "change_at"),
    [
        # S&B 2018, Example 8.2, Figure 8.4 (blocking maze): the short path on
        # the right (10 steps) is blocked after 1000 steps; the new path on the
        # left takes 16 steps. Layout recalled from memory; lengths derived.
        (blocking_maze, (10, 16), 1000),
        # S&B 2018, Example 8.3, Figure 8.5 (shortcut maze): the long path on
        # the left (16) stays open and a shortcut (10) opens after 3000 steps.
        (shortcut_maze, (16, 10), 3000),
    ],
)
def test_changing_mazes(maze, lengths, change_at):
    pair = maze()
    assert pair.change_at == change_at
    for mdp, length in zip((pair.before, pair.after), lengths, strict=True):
        sol = value_iteration(mdp)
        assert len(_greedy_path(mdp, sol.policy)) - 1 == length
        assert sol.v[48] == pytest.approx(0.95 ** (length - 1), abs=1e-9)


# ---------------------------------------------------------------- Garnet
def test_garnet_structure_and_reproducibility():
    # Archibald, McKinnon & Thomas (1995), On the generation of Markov decision
    # processes: each pair has `branching` distinct successors.
    mdp = garnet(200, 3, 5, gamma=0.9, seed=4)
    nxt, probs, _ = mdp.successors
    assert nxt.shape == (200, 3, 5) and mdp.is_sparse
    assert all(len(set(row)) == 5 for row in nxt.reshape(-1, 5).tolist())
    np.testing.assert_allclose(probs.sum(axis=2), 1.0)
    assert (probs > 0).all() and (mdp.R >= 0).all() and (mdp.R < 1).all()
    again = garnet(200, 3, 5, gamma=0.9, seed=4)
    np.testing.assert_array_equal(again.successors[0], nxt)
    np.testing.assert_array_equal(again.R, mdp.R)
    assert not np.array_equal(garnet(200, 3, 5, seed=5).R, mdp.R)


def test_large_garnet_uses_distinct_successors():
    mdp = garnet(50_000, 2, 8, seed=0)
    ordered = np.sort(mdp.successors[0].reshape(-1, 8), axis=1)
    assert not (ordered[:, 1:] == ordered[:, :-1]).any()


def test_garnet_uniform_successors():
    """Successors are uniform over states: chi-square over 20 states.

    1000 states x 1 action x 4 successors = 4000 draws over 20 states (each
    state expected 200 times); under uniformity the statistic is (close to)
    chi-square with 19 degrees of freedom (sampling without replacement
    within a row of 4 out of 1000 only lowers the variance); the threshold
    is its 1 - 1e-4 quantile.
    """
    counts = np.bincount(garnet(1000, 1, 4, seed=2).successors[0].ravel() % 20, minlength=20)
    statistic = ((counts - 200) ** 2 / 200).sum()
    assert statistic < stats.chi2.isf(1e-4, 19)


@pytest.mark.parametrize(
    ("kwargs", "fragment"),
    [
        ({"n_states": 3, "n_actions": 2, "branching": 4}, "branching must be <= n_states = 3"),
        ({"n_states": 0, "n_actions": 2, "branching": 1}, "n_states must be an integer >= 1"),
        ({"n_states": 3, "n_actions": 2, "branching": 1, "gamma": 1.2}, "gamma must be in"),
        ({"n_states": 3, "n_actions": 2, "branching": 1, "seed": -1}, "non-negative"),
    ],
)
def test_garnet_rejects_bad_arguments(kwargs, fragment):
    with pytest.raises(InvalidParameterError) as info:
        garnet(**kwargs)
    assert fragment in str(info.value)

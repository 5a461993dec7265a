"""tdkit.plot on the Agg backend: curves, bands, labels, value maps and bad input."""

from __future__ import annotations

import functools

import numpy as np
import pytest

matplotlib = pytest.importorskip("matplotlib")
matplotlib.use("Agg")  # no windows
import matplotlib.pyplot as plt  # noqa: E402

import tdkit  # noqa: E402
from tdkit import History, InvalidParameterError  # noqa: E402
from tdkit.envs.problems import cliff_walking, gridworld_4x4, random_walk  # noqa: E402
from tdkit.plot import moving_average, plot_returns, plot_values  # noqa: E402
from tdkit.sweep import run_sweep  # noqa: E402
from tdkit.verify import agent_factory  # noqa: E402


@pytest.fixture(autouse=True)
def _close_figures():
    yield
    plt.close("all")


def _history(returns) -> History:
    history = History()
    for r in returns:
        history.add_episode(ret=float(r), length=1, end="terminated", td_count=0,
                            td_abs_sum=0.0, td_abs_max=0.0)
    return history


def _labels(ax) -> list[str]:
    return ax.get_legend_handles_labels()[1]


# ---------------------------------------------------------------- learning curves
def test_one_history_is_one_line_of_trailing_averages():
    returns = np.arange(12.0) ** 2
    ax = plot_returns(_history(returns), window=3)
    assert len(ax.lines) == 1 and len(ax.collections) == 0 and ax.get_legend() is None
    x, y = ax.lines[0].get_data()
    np.testing.assert_array_equal(x, np.arange(3, 13))
    np.testing.assert_allclose(y, np.convolve(returns, np.ones(3) / 3, mode="valid"))
    assert ax.get_xlabel() == "episode"
    assert ax.get_ylabel() == "return (moving average of 3 episodes)"


def test_moving_average_matches_numpy_convolution():
    rng = np.random.default_rng(0)
    returns = rng.normal(size=(3, 50))
    for window in (1, 7, 50):
        expected = np.stack([np.convolve(r, np.ones(window) / window, "valid") for r in returns])
        np.testing.assert_allclose(moving_average(returns, window), expected)


def test_several_runs_are_one_mean_line_with_a_band_cut_to_the_shortest_run():
    runs = [_history(np.full(10, 1.0)), np.full(8, 3.0), _history(np.full(12, 5.0))]
    ax = plot_returns(runs, window=1, label="three runs")
    assert len(ax.lines) == 1 and len(ax.collections) == 1
    np.testing.assert_allclose(ax.lines[0].get_ydata(), np.full(8, 3.0))
    assert _labels(ax) == ["three runs"] and ax.get_ylabel() == "return"
    assert len(plot_returns(runs, ci=False).collections) == 0


def test_the_band_is_the_percentile_bootstrap_of_the_mean_over_runs():
    # Two constant runs a < b: a resample of 2 runs has mean a, (a + b) / 2 or b with
    # probabilities 1/4, 1/2, 1/4. With 1000 resamples the count of all-a resamples is
    # Binomial(1000, 1/4) (mean 250, sd 13.7), far above the 25 that the 2.5% quantile
    # needs, so the 95% band is exactly [a, b] at every episode.
    a, b = 1.0, 3.0
    ax = plot_returns(np.array([np.full(6, a), np.full(6, b)]), window=2)
    (band,) = ax.collections
    vertices = np.concatenate([path.vertices for path in band.get_paths()])
    assert vertices[:, 1].min() == pytest.approx(a) and vertices[:, 1].max() == pytest.approx(b)
    np.testing.assert_allclose(ax.lines[0].get_ydata(), np.full(5, 2.0))


def test_a_window_longer_than_the_runs_is_cut_to_their_length():
    ax = plot_returns([1.0, 2.0, 3.0], window=10)
    np.testing.assert_allclose(ax.lines[0].get_ydata(), [2.0])
    assert ax.get_ylabel() == "return (moving average of 3 episodes)"


@pytest.fixture(scope="module")
def sweep_result():
    make_env = functools.partial(gridworld_4x4().to_env, 50)
    return run_sweep(agent_factory(tdkit.QLearning), make_env, seeds=range(3),
                     settings={"step_size": [0.1, 0.5], "exploration": [0.1]}, episodes=20,
                     max_workers=1)


def test_a_sweep_draws_one_labelled_curve_with_a_band_per_setting(sweep_result):
    ax = plot_returns(sweep_result, window=5)
    assert len(ax.lines) == 2 and len(ax.collections) == 2
    assert _labels(ax) == ["step_size=0.1, exploration=0.1", "step_size=0.5, exploration=0.1"]
    runs = np.stack([run.returns for run in sweep_result.runs_for(1)])
    np.testing.assert_allclose(ax.lines[1].get_ydata(), moving_average(runs, 5).mean(axis=0))
    by_callable = plot_returns(sweep_result, label=lambda s: f"α={s['step_size']}")
    assert _labels(by_callable) == ["α=0.1", "α=0.5"]
    assert _labels(plot_returns(sweep_result, label=["slow", "fast"])) == ["slow", "fast"]
    # One run record draws one curve.
    assert len(plot_returns(sweep_result[0]).lines) == 1


def test_failed_runs_of_a_recorded_sweep_are_left_out_of_the_curves():
    # QLearning refuses step_size=1.5 at construction, so every run of that setting fails.
    make_env = functools.partial(gridworld_4x4().to_env, 50)
    result = run_sweep(agent_factory(tdkit.QLearning), make_env, seeds=range(2), episodes=6,
                       settings=[{"step_size": 0.5}, {"step_size": 1.5}, {"step_size": 0.1}],
                       max_workers=1, on_error="record")
    ax = plot_returns(result, window=2)
    assert _labels(ax) == ["step_size=0.5", "step_size=0.1"]
    runs = np.stack([run.returns for run in result.runs_for(2)])
    np.testing.assert_allclose(ax.lines[1].get_ydata(), moving_average(runs, 2).mean(axis=0))
    assert _labels(plot_returns(result, label=["a", "b", "c"])) == ["a", "c"]
    only_failed = run_sweep(agent_factory(tdkit.QLearning), make_env, seeds=[0], episodes=2,
                            settings={"step_size": [1.5]}, max_workers=1, on_error="record")
    with pytest.raises(InvalidParameterError, match="no finished run to draw"):
        plot_returns(only_failed)


def test_curves_go_on_a_given_axes_and_a_dict_labels_them():
    fig, ax = plt.subplots()
    out = plot_returns({"a": [[0.0, 1.0], [1.0, 2.0]], "b": _history([5.0, 6.0])}, ax=ax,
                       window=1)
    assert out is ax and out.figure is fig
    assert _labels(ax) == ["a", "b"] and len(ax.lines) == 2 and len(ax.collections) == 1
    plot_returns([0.0, 0.0], ax=ax, window=1, label="more")
    assert len(ax.lines) == 3


@pytest.mark.parametrize(
    ("data", "kwargs", "match"),
    [
        ([1.0, 2.0], {"window": 0}, "window must be an integer >= 1"),
        ([1.0, 2.0], {"confidence": 1.5}, "confidence"),
        ("returns", {}, "must be a History"),
        ([], {}, "must be a History"),
        ([[]], {}, "no episodes"),
        (np.zeros((2, 2, 2)), {}, "must be a History"),
        ([1.0, float("nan")], {}, "non-finite"),
        ({}, {}, "empty"),
        ({"a": [1.0], "b": [2.0]}, {"label": ["only one"]}, "list of 2 strings"),
        ([1.0, 2.0], {"label": ["a", "b"]}, "single curve must be a str"),
        ([1.0, 2.0], {"ax": "not axes"}, "ax must be a matplotlib Axes"),
    ],
)
def test_bad_curve_input_is_refused(data, kwargs, match):
    with pytest.raises(InvalidParameterError, match=match):
        plot_returns(data, **kwargs)


# ---------------------------------------------------------------- value maps
def test_state_values_fill_the_grid_row_major():
    values = np.arange(12.0)
    ax = plot_values((3, 4), values, annotate=True)
    image = ax.images[0]
    np.testing.assert_array_equal(image.get_array(), values.reshape(3, 4))
    assert len(ax.texts) == 12 and ax.texts[5].get_text() == "5"
    assert ax.texts[5].get_position() == (1, 1)  # state 5: row 1, column 1
    assert len(ax.figure.axes) == 2  # the map and its colour bar
    assert len(plot_values((3, 4), values.reshape(3, 4), colorbar=False).figure.axes) == 1


def test_action_values_draw_their_maximum_and_nan_cells_stay_blank():
    q = np.array([[1.0, 2.0], [4.0, 3.0], [np.nan, np.nan], [0.0, -1.0]])
    with np.errstate(invalid="ignore"):
        ax = plot_values((2, 2), q)
    image = ax.images[0].get_array()
    assert image.mask.tolist() == [[False, False], [True, False]]
    assert image[0].tolist() == [2.0, 4.0] and image[1, 1] == 0.0
    assert len(ax.texts) == 3


def test_a_model_marks_terminal_states_and_lays_chains_in_one_row():
    # Sutton & Barto (2018), Example 6.2: the 5-state random walk; its two ends are terminal
    # states of the model (7 states in all).
    mdp = random_walk(5)
    v = tdkit.evaluate_policy(mdp, np.full((mdp.n_states, mdp.n_actions), 1 / mdp.n_actions))
    ax = plot_values(mdp, v)
    assert ax.images[0].get_array().shape == (1, mdp.n_states)
    texts = [t.get_text() for t in ax.texts]
    assert texts.count("T") == int(mdp.terminal.sum())


def test_policy_arrows_point_along_the_grid_moves():
    # Cliff walking (Sutton & Barto 2018, Example 6.6): 4 x 12 cells, goal 47 terminal.
    mdp = cliff_walking()
    policy = np.ones(48, dtype=int)          # every cell: right
    policy[[0, 13, 26]] = [0, 2, 8]          # up, down, stay
    ax = plot_values(mdp, np.zeros(48), shape=(4, 12), policy=policy)
    (arrows,) = [c for c in ax.collections if hasattr(c, "U")]
    # 47 live cells, one of which stays: 46 arrows and one dot.
    assert len(arrows.U) == 46
    directions = {(int(x), int(y)): (u, v) for (x, y), u, v in
                  zip(arrows.get_offsets(), arrows.U, arrows.V, strict=True)}
    assert directions[(0, 0)] == (0.0, -1.0)   # up: one row less
    assert directions[(1, 1)] == (0.0, 1.0)    # down
    assert directions[(3, 0)] == (1.0, 0.0)    # right
    assert (11, 3) not in directions           # the terminal goal has none
    assert [a.tolist() for a in ax.lines[0].get_data()] == [[2], [2]]  # state 26 stays


def test_value_iteration_solution_draws_on_a_given_axes():
    mdp = gridworld_4x4()
    sol = tdkit.value_iteration(mdp)
    _, ax = plt.subplots()
    assert plot_values(mdp, sol.q, ax, shape=(4, 4), policy=sol.policy) is ax
    np.testing.assert_allclose(ax.images[0].get_array(), sol.v.reshape(4, 4))


@pytest.mark.parametrize(
    ("layout", "values", "kwargs", "match"),
    [
        ((3, 4), np.zeros(11), {}, r"shape \(12,\).*got shape \(11,\)"),
        ((3, 0), np.zeros(0), {}, r"grid shape \(rows, cols\)"),
        ("4x4", np.zeros(16), {}, r"grid shape \(rows, cols\)"),
        ((2, 2), [1.0, np.inf, 0.0, 0.0], {}, "finite"),
        ((2, 2), ["a", "b", "c", "d"], {}, "array of numbers"),
        ((2, 2), np.zeros(4), {"shape": (2, 2)}, "goes with a FiniteMDP"),
        (gridworld_4x4(), np.zeros(16), {"shape": (4, 5)}, "20 cells but the model has 16"),
        ((2, 2), np.zeros(4), {"policy": [0, 1, 2, 9]}, r"ints in \[0, 8\]"),
        ((2, 2), np.zeros(4), {"policy": [0, 1]}, "policy must be 4 ints"),
        ((2, 2), np.zeros(4), {"policy": [0.5, 1, 2, 3]}, "policy must be 4 ints"),
    ],
)
def test_bad_value_map_input_is_refused(layout, values, kwargs, match):
    with pytest.raises(InvalidParameterError, match=match):
        plot_values(layout, values, **kwargs)

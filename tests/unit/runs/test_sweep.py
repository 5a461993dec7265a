"""tdkit.sweep: grid expansion, seed derivation, executor independence, errors, summaries."""

from __future__ import annotations

import concurrent.futures
import functools
import math
import pickle

import numpy as np
import pytest

import tdkit
from tdkit import InvalidParameterError, TdkitError
from tdkit.envs.problems import gridworld_4x4
from tdkit.stats import bootstrap_ci
from tdkit.sweep import (
    METRICS,
    RunRecord,
    SweepResult,
    SweepRunError,
    derive_seeds,
    expand_settings,
    run_sweep,
    setting_label,
)
from tdkit.verify import agent_factory

# Sutton & Barto (2018), Example 4.1: the 4x4 gridworld, -1 per step, two terminal corners;
# from any cell a corner is at most 3 steps away, so an optimal greedy return is >= -3.
GRID = gridworld_4x4()
MAKE_ENV = functools.partial(GRID.to_env, 100)
MAKE_Q = agent_factory(tdkit.QLearning, exploration=0.1)
GRID_SETTINGS = {"step_size": [0.1, 0.5], "exploration": [0.05, 0.2]}
SMALL = {"seeds": range(3), "settings": GRID_SETTINGS, "episodes": 20, "eval_episodes": 3}


def _as_comparable(result: SweepResult) -> list:
    """Everything a run produced, in a form == compares exactly."""
    return [
        (run.setting_index, run.setting, run.seed, run.agent_seed, run.returns.tolist(),
         run.history.lengths.tolist(), None if run.eval_returns is None
         else run.eval_returns.tolist())
        for run in result
    ]


# ---------------------------------------------------------------- settings
def test_a_dict_of_lists_expands_to_the_cartesian_product_last_key_fastest():
    settings = expand_settings({"a": [1, 2, 3], "b": ["x", "y"], "c": (True,)})
    assert len(settings) == 3 * 2 * 1
    assert settings[:3] == [
        {"a": 1, "b": "x", "c": True}, {"a": 1, "b": "y", "c": True},
        {"a": 2, "b": "x", "c": True},
    ]
    assert expand_settings({"a": np.array([0.1, 0.2])}) == [{"a": 0.1}, {"a": 0.2}]


def test_a_list_of_dicts_is_taken_as_it_is_and_none_is_one_empty_setting():
    given = [{"n": 1}, {"n": 4, "step_size": 0.2}]
    assert expand_settings(given) == given
    assert expand_settings(given) is not given
    assert expand_settings(None) == [{}]


@pytest.mark.parametrize(
    ("settings", "match"),
    [
        ({"step_size": 0.5}, r"settings\['step_size'\] must be a list.*\[0.5\]"),
        ({"trace": "dutch"}, r"settings\['trace'\] must be a list"),
        ({"step_size": []}, r"settings\['step_size'\] is empty"),
        ([], "empty list"),
        ([{"n": 1}, 3], r"settings\[1\] must be a dict"),
        ({"seed": [1, 2]}, "'seed' is reserved"),
        ([{"score": 1}], "'score' is reserved"),
        ({"not an identifier": [1]}, "identifiers"),
        ("step_size", "dict of lists"),
    ],
)
def test_bad_settings_are_refused_with_the_fix(settings, match):
    with pytest.raises(InvalidParameterError, match=match):
        expand_settings(settings)


def test_setting_labels():
    assert setting_label({}) == "default"
    assert setting_label({"step_size": 0.5, "n": 4, "trace": "dutch"}) == (
        "step_size=0.5, n=4, trace='dutch'"
    )


# ---------------------------------------------------------------- seeds and determinism
def test_derive_seeds_is_the_documented_seed_sequence_tree():
    agent_seed, train_root, eval_root = derive_seeds(7, 2)
    children = np.random.SeedSequence(7, spawn_key=(2,)).spawn(3)
    assert agent_seed == int(children[0].generate_state(1, dtype=np.uint32)[0])
    assert train_root.spawn_key == children[1].spawn_key == (2, 1)
    assert eval_root.spawn_key == (2, 2) and train_root.entropy == 7
    seeds = {derive_seeds(s, i)[0] for s in range(5) for i in range(5)}
    assert len(seeds) == 25  # 25 distinct draws of 32 bits collide with probability < 1e-7


def test_a_run_is_train_then_evaluate_with_the_derived_seeds():
    result = run_sweep(MAKE_Q, MAKE_ENV, seeds=[4], settings=[{"step_size": 0.3}] * 2,
                       episodes=15, eval_episodes=4, max_episode_steps=50, max_workers=1)
    for run in result:
        agent_seed, train_root, eval_root = derive_seeds(4, run.setting_index)
        env = MAKE_ENV()
        agent = tdkit.QLearning.for_env(env, step_size=0.3, exploration=0.1, seed=agent_seed)
        history = tdkit.train(agent, env, episodes=15, seed=train_root, max_episode_steps=50)
        evals = tdkit.evaluate(agent, env, episodes=4, seed=eval_root, max_episode_steps=50)
        assert run.agent_seed == agent_seed
        np.testing.assert_array_equal(run.returns, history.returns)
        np.testing.assert_array_equal(run.eval_returns, evals)
    # Equal settings at different indices are different runs (independent streams).
    assert result[0].agent_seed != result[1].agent_seed


def test_results_do_not_depend_on_the_executor():
    serial = run_sweep(MAKE_Q, MAKE_ENV, max_workers=1, **SMALL)
    expected = _as_comparable(serial)
    with concurrent.futures.ThreadPoolExecutor(3) as pool:
        assert _as_comparable(run_sweep(MAKE_Q, MAKE_ENV, executor=pool, **SMALL)) == expected
    with concurrent.futures.ProcessPoolExecutor(2) as pool:
        assert _as_comparable(run_sweep(MAKE_Q, MAKE_ENV, executor=pool, **SMALL)) == expected
    # The default: a local process pool made for the call.
    assert _as_comparable(run_sweep(MAKE_Q, MAKE_ENV, max_workers=2, **SMALL)) == expected
    assert serial.to_records() == run_sweep(MAKE_Q, MAKE_ENV, max_workers=1, **SMALL).to_records()


def test_a_run_depends_only_on_its_seed_and_setting_index():
    full = run_sweep(MAKE_Q, MAKE_ENV, max_workers=1, **SMALL)
    alone = run_sweep(MAKE_Q, MAKE_ENV, max_workers=1, **{**SMALL, "seeds": [2]})
    assert _as_comparable(alone) == [
        row for row in _as_comparable(full) if row[2] == 2
    ]


def test_runs_are_in_setting_major_order_with_their_settings():
    result = run_sweep(MAKE_Q, MAKE_ENV, max_workers=1, **SMALL)
    assert len(result) == 4 * 3
    assert result.settings == tuple(expand_settings(GRID_SETTINGS))
    assert result.seeds == (0, 1, 2)
    assert [(run.setting_index, run.seed) for run in result] == [
        (i, s) for i in range(4) for s in range(3)
    ]
    assert all(run.setting == result.settings[run.setting_index] for run in result)
    assert [run.seed for run in result.runs_for(2)] == [0, 1, 2]
    assert result.runs_for(-1) == result.runs_for(3)
    assert isinstance(result[0], RunRecord) and "seed=0" in repr(result[0])
    assert repr(result) == "SweepResult(settings=4, seeds=3, runs=12, evaluated=True)"
    with pytest.raises(InvalidParameterError, match=r"setting_index must be an int in \[0, 4\)"):
        result.runs_for(4)


def test_a_learner_class_works_as_the_factory_and_settings_reach_it():
    result = run_sweep(tdkit.QLearning, MAKE_ENV, seeds=[0], episodes=2, max_workers=1,
                       settings={"step_size": [0.25], "gamma": [0.9]})
    agent = agent_factory(tdkit.QLearning, gamma=0.5)(MAKE_ENV(), 0, gamma=0.9, step_size=0.25)
    assert (agent.gamma, agent.step_size) == (0.9, 0.25)
    # The hand-built factory with the same setting gives the same run.
    by_factory = run_sweep(agent_factory(tdkit.QLearning, gamma=0.5), MAKE_ENV, seeds=[0],
                           episodes=2, max_workers=1,
                           settings={"step_size": [0.25], "gamma": [0.9]})
    assert _as_comparable(result) == _as_comparable(by_factory)


def test_a_step_budget_and_a_time_limit_apply_to_every_run():
    result = run_sweep(MAKE_Q, MAKE_ENV, seeds=range(2), settings={"step_size": [0.5]},
                       steps=120, max_episode_steps=30, max_workers=1)
    for run in result:
        assert run.history.total_steps == 120
        assert run.history.lengths.max() <= 30
        assert run.eval_returns is None and math.isnan(run.eval_return)
        assert run.score == run.final_return
    assert not result.evaluated


# ---------------------------------------------------------------- errors
@pytest.mark.parametrize("mode", ["in-process", "threads", "processes"])
def test_a_failing_run_is_reported_with_its_setting_and_seed(mode):
    # QLearning refuses step_size=1.5 (outside (0, 1]) at construction, inside the run.
    kwargs = {"seeds": [3, 5], "settings": {"step_size": [0.5, 1.5]}, "episodes": 2}
    with pytest.raises(SweepRunError) as info:
        if mode == "in-process":
            run_sweep(MAKE_Q, MAKE_ENV, max_workers=1, **kwargs)
        else:
            pool_cls = (concurrent.futures.ThreadPoolExecutor if mode == "threads"
                        else concurrent.futures.ProcessPoolExecutor)
            with pool_cls(2) as pool:
                run_sweep(MAKE_Q, MAKE_ENV, executor=pool, **kwargs)
    error = info.value
    assert isinstance(error, TdkitError) and isinstance(error, RuntimeError)
    # The first failing run in setting-major order: setting 1, seed 3.
    assert (error.setting, error.setting_index, error.seed) == ({"step_size": 1.5}, 1, 3)
    message = str(error)
    assert "setting step_size=1.5 (setting index 1) and seed 3" in message
    assert "InvalidParameterError: QLearning: step_size must be in (0, 1]" in message
    assert "max_workers=1" in message
    assert isinstance(error.__cause__, InvalidParameterError)
    copy = pickle.loads(pickle.dumps(error))
    assert (str(copy), copy.seed, copy.setting) == (message, 3, {"step_size": 1.5})


def test_unpicklable_factories_are_refused_before_any_process_starts():
    def local_factory(env, seed, **setting):
        return tdkit.QLearning.for_env(env, seed=seed, **setting)

    for name, args in (("make_agent", (local_factory, MAKE_ENV)),
                       ("make_env", (MAKE_Q, lambda: GRID.to_env(100)))):
        with pytest.raises(InvalidParameterError, match=f"{name}=.*cannot be sent.*max_workers=1"):
            run_sweep(*args, seeds=range(2), episodes=2, max_workers=2)
    with pytest.raises(InvalidParameterError, match="settings value step_size"):
        run_sweep(MAKE_Q, MAKE_ENV, seeds=[0, 1], episodes=2, max_workers=2,
                  settings={"step_size": [lambda n: 0.5]})
    # In this process nothing is pickled: local functions work.
    result = run_sweep(local_factory, MAKE_ENV, seeds=range(2), episodes=2, max_workers=1)
    assert len(result) == 2


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"seeds": []}, "at least 1 non-negative int"),
        ({"seeds": [0, -1]}, "non-negative"),
        ({"seeds": [1, 2, 1]}, r"distinct.*\[1\]"),
        ({"seeds": 3}, "iterable of non-negative ints"),
        ({"episodes": None}, "episodes=... or steps=..."),
        ({"episodes": 0}, "episodes must be an integer >= 1"),
        ({"steps": 1.5}, "steps"),
        ({"max_episode_steps": 0}, "max_episode_steps"),
        ({"eval_episodes": -1}, "eval_episodes must be an integer >= 0"),
        ({"final_episodes": 0}, "final_episodes"),
        ({"max_workers": 0}, "max_workers"),
        ({"executor": object()}, "executor must be a concurrent.futures.Executor"),
        ({"settings": {"step_size": 0.5}}, r"\[0.5\]"),
    ],
)
def test_bad_arguments_are_refused(kwargs, match):
    with pytest.raises(InvalidParameterError, match=match):
        run_sweep(MAKE_Q, MAKE_ENV, **{"seeds": range(2), "episodes": 2, **kwargs})


def test_callables_and_executor_options_are_checked():
    with pytest.raises(InvalidParameterError, match="make_env must be callable"):
        run_sweep(MAKE_Q, GRID, seeds=[0], episodes=2)
    with pytest.raises(InvalidParameterError, match="make_agent must be callable"):
        run_sweep(None, MAKE_ENV, seeds=[0], episodes=2)
    with concurrent.futures.ThreadPoolExecutor(1) as pool, pytest.raises(
        InvalidParameterError, match="max_workers=2 sizes the default process pool only"
    ):
        run_sweep(MAKE_Q, MAKE_ENV, seeds=[0], episodes=2, executor=pool, max_workers=2)


# ---------------------------------------------------------------- summaries and exports
@pytest.fixture(scope="module")
def evaluated() -> SweepResult:
    # 4 seeds, so the IQM is exactly the mean of the middle two sorted scores.
    return run_sweep(MAKE_Q, MAKE_ENV, seeds=range(4), settings={"step_size": [0.001, 0.5]},
                     episodes=100, eval_episodes=5, final_episodes=7, max_workers=1)


def test_per_run_metrics_match_numpy(evaluated):
    for run in evaluated:
        returns = run.returns
        assert run.final_return == pytest.approx(np.mean(returns[-7:]))
        assert run.mean_return == pytest.approx(np.mean(returns))
        assert run.eval_return == pytest.approx(np.mean(run.eval_returns))
        assert run.score == run.eval_return
    scores = evaluated.scores()
    assert scores.shape == (2, 4)
    assert scores[1, 2] == evaluated.runs_for(1)[2].score
    assert set(METRICS) == {"score", "final_return", "mean_return", "eval_return"}


@pytest.mark.parametrize("metric", METRICS)
def test_summary_matches_numpy_and_tdkit_stats(evaluated, metric):
    summary = evaluated.summary(metric, confidence=0.9, n_resamples=500, seed=3)
    assert (summary.metric, summary.confidence, len(summary)) == (metric, 0.9, 2)
    for row, scores in zip(summary, evaluated.scores(metric), strict=True):
        assert row.n_runs == 4 and row.setting == evaluated.settings[row.setting_index]
        assert row.mean.estimate == pytest.approx(np.mean(scores))
        assert row.iqm.estimate == pytest.approx(np.mean(np.sort(scores)[1:3]))
        assert row.std == pytest.approx(np.std(scores, ddof=1))
        assert row.mean == bootstrap_ci(scores, "mean", confidence=0.9, n_resamples=500, seed=3)
        assert row.iqm == bootstrap_ci(scores, "iqm", confidence=0.9, n_resamples=500, seed=3)
        assert row.mean.low <= row.mean.estimate <= row.mean.high


def test_summary_ranks_a_working_step_size_above_a_crippled_one(evaluated):
    # Step size 0.001 leaves the table near its start after 100 episodes; 0.5 learns the
    # deterministic gridworld. An optimal greedy policy returns >= -3 from every start
    # (Example 4.1, at most 3 steps to a corner), so the good setting's mean is >= -3.
    summary = evaluated.summary()
    best = summary.best()
    assert best.setting == {"step_size": 0.5} and summary.best("mean") == best
    assert best.mean.estimate >= -3.0
    assert summary[0].mean.estimate < best.mean.estimate
    text = str(summary)
    assert "score by setting" in text and "step_size=0.001" in text and "95% CI" in text
    with pytest.raises(InvalidParameterError, match="by must be 'iqm' or 'mean'"):
        summary.best("median")


def test_summary_of_one_seed_has_no_interval_and_refuses_missing_metrics():
    result = run_sweep(MAKE_Q, MAKE_ENV, seeds=[0], episodes=5, max_workers=1)
    (row,) = result.summary()
    assert row.mean.estimate == result[0].final_return
    assert math.isnan(row.mean.low) and math.isnan(row.iqm.high) and math.isnan(row.std)
    with pytest.raises(InvalidParameterError, match=r"eval_episodes=0.*'final_return'"):
        result.summary("eval_return")
    with pytest.raises(InvalidParameterError, match="metric must be one of"):
        result.summary("median_return")
    with pytest.raises(InvalidParameterError, match="confidence"):
        result.summary(confidence=1.0)


def test_records_and_frames(evaluated):
    pd = pytest.importorskip("pandas")
    records = evaluated.to_records()
    assert len(records) == 8
    assert list(records[0]) == [
        "setting_index", "step_size", "seed", "agent_seed", "episodes", "steps",
        "final_return", "mean_return", "eval_return", "score",
    ]
    frame = evaluated.to_frame()
    assert isinstance(frame, pd.DataFrame) and frame.shape == (8, 10)
    np.testing.assert_allclose(
        frame.groupby("step_size")["score"].mean().to_numpy(),
        [row.mean.estimate for row in evaluated.summary()],
    )
    episodes = evaluated.to_episode_frame()
    assert len(episodes) == sum(len(run.history) for run in evaluated)
    assert list(episodes.columns) == [
        "setting_index", "step_size", "seed", "episode", "return", "length",
    ]
    first = episodes[(episodes.setting_index == 1) & (episodes.seed == 2)]
    np.testing.assert_array_equal(first["return"].to_numpy(), evaluated.runs_for(1)[2].returns)
    table = evaluated.summary().to_frame()
    assert list(table["runs"]) == [4, 4] and "iqm_low" in table.columns


def test_the_per_episode_flag_warns_and_names_the_method_with_its_own_layout(evaluated):
    # A flag must not change the row layout: per-episode rows have their own methods, and
    # the old flag still gives them, with a FutureWarning naming the new method.
    with pytest.warns(FutureWarning, match=r"0\.3\.0.*to_episode_records"):
        assert evaluated.to_records(per_episode=True) == evaluated.to_episode_records()
    with pytest.warns(FutureWarning, match=r"to_episode_records"):
        assert evaluated.to_records(per_episode=False) == evaluated.to_records()
    pytest.importorskip("pandas")
    with pytest.warns(FutureWarning, match=r"to_episode_frame"):
        old = evaluated.to_frame(per_episode=True)
    assert old.equals(evaluated.to_episode_frame())


def test_progress_bar_runs():
    pytest.importorskip("tqdm")
    result = run_sweep(MAKE_Q, MAKE_ENV, seeds=[0, 1], episodes=2, max_workers=1, progress=True)
    assert len(result) == 2


# ---------------------------------------------------------------- one seed path
def test_a_sweep_and_compare_performance_give_the_same_runs_for_the_same_seeds():
    # compare_performance runs A as stream 0 and B as stream 1 of each seed
    # (derive_seeds); a sweep runs setting i as stream i. So a sweep whose two settings
    # are A's and B's factories' keywords repeats both agents' runs exactly.
    good = agent_factory(tdkit.QLearning, step_size=0.5, exploration=0.1)
    slow = agent_factory(tdkit.QLearning, step_size=0.05, exploration=0.1)
    comparison = tdkit.verify.compare_performance(good, slow, MAKE_ENV, range(3), episodes=15,
                                                  eval_episodes=4, max_episode_steps=100)
    sweep = run_sweep(MAKE_Q, MAKE_ENV, seeds=range(3), episodes=15, eval_episodes=4,
                      max_episode_steps=100, max_workers=1,
                      settings=[{"step_size": 0.5}, {"step_size": 0.05}])
    assert comparison.a.scores == tuple(sweep.scores()[0])
    assert comparison.b.scores == tuple(sweep.scores()[1])
    # And A alone, swept over the same seeds, is A's sample.
    alone = run_sweep(good, MAKE_ENV, seeds=range(3), episodes=15, eval_episodes=4,
                      max_episode_steps=100, max_workers=1)
    assert tuple(alone.scores()[0]) == comparison.a.scores
    # One summary type: the comparison's and the sweep's summaries are the same object kind
    # and the same numbers for the same scores.
    row = sweep.summary(n_resamples=2000, seed=0)[0]
    assert type(row) is type(comparison.a)
    assert (row.mean, row.iqm, row.scores) == (comparison.a.mean, comparison.a.iqm,
                                               comparison.a.scores)

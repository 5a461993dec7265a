"""The built-in demo: several learners learn a restocking policy, checked against the optimum.

Run it with ``python -m tdkit demo`` (about a minute on two cores; ``--quick``
for a few seconds). It trains Q-learning, Expected SARSA and Double
Q-learning over several seeds on :class:`tdkit.envs.inventory.InventoryEnv`
(action masks from ``info``, episodes that end by a time limit), then scores
each learned greedy policy *exactly*: :func:`tdkit.evaluate_policy` on the
scenario's finite model gives its discounted value, which is compared with
the optimum from :func:`tdkit.value_iteration`. It prints one table row per
learner, explains where and why the learned orders differ from the optimal
ones, and writes two PNG figures (learning curves with bands across seeds;
learned vs optimal orders by stock level) when matplotlib is installed.

All numbers of the scenario are invented; they are not business advice.
"""

from __future__ import annotations

import dataclasses
import os
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from ._errors import InvalidParameterError
from ._validation import require_positive_int
from .agent_greedy import agent_policy
from .dp import evaluate_policy, value_iteration
from .envs.finite import FiniteMDP
from .envs.inventory import InventoryEnv
from .learners import DoubleQLearning, ExpectedSarsa, QLearning
from .runs.training import train

__all__ = ["DEMO_LEARNERS", "DemoResult", "LearnerResult", "run_demo"]

#: The learners the demo compares (display name -> class), all with the same
#: constant step size 0.1 and ε-greedy exploration with ε = 0.2.
DEMO_LEARNERS: dict[str, type] = {
    "Q-learning": QLearning,
    "Expected SARSA": ExpectedSarsa,
    "Double Q-learning": DoubleQLearning,
}

_STEP_SIZE = 0.1
_EPSILON = 0.2
_DOCS = "docs/index.md"
# Two orders whose optimal action values differ by less than this count as equally good.
_TIE = 1e-6


@dataclasses.dataclass(frozen=True)
class LearnerResult:
    """One learner over all seeds.

    Attributes
    ----------
    name : str
    values : numpy.ndarray, shape (seeds,)
        Exact discounted value of each run's greedy policy, averaged over the
        uniform starting stock.
    optimal_share : numpy.ndarray, shape (seeds,)
        Share of stock levels where the greedy order is an optimal order.
    orders : numpy.ndarray, shape (seeds, stock levels)
        The greedy order at each stock level.
    visits : numpy.ndarray, shape (seeds, stock levels)
        Training steps taken at each stock level.
    tries : numpy.ndarray, shape (seeds, stock levels)
        Updates of the (stock level, optimal order) pair during training: how
        often the optimal order was tried there.
    returns : numpy.ndarray, shape (seeds, episodes)
        Per-episode (undiscounted) training returns.
    seconds : numpy.ndarray, shape (seeds,)
        Wall-clock training time of each run.
    """

    name: str
    values: np.ndarray
    optimal_share: np.ndarray
    orders: np.ndarray
    visits: np.ndarray
    tries: np.ndarray
    returns: np.ndarray
    seconds: np.ndarray


@dataclasses.dataclass(frozen=True)
class DemoResult:
    """Everything the demo computed.

    Attributes
    ----------
    optimum : float
        Exact optimal discounted value from a uniform starting stock.
    optimal_orders : numpy.ndarray
        An optimal order per stock level (value iteration).
    baseline : float
        Exact discounted value of the naive rule "fill the shelf every week".
    learners : dict of str to LearnerResult
    figures : list of pathlib.Path
        The PNG files written (empty without matplotlib or with figures off).
    """

    optimum: float
    optimal_orders: np.ndarray
    baseline: float
    learners: dict[str, LearnerResult]
    figures: list[Path]


@dataclasses.dataclass(frozen=True)
class _Run:
    """What one training run hands back (picklable, for worker processes)."""

    orders: np.ndarray
    visits: np.ndarray
    pair_visits: np.ndarray
    returns: np.ndarray
    seconds: float


def _train_one(name: str, run_seed: int, episodes: int, bar: Any = None) -> _Run:
    """Train one learner on a fresh scenario; its greedy orders, visit counts and returns."""
    env = InventoryEnv()
    agent = DEMO_LEARNERS[name].for_env(env, step_size=_STEP_SIZE, exploration=_EPSILON,
                                        seed=run_seed)

    def tick(history: Any, agent: Any) -> None:
        bar.update(1)  # returns True when it redraws: never hand that to train (it would stop)

    callbacks = () if bar is None else (tick,)
    began = time.perf_counter()
    history = train(agent, env, episodes=episodes, seed=run_seed, callbacks=callbacks)
    seconds = time.perf_counter() - began
    # The greedy order per stock level, asked with the scenario's masks (lost sales:
    # model state i is stock level i, the observation itself).
    orders = agent_policy(agent, env.finite_mdp())
    # One-step learners make one update per step, so the update counts per (stock, order)
    # are the steps taken there, and their row sums the steps at each stock level.
    pair_visits = np.array(agent.visits)
    return _Run(orders=orders, visits=pair_visits.sum(axis=1), pair_visits=pair_visits,
                returns=history.returns, seconds=seconds)


def _progress(total: int, enabled: bool, echo: Callable[[str], Any]) -> Any:
    """A tqdm bar over all training episodes, or None (with a note when tqdm is missing)."""
    if not enabled:
        return None
    try:
        from tqdm.auto import tqdm
    except ImportError:
        echo("  (no progress bar: tqdm is not installed; pip install 'tdkit[demo]' adds it)")
        return None
    return tqdm(total=total, unit="episode", desc="training", leave=False)


def _finite_horizon_return(mdp: FiniteMDP, policy: np.ndarray, start: np.ndarray,
                           weeks: int) -> float:
    """Expected undiscounted profit of ``weeks`` weeks under ``policy`` from ``start``."""
    states = np.arange(mdp.n_states)
    chain = mdp.P[states, policy]
    reward = mdp.R[states, policy]
    dist = start.copy()
    total = 0.0
    for _ in range(weeks):
        total += float(dist @ reward)
        dist = dist @ chain
    return total


def run_demo(
    *,
    episodes: int = 2000,
    seeds: int = 5,
    seed: int = 0,
    out: str | Path | None = "tdkit-demo",
    progress: bool = True,
    echo: Callable[[str], Any] = print,
    learners: Sequence[str] | None = None,
    jobs: int | None = None,
) -> DemoResult:
    """Train the demo's learners, print the comparison, write the figures.

    Parameters
    ----------
    episodes : int, default 2000
        Training episodes (52 weeks each) per learner and seed.
    seeds : int, default 5
        Independent runs per learner. Run ``k`` of every learner sees the same
        demand streams (common random numbers), so differences are the
        learners'.
    seed : int, default 0
        Root seed of the whole demo.
    out : path-like or None, default "tdkit-demo"
        Folder for the PNG figures (created if needed); None writes none.
    progress : bool, default True
        Show a tqdm progress bar (if tqdm is installed).
    echo : callable, default print
        Receives each output line.
    learners : sequence of str, optional
        Names from :data:`DEMO_LEARNERS` (default: all of them).
    jobs : int, optional
        Worker processes for the runs (default: one per CPU core, at most one
        per run); 1 trains in this process. Results do not depend on it.

    Returns
    -------
    DemoResult

    Raises
    ------
    InvalidParameterError
        On a count that is not a positive int, a negative seed or an unknown
        learner name.

    Examples
    --------
    >>> lines = []
    >>> result = run_demo(episodes=20, seeds=2, out=None, progress=False,
    ...                   learners=["Q-learning"], echo=lines.append)
    >>> bool(result.learners["Q-learning"].values.max() <= result.optimum + 1e-6)
    True
    """
    episodes = require_positive_int("run_demo", "episodes", episodes)
    seed = require_positive_int("run_demo", "seed", seed, minimum=0)
    seeds = require_positive_int("run_demo", "seeds", seeds)
    if jobs is not None:
        jobs = require_positive_int("run_demo", "jobs", jobs)
    names = list(DEMO_LEARNERS) if learners is None else list(learners)
    unknown = [n for n in names if n not in DEMO_LEARNERS]
    if unknown or not names:
        raise InvalidParameterError(
            f"run_demo: learners must be names from {list(DEMO_LEARNERS)}; got {learners!r}."
        )

    env = InventoryEnv()
    n = env.capacity + 1
    mdp = env.finite_mdp()
    optimum = value_iteration(mdp, tol=1e-8)
    start = np.asarray(mdp.initial)  # reset draws the starting stock uniformly
    best = float(start @ optimum.v)
    fill = np.array([env.capacity - s for s in range(n)])
    baseline = float(start @ evaluate_policy(mdp, fill))

    echo("tdkit demo: learning a weekly restocking policy (invented shop, invented numbers)")
    echo(
        f"  shelf 0..{env.capacity} units; Poisson demand, mean {env.mean_demand:g}/week; "
        f"sale price {env.price:g}, unit cost {env.unit_cost:g}, order fee {env.order_fee:g}, "
        f"holding {env.holding_cost:g}/unit/week, lost sale {env.lost_sale_penalty:g}/unit"
    )
    echo(
        f"  {len(names)} learners x {seeds} seeds x {episodes} episodes of {env.weeks} weeks "
        f"(step size {_STEP_SIZE:g}, epsilon-greedy {_EPSILON:g}, gamma {env.gamma:g})"
    )

    run_seeds = [int(s) for s in np.random.SeedSequence(seed).generate_state(seeds)]
    tasks = [(name, k, run_seed) for name in names for k, run_seed in enumerate(run_seeds)]
    jobs = min(len(tasks), os.cpu_count() or 1) if jobs is None else jobs
    bar = _progress(len(tasks) * episodes, progress, echo)
    began = time.perf_counter()
    runs: dict[tuple[str, int], _Run] = {}
    try:
        if jobs == 1 or len(tasks) == 1:
            for name, k, run_seed in tasks:
                if bar is not None:
                    bar.set_description(f"{name}, seed {k + 1}/{seeds}")
                runs[name, k] = _train_one(name, run_seed, episodes, bar)
        else:
            from concurrent.futures import ProcessPoolExecutor, as_completed

            with ProcessPoolExecutor(max_workers=jobs) as pool:
                futures = {
                    pool.submit(_train_one, name, run_seed, episodes): (name, k)
                    for name, k, run_seed in tasks
                }
                for future in as_completed(futures):
                    name, k = futures[future]
                    runs[name, k] = future.result()
                    if bar is not None:
                        bar.set_description(f"done: {name}, seed {k + 1}")
                        bar.update(episodes)
    finally:
        if bar is not None:
            bar.close()
    elapsed = time.perf_counter() - began
    echo(f"  trained {len(tasks)} runs in {elapsed:.0f} s of wall-clock time "
         f"({jobs} worker process{'es' if jobs > 1 else ''})")

    states = np.arange(n)
    best_q = optimum.q.max(axis=1)
    results: dict[str, LearnerResult] = {}
    for name in names:
        mine = [runs[name, k] for k in range(seeds)]
        orders = np.array([r.orders for r in mine])
        results[name] = LearnerResult(
            name=name,
            values=np.array([float(start @ evaluate_policy(mdp, o)) for o in orders]),
            optimal_share=(optimum.q[states, orders] >= best_q - _TIE).mean(axis=1),
            orders=orders,
            visits=np.array([r.visits for r in mine]),
            tries=np.array([r.pair_visits[states, optimum.policy] for r in mine]),
            returns=np.array([r.returns for r in mine]),
            seconds=np.array([r.seconds for r in mine]),
        )

    _print_table(echo, results, best, baseline, n)
    _explain(echo, results, optimum.q)
    figures: list[Path] = []
    if out is not None:
        figures = _figures(
            echo, Path(out), results, optimum.policy,
            _finite_horizon_return(mdp, np.asarray(optimum.policy), start, env.weeks),
            env.weeks,
        )
    echo(
        f"Next: {_DOCS} in the tdkit repository -- own-simulator.md trains on your own "
        "simulator, saving.md saves and resumes runs, testing-your-agent.md checks your agent."
    )
    return DemoResult(optimum=best, optimal_orders=np.asarray(optimum.policy).copy(),
                      baseline=baseline, learners=results, figures=figures)


def _print_table(echo: Callable[[str], Any], results: dict[str, LearnerResult], best: float,
                 baseline: float, n: int) -> None:
    echo("")
    echo("Exact discounted value of each greedy policy (tdkit.evaluate_policy on the model,")
    echo("uniform starting stock); mean +- standard deviation over seeds:")
    header = (f"  {'learner':<20} {'value':>16} {'gap to optimum':>17} "
              f"{'optimal orders':>15} {'time/run':>9}")
    echo(header)
    echo("  " + "-" * (len(header) - 2))
    for r in results.values():
        mean = r.values.mean()
        sd = r.values.std(ddof=1) if r.values.size > 1 else 0.0
        gap = best - mean
        share = r.optimal_share.mean()
        echo(
            f"  {r.name:<20} {mean:9.1f} +- {sd:4.1f} {gap:8.1f} ({100 * gap / abs(best):4.1f}%) "
            f"{share * n:6.1f}/{n} ({100 * share:3.0f}%) {r.seconds.mean():7.1f} s"
        )
    echo(f"  {'optimum (value it.)':<20} {best:9.1f}         {0.0:8.1f} ( 0.0%) "
         f"{n:6d}/{n} (100%)")
    echo(f"  {'fill shelf weekly':<20} {baseline:9.1f}         {best - baseline:8.1f} "
         f"({100 * (best - baseline) / abs(best):4.1f}%)")


def _explain(echo: Callable[[str], Any], results: dict[str, LearnerResult],
             q: np.ndarray) -> None:
    """Per stock level: how often learners got the order wrong, how often that level and its
    optimal order were visited, and what the wrong orders cost; then the reading of it."""
    orders = np.concatenate([r.orders for r in results.values()])  # (runs, S)
    visits = np.concatenate([r.visits for r in results.values()]).astype(float)
    tries = np.concatenate([r.tries for r in results.values()]).astype(float)
    runs, n = orders.shape
    best_q = q.max(axis=1)
    lost = best_q[None, :] - q[np.arange(n)[None, :], orders]  # (runs, S), >= 0
    wrong = lost > _TIE
    share = 100 * visits.sum(axis=0) / visits.sum()
    echo("")
    echo(f"Where the learned orders differ from the optimal ones ({runs} runs):")
    echo(f"  {'stock':>5} {'wrong in':>9} {'steps here':>11} {'optimal order tried':>20} "
         f"{'value lost when wrong':>22}")
    for s in range(n):
        cost = f"{lost[wrong[:, s], s].mean():8.2f}" if wrong[:, s].any() else f"{'-':>8}"
        echo(f"  {s:>5} {100 * wrong[:, s].mean():8.0f}% {share[s]:10.1f}% "
             f"{np.median(tries[:, s]):15.0f} times {cost:>18}")
    if not wrong.any():
        echo("  Every learned policy orders an optimal amount at every stock level.")
        return
    echo("  ('optimal order tried': median over runs of the updates of that stock level and")
    echo("  its optimal order; 'value lost': optimal minus learned action value, q*(s, a*) -")
    echo("  q*(s, a), in money units of discounted profit.)")
    hit, miss = tries[~wrong], tries[wrong]
    echo(
        f"  Why: where a run got the order wrong, it had tried the optimal order a median of "
        f"{np.median(miss):.0f} times, against {np.median(hit):.0f} where it got it right." if
        hit.size else "  Why: no stock level was learned right in every run yet."
    )
    echo("  A learner tries an order other than its current favourite only on exploration steps")
    echo(f"  (epsilon = {_EPSILON:g}, spread over up to {n} orders), so at the stock levels where"
         " many")
    echo("  orders fit the shelf the optimal one is rarely tried and its value estimate stays")
    echo("  noisy. Each mistake is cheap on its own: near the best order the choices are almost")
    echo(f"  equally good (a wrong order, then optimal play, loses {lost[wrong].mean():.1f} on "
         f"average against an")
    echo(f"  optimum worth {best_q.mean():.0f}); the gap column adds up every mistake along the "
         "way.")
    echo("  More episodes, more exploration or a decaying step size (tdkit.schedules) close the")
    echo("  gap.")


def _figures(echo: Callable[[str], Any], out: Path, results: dict[str, LearnerResult],
             policy: np.ndarray, optimal_return: float, weeks: int) -> list[Path]:
    try:
        from matplotlib.figure import Figure
    except ImportError:
        echo("")
        echo("No figures: matplotlib is not installed (pip install 'tdkit[demo]' adds it).")
        return []
    from .plot import plot_returns

    out.mkdir(parents=True, exist_ok=True)
    paths = [out / "learning_curves.png", out / "orders_by_stock.png"]
    episodes = next(iter(results.values())).returns.shape[1]
    seeds = next(iter(results.values())).returns.shape[0]

    fig = Figure(figsize=(8, 5), layout="constrained")
    ax = fig.add_subplot()
    window = max(1, min(50, episodes // 10))
    plot_returns({r.name: r.returns for r in results.values()}, ax=ax, window=window,
                 ci=seeds >= 2)
    ax.axhline(optimal_return, color="black", linestyle="--", linewidth=1,
               label="optimal policy (exact expectation)")
    ax.set_title(f"Learning curves on the inventory scenario ({seeds} seeds each; "
                 "band: 95% bootstrap CI of the mean)", fontsize=10)
    ax.set_xlabel("training episode (one episode = 52 weeks)" if weeks == 52
                  else f"training episode (one episode = {weeks} weeks)")
    ax.set_ylabel(f"profit per episode, money units\n(moving average of {window} episodes)")
    ax.legend(loc="lower right", fontsize=9, title="training returns include "
              f"epsilon = {_EPSILON:g} exploration", title_fontsize=8)
    ax.grid(alpha=0.3)
    fig.savefig(paths[0], dpi=110)

    fig = Figure(figsize=(8, 7), layout="constrained")
    top, bottom = fig.subplots(2, 1, sharex=True, height_ratios=(2, 1))
    n = len(policy)
    stock = np.arange(n)
    top.plot(stock, policy, "s-", color="black", linewidth=1.5, markersize=7,
             label="optimal (value iteration)")
    offsets = np.linspace(-0.2, 0.2, len(results))
    for dx, r in zip(offsets, results.values(), strict=True):
        mean = r.orders.mean(axis=0)
        low, high = r.orders.min(axis=0), r.orders.max(axis=0)
        top.errorbar(stock + dx, mean, yerr=[mean - low, high - mean], fmt="o", capsize=3,
                     markersize=5, label=f"{r.name} (mean, min-max over seeds)")
    top.set_title("Weekly order by stock level: learned greedy policies vs the optimum",
                  fontsize=10)
    top.set_ylabel("order placed, units")
    top.legend(fontsize=8)
    top.grid(alpha=0.3)
    width = 0.8 / len(results)
    for i, r in enumerate(results.values()):
        bottom.bar(stock - 0.4 + width * (i + 0.5), np.median(r.tries, axis=0), width=width,
                   label=r.name)
    bottom.set_yscale("log")
    bottom.set_title("How often the optimal order was tried at each stock level during training",
                     fontsize=10)
    bottom.set_ylabel("updates (median over seeds,\nlog scale)")
    bottom.set_xlabel("stock on the shelf at the start of the week, units")
    bottom.set_xticks(stock)
    bottom.legend(fontsize=8)
    bottom.grid(alpha=0.3, axis="y")
    fig.savefig(paths[1], dpi=110)

    echo("")
    echo(f"Figures written to {out.resolve()}:")
    for path in paths:
        echo(f"  {path.name}")
    return paths

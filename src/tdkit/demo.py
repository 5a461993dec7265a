"""The built-in demo: learn a restocking policy for the inventory scenario.

Run it with ``python -m tdkit demo``. It trains Q-learning on
:class:`tdkit.envs.inventory.InventoryEnv` (action masks from ``info``,
episodes that end by a time limit) and compares the learned greedy policy
with simple ordering rules on the same evaluation seeds, and with the exact
optimum that value iteration computes from the scenario's transition model.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from .dp import evaluate_policy, value_iteration
from .envs.finite import FiniteMDP
from .envs.inventory import InventoryEnv
from .learners import QLearning
from .runs.training import evaluate, train

__all__ = ["run_demo"]


class _FixedRule:
    """A non-learning agent that follows ``rule(stock) -> order``."""

    def __init__(self, rule: Callable[[int], int]) -> None:
        self._rule = rule

    def act(self, obs: Any, *, mask: Any = None, explore: bool = True) -> int:
        return self._rule(int(obs))

    def observe(self, *args: Any, **kwargs: Any) -> None:
        pass

    def update(self) -> tuple[float, ...]:
        return ()


def run_demo(
    *, episodes: int = 3000, eval_episodes: int = 200, seed: int = 0, echo: Callable = print
) -> dict[str, float]:
    """Train, evaluate and print a comparison table; return the mean returns."""
    env = InventoryEnv()
    echo("tdkit demo: weekly restocking of one product (invented numbers)")
    echo(
        f"  shelf 0..{env.capacity} units, Poisson demand (mean {env.mean_demand:g}/week), "
        f"{env.weeks}-week horizon ending by time limit, gamma={env.gamma:g}"
    )
    agent = QLearning.for_env(env, step_size=0.1, exploration=0.1, seed=seed)
    history = train(agent, env, episodes=episodes, seed=seed)
    first = history.returns[: episodes // 10].mean()
    last = history.returns[-(episodes // 10):].mean()
    echo(
        f"  trained Q-learning for {len(history)} episodes ({history.total_steps} steps): "
        f"mean return of first tenth {first:.1f}, of last tenth {last:.1f}"
    )
    capacity = env.capacity
    P, R = env.transition_model()
    mdp = FiniteMDP(P, R, gamma=env.gamma)
    optimum = value_iteration(mdp, tol=1e-8)
    contenders = {
        "optimal policy (value iteration)": _FixedRule(lambda s: int(optimum.policy[s])),
        "learned greedy policy": agent,
        "order up to 6 when empty-ish (<=2)": _FixedRule(lambda s: 6 - s if s <= 2 else 0),
        "fill the shelf every week": _FixedRule(lambda s: capacity - s),
        "never order": _FixedRule(lambda s: 0),
    }
    results: dict[str, float] = {}
    echo(f"  greedy evaluation over {eval_episodes} episodes (same seeds for every policy):")
    width = max(len(k) for k in contenders)
    for name, policy in contenders.items():
        returns = evaluate(policy, env, episodes=eval_episodes, seed=seed + 1)
        sem = returns.std(ddof=1) / np.sqrt(len(returns))
        results[name] = float(returns.mean())
        echo(f"    {name:<{width}}  mean profit per horizon {returns.mean():9.1f} ± {sem:.1f}")
    echo("  (± is one standard error of the mean.)")

    # Exact check: the discounted value the learner optimises, from the model.
    greedy = np.array(
        [agent.act(s, mask=env.action_mask(s), explore=False) for s in range(capacity + 1)]
    )
    v_learned = evaluate_policy(mdp, greedy)
    start = np.full(capacity + 1, 1.0 / (capacity + 1))  # reset draws the stock uniformly
    best, got = float(start @ optimum.v), float(start @ v_learned)
    results["exact optimum (discounted)"] = best
    results["learned policy (discounted)"] = got
    echo(
        f"  exact discounted value (gamma={env.gamma:g}, by value iteration on the model): "
        f"optimum {best:.1f}, learned policy {got:.1f} ({100 * got / best:.1f}% of optimum)"
    )
    echo(f"  learned orders by stock level 0..{capacity}: {greedy.tolist()}")
    echo(f"  optimal orders by stock level 0..{capacity}: {optimum.policy.tolist()}")
    return results

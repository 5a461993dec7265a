"""Built-in demo scenario: weekly inventory restocking of one product.

A shop holds between 0 and ``capacity`` units. Each week the manager orders
``q`` units (delivered at once, so only orders that fit the shelf are
allowed: the others are masked), random customer demand arrives, unmet demand
is lost, and the week's profit is the reward::

    profit = price * sold - unit_cost * q - order_fee * [q > 0]
             - holding_cost * left_over - lost_sale_penalty * (demand - sold)

Demand is Poisson with mean ``mean_demand``. The business does not end, so an
episode is a planning horizon of ``weeks`` weeks that ends by a *time limit*
(``truncated``), never by a terminal state: learners must bootstrap there.

All numbers are invented for the demo; they describe no real business.
This is a toy: a policy learned here is not advice for a real shop (validate
in simulation, keep a person responsible for real orders).
"""

from __future__ import annotations

import math
from typing import Any, ClassVar

import gymnasium as gym
import numpy as np

from .._validation import require_in_range, require_positive_int, require_real

__all__ = ["InventoryEnv"]


class InventoryEnv(gym.Env):
    """Weekly restocking with Poisson demand, lost sales and a shelf limit.

    Parameters
    ----------
    capacity : int, default 10
        Shelf size; states are stock levels ``0..capacity``.
    mean_demand : float, default 3.0
        Mean weekly demand (Poisson).
    price, unit_cost, order_fee, holding_cost, lost_sale_penalty : float
        Money per unit sold, per unit ordered, per non-empty order, per unit
        left on the shelf at the end of the week, per unit of unmet demand.
    weeks : int, default 52
        Planning horizon; reaching it truncates the episode.
    gamma : float, default 0.99
        The discount the scenario is meant to be solved with (exposed as
        ``env.unwrapped.gamma``; the env itself does not discount).

    Notes
    -----
    ``info["action_mask"]`` marks the order sizes that fit on the shelf.
    :meth:`transition_model` gives the exact model for dynamic programming.
    """

    metadata: ClassVar[dict[str, Any]] = {"render_modes": []}

    def __init__(
        self,
        *,
        capacity: int = 10,
        mean_demand: float = 3.0,
        price: float = 10.0,
        unit_cost: float = 4.0,
        order_fee: float = 5.0,
        holding_cost: float = 0.5,
        lost_sale_penalty: float = 2.0,
        weeks: int = 52,
        gamma: float = 0.99,
    ) -> None:
        self.capacity = require_positive_int("InventoryEnv", "capacity", capacity)
        self.mean_demand = require_in_range(
            "InventoryEnv", "mean_demand", mean_demand, 0.0, math.inf, low_open=True
        )
        self.price = require_real("InventoryEnv", "price", price)
        self.unit_cost = require_real("InventoryEnv", "unit_cost", unit_cost)
        self.order_fee = require_real("InventoryEnv", "order_fee", order_fee)
        self.holding_cost = require_real("InventoryEnv", "holding_cost", holding_cost)
        self.lost_sale_penalty = require_real(
            "InventoryEnv", "lost_sale_penalty", lost_sale_penalty
        )
        self.weeks = require_positive_int("InventoryEnv", "weeks", weeks)
        self.gamma = require_in_range("InventoryEnv", "gamma", gamma, 0.0, 1.0)
        self.observation_space = gym.spaces.Discrete(self.capacity + 1)
        self.action_space = gym.spaces.Discrete(self.capacity + 1)
        self._stock = 0
        self._week = 0

    def action_mask(self, stock: int) -> np.ndarray:
        """Orders that fit: ``stock + q <= capacity``."""
        return np.arange(self.capacity + 1) <= self.capacity - stock

    def _profit(self, stock: int, order: int, demand: int) -> tuple[int, float]:
        available = stock + order
        sold = min(demand, available)
        left = available - sold
        profit = (
            self.price * sold
            - self.unit_cost * order
            - (self.order_fee if order > 0 else 0.0)
            - self.holding_cost * left
            - self.lost_sale_penalty * (demand - sold)
        )
        return left, profit

    def reset(
        self, *, seed: int | None = None, options: dict[str, Any] | None = None
    ) -> tuple[int, dict[str, Any]]:
        super().reset(seed=seed)
        start = None if options is None else options.get("stock")
        self._stock = (
            int(self.np_random.integers(self.capacity + 1)) if start is None else int(start)
        )
        self._week = 0
        return self._stock, {"action_mask": self.action_mask(self._stock)}

    def step(self, action: Any) -> tuple[int, float, bool, bool, dict[str, Any]]:
        order = int(action)
        if not 0 <= order <= self.capacity - self._stock:
            raise ValueError(
                f"InventoryEnv: order {action!r} does not fit a shelf holding {self._stock} of "
                f"{self.capacity}; allowed orders are 0..{self.capacity - self._stock} "
                "(see info['action_mask'])."
            )
        demand = int(self.np_random.poisson(self.mean_demand))
        self._stock, profit = self._profit(self._stock, order, demand)
        self._week += 1
        info = {"action_mask": self.action_mask(self._stock), "demand": demand}
        return self._stock, float(profit), False, self._week >= self.weeks, info

    def transition_model(self) -> tuple[np.ndarray, np.ndarray]:
        """Exact ``P (S, A, S)`` and expected rewards ``R (S, A)``.

        Orders that do not fit the shelf are modelled as "order nothing"
        rows so the arrays are complete; a masked learner never takes them.
        Demand above ``2 * capacity + 20`` is lumped into the tail mass; its
        sales are capped by the stock, so only the lost-sale term needs the
        tail mean, which is computed exactly from the Poisson mean.
        """
        n = self.capacity + 1
        lam = self.mean_demand
        d_max = 2 * self.capacity + 20
        pmf = np.array(
            [math.exp(-lam + d * math.log(lam) - math.lgamma(d + 1)) for d in range(d_max)]
        )
        tail = max(0.0, 1.0 - pmf.sum())
        tail_mean = lam - float(np.arange(d_max) @ pmf)  # E[D; D >= d_max]
        P = np.zeros((n, n, n))
        R = np.zeros((n, n))
        for s in range(n):
            for q in range(n):
                order = q if s + q <= self.capacity else 0
                for d, p in enumerate(pmf):
                    left, profit = self._profit(s, order, d)
                    P[s, q, left] += p
                    R[s, q] += p * profit
                # tail: everything sells out (d >= d_max > stock)
                available = s + order
                P[s, q, 0] += tail
                R[s, q] += (
                    tail
                    * (
                        self.price * available
                        - self.unit_cost * order
                        - (self.order_fee if order > 0 else 0.0)
                        + self.lost_sale_penalty * available
                    )
                    - self.lost_sale_penalty * tail_mean
                )
        return P, R

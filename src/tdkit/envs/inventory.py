"""Built-in demo scenario: weekly inventory restocking of one product.

A shop holds between 0 and ``capacity`` units. Each week the manager orders
``q`` units (delivered at once, so only orders that fit the shelf are
allowed: the others are masked), random customer demand arrives, unmet demand
is lost, and the week's profit is the reward::

    profit = price * sold - unit_cost * q - order_fee * [q > 0]
             - holding_cost * left_over - lost_sale_penalty * (demand - sold)

With ``backlog=True`` unmet demand waits instead: the stock goes negative
(down to ``-max_backlog``), customers pay when they order, and every unit
still owed at the end of a week costs ``backorder_cost``. With ``y = stock +
q`` and ``taken = min(demand, y + max_backlog)``::

    profit = price * taken - unit_cost * q - order_fee * [q > 0]
             - holding_cost * max(y - taken, 0) - backorder_cost * max(taken - y, 0)
             - lost_sale_penalty * (demand - taken)

Demand beyond the backlog limit is lost (the stock stops at
``-max_backlog``); after an order up to ``y >= 0`` that needs a week's
demand above ``max_backlog``, below one week in 10^9 at the defaults.

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

from .._errors import InvalidParameterError
from .._validation import require_in_range, require_positive_int, require_real
from .finite import FiniteMDP

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
    backlog : bool, default False
        Unmet demand waits (negative stock) instead of being lost.
    max_backlog : int, default 20
        With ``backlog``: the lowest stock level is ``-max_backlog``.
    backorder_cost : float, default 2.0
        With ``backlog``: money per unit owed at the end of a week.

    Notes
    -----
    Observations are stock levels, ``0..capacity`` (``-max_backlog..capacity``
    with ``backlog``; ``observation_space.start`` is the lowest); actions are
    order sizes ``0..capacity - lowest``. ``info["action_mask"]`` marks the
    orders that fit on the shelf. :meth:`transition_model` and
    :meth:`finite_mdp` give the exact model for dynamic programming, with
    state ``i`` the stock level ``stock_levels[i]``.

    Examples
    --------
    >>> env = InventoryEnv(capacity=4, backlog=True, max_backlog=3)
    >>> env.stock_levels.tolist()
    [-3, -2, -1, 0, 1, 2, 3, 4]
    >>> env.action_mask(2).tolist()        # from stock 2, orders 0..2 fit a shelf of 4
    [True, True, True, False, False, False, False, False]
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
        backlog: bool = False,
        max_backlog: int = 20,
        backorder_cost: float = 2.0,
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
        if not isinstance(backlog, (bool, np.bool_)):
            raise InvalidParameterError(
                f"InventoryEnv: backlog must be True (unmet demand waits) or False (it is "
                f"lost); got {backlog!r}."
            )
        self.backlog = bool(backlog)
        self.max_backlog = require_positive_int("InventoryEnv", "max_backlog", max_backlog)
        self.backorder_cost = require_real("InventoryEnv", "backorder_cost", backorder_cost)
        self._lowest = -self.max_backlog if self.backlog else 0
        n = self.capacity - self._lowest + 1
        self.observation_space = gym.spaces.Discrete(n, start=self._lowest)
        self.action_space = gym.spaces.Discrete(n)
        self._stock = 0
        self._week = 0

    @property
    def stock_levels(self) -> np.ndarray:
        """The stock level of each model state: ``lowest..capacity``."""
        return np.arange(self._lowest, self.capacity + 1)

    def action_mask(self, stock: int) -> np.ndarray:
        """Orders that fit: ``stock + q <= capacity``."""
        return np.arange(self.capacity - self._lowest + 1) <= self.capacity - stock

    def _profit(self, stock: int, order: int, demand: int) -> tuple[int, float]:
        """Next stock level and the week's profit (the one definition of the dynamics)."""
        level = stock + order
        base = -self.unit_cost * order - (self.order_fee if order > 0 else 0.0)
        if self.backlog:
            taken = min(demand, level - self._lowest)  # sold now or owed; the rest is lost
            left = level - taken
            return left, (
                base + self.price * taken - self.holding_cost * max(left, 0)
                - self.backorder_cost * max(-left, 0)
                - self.lost_sale_penalty * (demand - taken)
            )
        sold = min(demand, level)
        left = level - sold
        profit = (
            base + self.price * sold
            - self.holding_cost * left
            - self.lost_sale_penalty * (demand - sold)
        )
        return left, profit

    def reset(
        self, *, seed: int | None = None, options: dict[str, Any] | None = None
    ) -> tuple[int, dict[str, Any]]:
        super().reset(seed=seed)
        start = None if options is None else options.get("stock")
        if start is not None and (
            isinstance(start, bool) or not isinstance(start, (int, np.integer))
            or not self._lowest <= start <= self.capacity
        ):
            raise InvalidParameterError(
                f"InventoryEnv.reset: options['stock'] must be an int in "
                f"{self._lowest}..{self.capacity}; got {start!r}."
            )
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

    def _demand(self, top: int) -> tuple[np.ndarray, float, float]:
        """Poisson pmf on ``0..top - 1``, the tail mass ``P(D >= top)`` and ``E[D; D >= top]``."""
        lam = self.mean_demand
        d = np.arange(top)
        log_pmf = -lam + d * math.log(lam) - np.array([math.lgamma(k + 1) for k in d])
        pmf = np.exp(log_pmf)
        tail = max(0.0, 1.0 - float(pmf.sum()))
        tail_mean = max(0.0, lam - float(d @ pmf))  # E[D; D >= top]
        return pmf, tail, tail_mean

    def transition_model(self) -> tuple[np.ndarray, np.ndarray]:
        """Exact ``P (S, A, S)`` and expected rewards ``R (S, A)``.

        State ``i`` is the stock level ``stock_levels[i]``. Orders that do not
        fit the shelf are modelled as "order nothing" rows so the arrays are
        complete; a masked learner never takes them. Demand from ``top`` up
        (``top`` beyond every stock level, at least ``2 * capacity + 20``) is
        one lumped outcome: it empties the shelf (lost sales) or reaches the
        lowest level (backlog), and its expected rewards use the exact tail
        mass and tail mean of the Poisson law, so the model is exact.
        """
        levels = self.stock_levels
        n = levels.size
        top = max(2 * self.capacity + 20, self.capacity - self._lowest + 1)
        pmf, tail, tail_mean = self._demand(top)
        demand = np.arange(top)
        # Per order-up-to level y: the next state's distribution and the expected
        # reward without the ordering cost (which depends on the order, not on y).
        nxt = np.zeros((n, n))
        gain = np.zeros(n)
        for i, y in enumerate(levels):
            for d, p in zip(demand, pmf, strict=True):
                left, profit = self._profit(int(y), 0, int(d))
                nxt[i, left - self._lowest] += p
                gain[i] += p * profit
            if self.backlog:  # every tail demand exceeds y - lowest: the stock hits the bottom
                room = y - self._lowest
                nxt[i, 0] += tail
                gain[i] += (
                    self.price * room * tail - self.backorder_cost * (-self._lowest) * tail
                    - self.lost_sale_penalty * (tail_mean - room * tail)
                )
            else:  # every tail demand exceeds y: all y units sell
                nxt[i, 0] += tail
                gain[i] += (
                    self.price * y * tail - self.lost_sale_penalty * (tail_mean - y * tail)
                )
        P = np.zeros((n, n, n))
        R = np.zeros((n, n))
        for i, x in enumerate(levels):
            for q in range(n):
                order = q if x + q <= self.capacity else 0
                P[i, q] = nxt[i + order]
                R[i, q] = (
                    gain[i + order] - self.unit_cost * order
                    - (self.order_fee if order > 0 else 0.0)
                )
        return P, R

    def finite_mdp(self) -> FiniteMDP:
        """The exact model as a :class:`tdkit.FiniteMDP` with the scenario's discount.

        Its start distribution is that of :meth:`reset` (uniform over
        ``0..capacity``) and its action masks are :meth:`action_mask`'s, so the
        solvers and :func:`tdkit.agent_policy` only consider orders that fit.
        State ``i`` is the stock level ``stock_levels[i]``, the observation
        itself without backlog; with backlog, ask an agent about
        ``stock_levels[i]``, not ``i``.

        Examples
        --------
        >>> from tdkit import value_iteration
        >>> mdp = InventoryEnv().finite_mdp()
        >>> value_iteration(mdp).policy.tolist()   # an (s, S) rule: below 4, fill to 10
        [10, 9, 8, 7, 0, 0, 0, 0, 0, 0, 0]
        """
        P, R = self.transition_model()
        initial = (self.stock_levels >= 0).astype(np.float64)
        masks = np.array([self.action_mask(int(x)) for x in self.stock_levels])
        return FiniteMDP(P, R, gamma=self.gamma, initial=initial / initial.sum(), masks=masks)

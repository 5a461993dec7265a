"""A catalogue of published problems as :class:`~tdkit.envs.finite.FiniteMDP` models.

Every builder returns a model (sample it with ``mdp.to_env()``, solve it with
:mod:`tdkit.dp`) and names its source. Grid worlds number the cell in row
``r`` and column ``c`` as ``r * n_cols + c`` (row 0 at the top) and use the
actions of :data:`GRID_ACTIONS`: 0 up, 1 right, 2 down, 3 left (the order of
gymnasium's CliffWalking). A move off the grid leaves the agent in place.

Unless stated otherwise, numbers (layouts, rewards, discounts) follow
Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
Introduction, 2nd ed., MIT Press; they were recalled from memory of the book
and the tests in ``tests/reference/test_problems.py`` check the published values that
follow from them.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Sequence
from typing import NamedTuple

import numpy as np

from .._errors import InvalidParameterError
from .._seeding import SeedLike, as_generator
from .._validation import require_in_range, require_positive_int, require_real
from .access_control import access_control
from .finite import FiniteMDP

__all__ = [
    "GRID_ACTIONS",
    "KING_ACTIONS",
    "Successor",
    "ChangingMaze",
    "access_control",
    "blocking_maze",
    "cliff_walking",
    "dyna_maze",
    "gamblers_problem",
    "garnet",
    "gridworld_4x4",
    "gridworld_5x5",
    "maximization_bias",
    "maximization_bias_mask",
    "random_walk",
    "shortcut_maze",
    "windy_gridworld",
]

GRID_ACTIONS = ("up", "right", "down", "left")
"""Action names of the grid worlds, by index."""

KING_ACTIONS = (*GRID_ACTIONS, "up-right", "down-right", "down-left", "up-left", "stay")
"""Action names of :func:`windy_gridworld` with king's moves (the 9th only with ``stay``)."""

_MOVES = ((-1, 0), (0, 1), (1, 0), (0, -1), (-1, 1), (1, 1), (1, -1), (-1, -1), (0, 0))

class Successor(NamedTuple):
    """One successor slot of a state-action pair, as the problems below list them."""

    probability: float
    next_state: int
    reward: float


class ChangingMaze(NamedTuple):
    """A maze whose walls change after ``change_at`` time steps (Sutton & Barto 2018, 8.3)."""

    before: FiniteMDP
    after: FiniteMDP
    change_at: int


# ---------------------------------------------------------------- helpers
def _from_outcomes(
    n_states: int,
    n_actions: int,
    outcomes: Callable[[int, int], Iterable[Successor]],
    *,
    gamma: float,
    terminal: np.ndarray,
    initial: np.ndarray | None,
) -> FiniteMDP:
    """Tabulate ``outcomes(s, a)`` for every non-terminal pair into the successor form."""
    table = [
        [[] if terminal[s] else list(outcomes(s, a)) for a in range(n_actions)]
        for s in range(n_states)
    ]
    width = max(1, max(len(row) for per_state in table for row in per_state))
    next_states = np.zeros((n_states, n_actions, width), dtype=np.intp)
    probs = np.zeros((n_states, n_actions, width))
    rewards = np.zeros((n_states, n_actions, width))
    for s, per_state in enumerate(table):
        for a, row in enumerate(per_state):
            for k, slot in enumerate(row):
                next_states[s, a, k] = slot.next_state
                probs[s, a, k] = slot.probability
                rewards[s, a, k] = slot.reward
    return FiniteMDP.from_successors(
        next_states, probs, rewards, gamma=gamma, terminal=terminal, initial=initial
    )


def _one_hot(n: int, index: int) -> np.ndarray:
    start = np.zeros(n)
    start[index] = 1.0
    return start


def _clip_move(row: int, col: int, move: int, shape: tuple[int, int]) -> tuple[int, int]:
    d_row, d_col = _MOVES[move]
    return (
        min(max(row + d_row, 0), shape[0] - 1),
        min(max(col + d_col, 0), shape[1] - 1),
    )


def _gamma(owner: str, gamma: float) -> float:
    return require_in_range(owner, "gamma", gamma, 0.0, 1.0)


# ---------------------------------------------------------------- chapter 6/7: random walk
def random_walk(
    n_states: int = 5,
    *,
    left_reward: float = 0.0,
    right_reward: float = 1.0,
    gamma: float = 1.0,
) -> FiniteMDP:
    """The n-state random walk (Sutton & Barto 2018, Examples 6.2 and 7.1).

    A Markov reward process written as an MDP with one action. States
    ``1..n_states`` are the walk (A, B, C, D, E for ``n_states=5``); states 0
    and ``n_states + 1`` are the terminal ends. Each step moves left or right
    with probability 1/2; leaving on the right pays ``right_reward``, on the
    left ``left_reward``, every other step pays 0. Episodes start in the middle
    state ``(n_states + 1) // 2``.

    Example 6.2 is ``random_walk(5)`` (true values ``i / 6``); Example 7.1 is
    ``random_walk(19, left_reward=-1.0)`` (true values ``-1 + 2 i / 20``).

    References
    ----------
    Sutton & Barto (2018), Example 6.2 (Random Walk) and Example 7.1
    (n-step TD Methods on the Random Walk).

    Examples
    --------
    >>> from tdkit.dp import evaluate_policy
    >>> mdp = random_walk(5)
    >>> (evaluate_policy(mdp, [0] * 7) * 6).round(9)[1:-1]
    array([1., 2., 3., 4., 5.])
    """
    owner = "random_walk"
    n = require_positive_int(owner, "n_states", n_states)
    left = require_real(owner, "left_reward", left_reward)
    right = require_real(owner, "right_reward", right_reward)
    size = n + 2
    terminal = np.zeros(size, dtype=bool)
    terminal[[0, size - 1]] = True

    def outcomes(s: int, _a: int) -> list[Successor]:
        return [
            Successor(0.5, s - 1, left if s - 1 == 0 else 0.0),
            Successor(0.5, s + 1, right if s + 1 == size - 1 else 0.0),
        ]

    return _from_outcomes(
        size, 1, outcomes, gamma=_gamma(owner, gamma), terminal=terminal,
        initial=_one_hot(size, (n + 1) // 2),
    )


# ---------------------------------------------------------------- chapter 4 and 3: gridworlds
def gridworld_4x4(*, gamma: float = 1.0) -> FiniteMDP:
    """The 4x4 gridworld of Sutton & Barto (2018), Example 4.1.

    Cells 0 (top left) and 15 (bottom right) are terminal; every move pays
    -1; the task is undiscounted. Episodes start uniformly in cells 1-14.

    References
    ----------
    Sutton & Barto (2018), Example 4.1 and Figure 4.1.
    """
    shape = (4, 4)
    terminal = np.zeros(16, dtype=bool)
    terminal[[0, 15]] = True

    def outcomes(s: int, a: int) -> list[Successor]:
        row, col = _clip_move(*divmod(s, 4), a, shape)
        return [Successor(1.0, row * 4 + col, -1.0)]

    return _from_outcomes(
        16, 4, outcomes, gamma=_gamma("gridworld_4x4", gamma), terminal=terminal, initial=None
    )


def gridworld_5x5(*, gamma: float = 0.9) -> FiniteMDP:
    """The 5x5 gridworld with two teleporting states (Sutton & Barto 2018, Example 3.5).

    From A (row 0, column 1) every action moves to A' (row 4, column 1) and
    pays +10; from B (row 0, column 3) every action moves to B' (row 2,
    column 3) and pays +5. A move off the grid pays -1 and leaves the agent
    in place; every other move pays 0. A continuing task (no terminal
    state), discount 0.9; episodes of ``to_env`` start uniformly.

    References
    ----------
    Sutton & Barto (2018), Example 3.5, Figures 3.2 (equiprobable random
    policy values) and 3.5 (optimal values, Example 3.8).
    """
    shape = (5, 5)
    a_cell, a_prime, b_cell, b_prime = 1, 21, 3, 13

    def outcomes(s: int, a: int) -> list[Successor]:
        if s == a_cell:
            return [Successor(1.0, a_prime, 10.0)]
        if s == b_cell:
            return [Successor(1.0, b_prime, 5.0)]
        row, col = divmod(s, 5)
        new_row, new_col = _clip_move(row, col, a, shape)
        off_grid = (new_row, new_col) == (row, col)
        return [Successor(1.0, new_row * 5 + new_col, -1.0 if off_grid else 0.0)]

    return _from_outcomes(
        25, 4, outcomes, gamma=_gamma("gridworld_5x5", gamma),
        terminal=np.zeros(25, dtype=bool), initial=None,
    )


# ---------------------------------------------------------------- chapter 6: windy, cliff, bias
_WIND = (0, 0, 0, 1, 1, 1, 2, 2, 1, 0)


def windy_gridworld(
    *,
    king_moves: bool = False,
    stay: bool = False,
    stochastic_wind: bool = False,
    gamma: float = 1.0,
) -> FiniteMDP:
    """Windy gridworld (Sutton & Barto 2018, Example 6.5; Exercises 6.9 and 6.10).

    7 rows by 10 columns; start at row 3, column 0; goal (terminal) at row
    3, column 7. An upward wind of strength (0, 0, 0, 1, 1, 1, 2, 2, 1, 0) by
    column (of the cell moved from) shifts the agent up; positions are
    clipped to the grid. Every step pays -1; undiscounted.

    Parameters
    ----------
    king_moves : bool, default False
        Eight actions including diagonals (Exercise 6.9); see :data:`KING_ACTIONS`.
    stay : bool, default False
        With ``king_moves``, a ninth action that moves only with the wind.
    stochastic_wind : bool, default False
        In windy columns the wind is the column's value, one more or one less,
        each with probability 1/3 (Exercise 6.10).
    gamma : float, default 1.0

    References
    ----------
    Sutton & Barto (2018), Example 6.5 and Figure 6.3 (the optimal path has
    15 steps), Exercises 6.9 (king's moves) and 6.10 (stochastic wind).
    """
    owner = "windy_gridworld"
    if stay and not king_moves:
        raise InvalidParameterError(
            f"{owner}: stay=True needs king_moves=True (Exercise 6.9 adds the ninth action "
            "to the king's moves); got king_moves=False."
        )
    n_rows, n_cols = 7, 10
    n_actions = 4 if not king_moves else (9 if stay else 8)
    start, goal = 3 * n_cols, 3 * n_cols + 7
    terminal = _one_hot(n_rows * n_cols, goal).astype(bool)

    def outcomes(s: int, a: int) -> list[Successor]:
        row, col = divmod(s, n_cols)
        d_row, d_col = _MOVES[a]
        wind = _WIND[col]
        winds = [(1.0, wind)]
        if stochastic_wind and wind:
            winds = [(1 / 3, wind - 1), (1 / 3, wind), (1 / 3, wind + 1)]
        result = []
        for p, w in winds:
            new_row = min(max(row + d_row - w, 0), n_rows - 1)
            new_col = min(max(col + d_col, 0), n_cols - 1)
            result.append(Successor(p, new_row * n_cols + new_col, -1.0))
        return result

    return _from_outcomes(
        n_rows * n_cols, n_actions, outcomes, gamma=_gamma(owner, gamma), terminal=terminal,
        initial=_one_hot(n_rows * n_cols, start),
    )


def cliff_walking(*, gamma: float = 1.0) -> FiniteMDP:
    """Cliff walking (Sutton & Barto 2018, Example 6.6).

    4 rows by 12 columns; start at the bottom left (cell 36), goal (terminal)
    at the bottom right (cell 47); the cells between them on the bottom row
    are the cliff. Every step pays -1, except stepping into the cliff, which
    pays -100 and sends the agent back to the start. Undiscounted. The cliff
    cells are states that are never entered, so the numbering matches
    gymnasium's ``CliffWalking`` (``FiniteMDP.from_gymnasium`` of it gives the
    same model).

    References
    ----------
    Sutton & Barto (2018), Example 6.6 and Figure 6.4 (optimal path along the
    cliff edge, 13 steps, return -13).
    """
    shape = (4, 12)
    start, goal = 36, 47
    cliff = set(range(37, 47))

    def outcomes(s: int, a: int) -> list[Successor]:
        row, col = _clip_move(*divmod(s, 12), a, shape)
        nxt = row * 12 + col
        if nxt in cliff:
            return [Successor(1.0, start, -100.0)]
        return [Successor(1.0, nxt, -1.0)]

    return _from_outcomes(
        48, 4, outcomes, gamma=_gamma("cliff_walking", gamma),
        terminal=_one_hot(48, goal).astype(bool), initial=_one_hot(48, start),
    )


def maximization_bias(
    n_b_actions: int = 10,
    *,
    mean: float = -0.1,
    std: float = 1.0,
    gamma: float = 1.0,
) -> FiniteMDP:
    """The maximisation-bias MDP (Sutton & Barto 2018, Example 6.7).

    States: 0 = A (start), 1 = B, 2 = terminal. In A, action 0 ("left")
    moves to B and action 1 ("right") ends the episode, both paying 0. In B
    every action ends the episode with a random reward of mean ``mean`` and
    standard deviation ``std``.

    Two deviations make the example a finite model, both exact in the
    quantities that matter:

    * the book draws B's rewards from a normal distribution; here each is
      ``mean + std`` or ``mean - std`` with probability 1/2, which has the
      same mean and variance (and the same expected values and optimal
      policy);
    * every state has ``max(2, n_b_actions)`` actions; in A the actions
      2, 3, ... behave like "right". To give A exactly its two actions, pass
      :func:`maximization_bias_mask` as the action mask.

    References
    ----------
    Sutton & Barto (2018), Example 6.7 and Figure 6.5 (Q-learning initially
    prefers "left"; the optimal policy takes "right", value 0 at A).
    """
    owner = "maximization_bias"
    n_b = require_positive_int(owner, "n_b_actions", n_b_actions)
    mean = require_real(owner, "mean", mean)
    std = require_in_range(owner, "std", std, 0.0, math.inf)
    n_actions = max(2, n_b)

    def outcomes(s: int, a: int) -> list[Successor]:
        if s == 0:
            return [Successor(1.0, 1, 0.0)] if a == 0 else [Successor(1.0, 2, 0.0)]
        return [Successor(0.5, 2, mean + std), Successor(0.5, 2, mean - std)]

    return _from_outcomes(
        3, n_actions, outcomes, gamma=_gamma(owner, gamma),
        terminal=np.array([False, False, True]), initial=_one_hot(3, 0),
    )


def maximization_bias_mask(n_b_actions: int = 10) -> np.ndarray:
    """Valid actions of :func:`maximization_bias` per state, ``(3, max(2, n_b_actions))`` bool.

    State A has its two actions (left, right), state B all ``n_b_actions``.
    """
    n_b = require_positive_int("maximization_bias_mask", "n_b_actions", n_b_actions)
    mask = np.zeros((3, max(2, n_b)), dtype=bool)
    mask[0, :2] = True
    mask[1, :n_b] = True
    mask[2] = True
    return mask


# ---------------------------------------------------------------- chapter 4: gambler
def gamblers_problem(
    p_heads: float = 0.4, *, goal: int = 100, gamma: float = 1.0
) -> FiniteMDP:
    """The gambler's problem (Sutton & Barto 2018, Example 4.3).

    States are the capital ``0..goal``; 0 and ``goal`` are terminal. Action
    ``a`` stakes ``min(a, s, goal - s)`` (actions ``0..goal // 2``; larger
    actions than the state allows repeat its largest stake, which leaves every
    value unchanged). The coin comes up heads with probability ``p_heads`` and
    the stake is won, else lost. Reaching ``goal`` pays +1, everything else 0;
    undiscounted, so the value of a state is the probability of winning.

    References
    ----------
    Sutton & Barto (2018), Example 4.3 and Figure 4.3.
    Dubins, L. E. & Savage, L. J. (1965). How to Gamble If You Must.
    McGraw-Hill: with ``p_heads <= 1/2``, bold play (stake ``min(s, goal - s)``)
    is optimal.
    """
    owner = "gamblers_problem"
    p = require_in_range(owner, "p_heads", p_heads, 0.0, 1.0)
    goal = require_positive_int(owner, "goal", goal, minimum=2)
    size = goal + 1
    terminal = np.zeros(size, dtype=bool)
    terminal[[0, goal]] = True

    def outcomes(s: int, a: int) -> list[Successor]:
        stake = min(a, s, goal - s)
        if stake == 0:
            return [Successor(1.0, s, 0.0)]
        win = s + stake
        return [Successor(p, win, 1.0 if win == goal else 0.0), Successor(1.0 - p, s - stake, 0.0)]

    return _from_outcomes(
        size, goal // 2 + 1, outcomes, gamma=_gamma(owner, gamma), terminal=terminal,
        initial=None,
    )


# ---------------------------------------------------------------- chapter 8: mazes
def _maze(
    owner: str,
    walls: Sequence[tuple[int, int]],
    start: tuple[int, int],
    goal: tuple[int, int],
    gamma: float,
    shape: tuple[int, int] = (6, 9),
) -> FiniteMDP:
    """A deterministic maze: +1 on entering the goal (terminal), 0 otherwise.

    Moves into a wall or off the grid leave the agent in place. Wall cells are
    states that are never entered.
    """
    n_rows, n_cols = shape
    blocked = {r * n_cols + c for r, c in walls}
    goal_index = goal[0] * n_cols + goal[1]

    def outcomes(s: int, a: int) -> list[Successor]:
        row, col = _clip_move(*divmod(s, n_cols), a, shape)
        nxt = row * n_cols + col
        if nxt in blocked:
            nxt = s
        return [Successor(1.0, nxt, 1.0 if nxt == goal_index else 0.0)]

    size = n_rows * n_cols
    return _from_outcomes(
        size, 4, outcomes, gamma=_gamma(owner, gamma),
        terminal=_one_hot(size, goal_index).astype(bool),
        initial=_one_hot(size, start[0] * n_cols + start[1]),
    )


def dyna_maze(*, gamma: float = 0.95) -> FiniteMDP:
    """The Dyna maze (Sutton & Barto 2018, Example 8.1).

    6 rows by 9 columns; start at row 2, column 0; goal (terminal) at row 0,
    column 8; walls at column 2 rows 1-3, column 5 row 4 and column 7 rows
    0-2. Reaching the goal pays +1, every other step 0; discount 0.95.

    References
    ----------
    Sutton & Barto (2018), Example 8.1 and Figures 8.2-8.3 (shortest path:
    14 steps).
    """
    walls = [(1, 2), (2, 2), (3, 2), (4, 5), (0, 7), (1, 7), (2, 7)]
    return _maze("dyna_maze", walls, (2, 0), (0, 8), gamma)


def blocking_maze(*, gamma: float = 0.95) -> ChangingMaze:
    """The blocking maze (Sutton & Barto 2018, Example 8.2).

    6 rows by 9 columns; start at row 5, column 3; goal at row 0, column 8.
    A wall along row 3 first leaves a gap on the right (columns 0-7 blocked);
    after 1000 time steps it moves to block columns 1-8, so the short path
    is closed and a longer one opens on the left.

    Returns
    -------
    ChangingMaze
        ``before`` and ``after`` models and ``change_at=1000``.

    References
    ----------
    Sutton & Barto (2018), Example 8.2 and Figure 8.4.
    """
    before = [(3, c) for c in range(8)]
    after = [(3, c) for c in range(1, 9)]
    return ChangingMaze(
        _maze("blocking_maze", before, (5, 3), (0, 8), gamma),
        _maze("blocking_maze", after, (5, 3), (0, 8), gamma),
        1000,
    )


def shortcut_maze(*, gamma: float = 0.95) -> ChangingMaze:
    """The shortcut maze (Sutton & Barto 2018, Example 8.3).

    6 rows by 9 columns; start at row 5, column 3; goal at row 0, column 8.
    A wall along row 3 first leaves a gap on the left only (columns 1-8
    blocked); after 3000 time steps a shortcut opens on the right (columns
    1-7 blocked) while the long path stays open.

    Returns
    -------
    ChangingMaze
        ``before`` and ``after`` models and ``change_at=3000``.

    References
    ----------
    Sutton & Barto (2018), Example 8.3 and Figure 8.5.
    """
    before = [(3, c) for c in range(1, 9)]
    after = [(3, c) for c in range(1, 8)]
    return ChangingMaze(
        _maze("shortcut_maze", before, (5, 3), (0, 8), gamma),
        _maze("shortcut_maze", after, (5, 3), (0, 8), gamma),
        3000,
    )


# ---------------------------------------------------------------- Garnet
def _distinct_successors(
    rng: np.random.Generator, n_rows: int, n_states: int, branching: int
) -> np.ndarray:
    """``(n_rows, branching)`` successor indices, distinct within each row."""
    if n_rows * n_states <= 4_000_000:
        keys = rng.random((n_rows, n_states))
        return np.argpartition(keys, branching - 1, axis=1)[:, :branching]
    out = rng.integers(0, n_states, size=(n_rows, branching))
    while True:
        ordered = np.sort(out, axis=1)
        clash = (ordered[:, 1:] == ordered[:, :-1]).any(axis=1)
        if not clash.any():
            return out
        out[clash] = rng.integers(0, n_states, size=(int(clash.sum()), branching))


def garnet(
    n_states: int,
    n_actions: int,
    branching: int,
    *,
    gamma: float = 0.99,
    seed: SeedLike = 0,
) -> FiniteMDP:
    """A Garnet random MDP ("Generic Average Reward Non-stationary Environment Testbed").

    Each state-action pair has ``branching`` distinct successors drawn
    uniformly without replacement; their probabilities split [0, 1] at
    ``branching - 1`` uniform cut points; expected rewards are uniform on
    [0, 1) (common practice; the original leaves rewards to the
    experimenter). No terminal states; episodes of ``to_env`` start
    uniformly. The result is in the sparse successor form, so 10^5-10^6
    states are fine.

    Parameters
    ----------
    n_states, n_actions : int
    branching : int
        Successors per pair, ``1 <= branching <= n_states``.
    gamma : float, default 0.99
    seed : int, numpy Generator or None, default 0
        The same int gives the same model.

    References
    ----------
    Archibald, T. W., McKinnon, K. I. M. & Thomas, L. C. (1995). On the
    generation of Markov decision processes. Journal of the Operational
    Research Society 46(3), 354-361.

    Examples
    --------
    >>> mdp = garnet(50, 3, 4, seed=1)
    >>> mdp
    FiniteMDP(n_states=50, n_actions=3, gamma=0.99, form='sparse', n_terminal=0)
    >>> mdp.successors[0].shape
    (50, 3, 4)
    """
    owner = "garnet"
    n = require_positive_int(owner, "n_states", n_states)
    m = require_positive_int(owner, "n_actions", n_actions)
    k = require_positive_int(owner, "branching", branching)
    if k > n:
        raise InvalidParameterError(
            f"{owner}: branching must be <= n_states = {n} (successors are distinct); "
            f"got {branching!r}."
        )
    gamma = _gamma(owner, gamma)
    rng = as_generator(seed, owner=owner)
    next_states = _distinct_successors(rng, n * m, n, k).reshape(n, m, k)
    cuts = np.sort(rng.random((n, m, k - 1)), axis=2)
    edges = np.concatenate([np.zeros((n, m, 1)), cuts, np.ones((n, m, 1))], axis=2)
    probs = np.diff(edges, axis=2)
    rewards = rng.random((n, m))
    return FiniteMDP.from_successors(next_states, probs, rewards, gamma=gamma)

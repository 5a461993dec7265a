"""The entry point :func:`train_batch` and the choice of path (internal module)."""

from __future__ import annotations

import importlib.util
from collections.abc import Callable
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from ..._errors import InvalidParameterError
from ..._seeding import SeedLike, as_generator
from ..._validation import require_in_range, require_positive_int
from ...envs.finite import FiniteMDP
from ...exploration import EpsilonGreedy, Softmax
from ...schedules import Schedule, as_schedule
from ._numpy import run_numpy
from ._result import BatchResult
from ._setup import (
    Setup,
    build_setup,
    initial_tables,
    require_learner,
    require_mdp,
    step_size_kind,
)

__all__ = ["BACKENDS", "compiled_available", "train_batch"]

BACKENDS = ("auto", "compiled", "numpy")
"""Values of ``train_batch(backend=...)``."""

Runner = Callable[[Setup, np.ndarray, np.random.Generator, int], BatchResult]


def compiled_available() -> bool:
    """True when numba is installed (the ``fast`` extra), so the compiled path can run.

    Examples
    --------
    >>> isinstance(compiled_available(), bool)
    True
    """
    return importlib.util.find_spec("numba") is not None


def _choose_backend(backend: Any, setup: Setup) -> Runner:
    if backend not in BACKENDS:
        raise InvalidParameterError(
            f"train_batch: backend must be one of {', '.join(map(repr, BACKENDS))}; "
            f"got {backend!r}."
        )
    if backend == "numpy":
        return run_numpy
    supported = step_size_kind(setup.step_size) != "per_visit"
    if backend == "compiled":
        if not compiled_available():
            raise InvalidParameterError(
                "train_batch: backend='compiled' needs numba, which is not installed; "
                "install the fast extra (pip install 'tdkit[fast]') or use backend='numpy'."
            )
        if not supported:
            raise InvalidParameterError(
                f"train_batch: backend='compiled' runs constant, by-step and VisitCount step "
                f"sizes; got the per-visit schedule {setup.step_size!r}. Use backend='numpy' "
                "(or 'auto') for it."
            )
    elif not (supported and compiled_available()):
        return run_numpy
    from ._kernels import run_compiled  # numba is imported here, never at import tdkit

    return run_compiled


def train_batch(
    mdp: FiniteMDP,
    learner: str,
    *,
    n_learners: int,
    steps: int,
    step_size: float | Schedule = 0.1,
    exploration: float | Schedule | EpsilonGreedy | Softmax = 0.1,
    seed: SeedLike = 0,
    initial_value: Any = 0.0,
    max_episode_steps: int | None = None,
    gamma: float | None = None,
    masks: ArrayLike | None = None,
    backend: str = "auto",
) -> BatchResult:
    r"""Train K independent one-step TD learners in lockstep on ``mdp``.

    Each learner applies its scalar counterpart's update at every step
    (:class:`tdkit.QLearning`, :class:`tdkit.Sarsa`,
    :class:`tdkit.ExpectedSarsa`, :class:`tdkit.DoubleQLearning`):

    .. math::
        Q(S_t, A_t) \leftarrow Q(S_t, A_t) + \alpha\,[G_t - Q(S_t, A_t)],
        \qquad G_t = R_{t+1} + \gamma\, B(S_{t+1})

    with :math:`B(s') = \max_a Q(s', a)` (Q-learning, Watkins & Dayan 1992),
    :math:`Q(s', A_{t+1})` for the action then taken (SARSA, Rummery &
    Niranjan 1994), :math:`\varepsilon\,\overline{Q}(s') + (1 - \varepsilon)
    \max_a Q(s', a)` (Expected SARSA, van Seijen et al. 2009), or
    :math:`Q^B(s', \arg\max_a Q^A(s', a))` with the roles of the two tables
    chosen by a fair coin (Double Q-learning, van Hasselt 2010). :math:`G_t =
    R_{t+1}` when :math:`S_{t+1}` is terminal; a time-limit truncation
    bootstraps. See the module docstring for the exact step conventions.

    Parameters
    ----------
    mdp : FiniteMDP
        The model to sample (dense or sparse form).
    learner : {"q_learning", "sarsa", "expected_sarsa", "double_q"}
    n_learners : int
        K >= 1 independent learners.
    steps : int
        Steps (transitions) each learner takes, >= 1.
    step_size : float or Schedule, default 0.1
        :math:`\alpha \in (0, 1]` or a schedule from :mod:`tdkit.schedules`
        (per-pair schedules such as ``VisitCount`` use each learner's own
        counts).
    exploration : float, Schedule, EpsilonGreedy or Softmax, default 0.1
        :math:`\varepsilon \in [0, 1]` of ε-greedy, a schedule of it by step,
        or a :class:`~tdkit.exploration.Softmax` rule (its temperature may be
        a schedule by step).
    seed : int, numpy.random.Generator or None, default 0
        One seed for the whole run; the same seed gives the same result.
    initial_value : float, (float, float) or array, default 0.0
        A constant, a ``(low, high)`` range (every learner's table drawn
        independently from the run's generator), or an array of shape
        ``(S, A)`` (every learner starts from it) or ``(K, S, A)``. Double
        Q-learning starts both tables from it.
    max_episode_steps : int, optional
        Truncate episodes after this many steps. Without it, episodes of a
        model with no terminal states never end (``episode_returns`` is then
        empty).
    gamma : float, optional
        Discount in [0, 1]; default ``mdp.gamma``.
    masks : array of bool, shape (S, A), optional
        Allowed actions per state; default: the model's own masks if it
        carries any, else every action. Every non-terminal state must allow
        one action at least.
    backend : {"auto", "compiled", "numpy"}, default "auto"
        ``"compiled"`` needs numba (the ``fast`` extra) and runs constant,
        by-step (e.g. ``Linear``) and ``VisitCount`` step sizes;
        ``"auto"`` uses it when it can and numpy otherwise. Both give the
        same result for the same seed (:attr:`BatchResult.backend` says which
        ran).

    Returns
    -------
    BatchResult
        ``tables`` (K, S, A), ``visits``, ``episode_returns``,
        ``episode_lengths``, ``steps`` and :meth:`BatchResult.greedy_policies`.

    Raises
    ------
    InvalidParameterError
        On an unknown learner, ``n_learners`` or ``steps`` below 1, a step
        size outside (0, 1], ε outside [0, 1], a UCB exploration rule, a
        malformed initial value or mask, ``max_episode_steps`` below 1,
        ``gamma`` outside [0, 1], an unknown backend, or ``"compiled"``
        without numba or for a user-defined per-visit step size (each message
        names the parameter).
    FloatingPointError
        If action values become NaN.

    References
    ----------
    .. [1] Watkins, C. J. C. H. & Dayan, P. (1992). Q-learning. Machine
       Learning 8, 279-292.
    .. [2] Rummery, G. A. & Niranjan, M. (1994). On-line Q-learning using
       connectionist systems. Technical Report CUED/F-INFENG/TR 166.
    .. [3] van Seijen, H., van Hasselt, H., Whiteson, S. & Wiering, M. (2009).
       A theoretical and empirical analysis of Expected Sarsa. IEEE ADPRL.
    .. [4] van Hasselt, H. (2010). Double Q-learning. NIPS 23.
    .. [5] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
       Introduction, 2nd ed., Sections 6.4-6.7.
    .. [6] Lam, S. K., Pitrou, A. & Seibert, S. (2015). Numba: a LLVM-based
       Python JIT compiler. LLVM-HPC workshop (the compiled path).

    Examples
    --------
    Eight Q-learners on the Dyna maze (Sutton & Barto 2018, Example 8.1):

    >>> from tdkit.batch import train_batch
    >>> from tdkit.envs.problems import dyna_maze
    >>> res = train_batch(dyna_maze(), "q_learning", n_learners=8, steps=10_000, seed=1,
    ...                   step_size=0.5, exploration=0.1)
    >>> res.tables.shape
    (8, 54, 4)
    >>> bool(all(len(r) > 0 for r in res.episode_returns))   # every learner reached the goal
    True

    (The first episode, greedy on an all-zero table, is a random walk: over
    512 learners its length had median 598 and maximum 4085 steps.)
    """
    owner = "train_batch"
    mdp = require_mdp(mdp)
    learner = require_learner(learner)
    n_learners = require_positive_int(owner, "n_learners", n_learners)
    steps = require_positive_int(owner, "steps", steps)
    schedule = as_schedule(
        step_size, owner=owner, name="step_size", low=0.0, high=1.0, low_open=True,
        hint="Use a float or a schedule from tdkit.schedules.",
    )
    if max_episode_steps is not None:
        max_episode_steps = require_positive_int(owner, "max_episode_steps", max_episode_steps)
    gamma = mdp.gamma if gamma is None else require_in_range(owner, "gamma", gamma, 0.0, 1.0)
    setup = build_setup(
        mdp, learner, exploration=exploration, step_size=schedule, masks=masks,
        gamma=float(gamma), max_episode_steps=max_episode_steps,
    )
    run = _choose_backend(backend, setup)
    rng = as_generator(seed, owner=owner)
    n_tables = 2 if learner == "double_q" else 1
    shape = (n_learners, mdp.n_states, mdp.n_actions)
    q = np.stack([initial_tables(initial_value, shape, rng) for _ in range(n_tables)])
    return run(setup, q, rng, steps)

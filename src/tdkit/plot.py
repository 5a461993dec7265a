r"""Learning curves and value maps with matplotlib (``plot`` extra).

* :func:`plot_returns` draws learning curves: the moving average of the
  per-episode returns of one run, of several runs (their mean, with a
  percentile bootstrap confidence band over runs), or of every setting of a
  :class:`tdkit.sweep.SweepResult`.
* :func:`plot_values` draws a heat map of state values on a grid (the cell
  numbering of :mod:`tdkit.envs.problems`: row ``r``, column ``c`` is state
  ``r * n_cols + c``, row 0 at the top), optionally with the arrows of a
  policy.

Both return the matplotlib ``Axes`` they drew on, so a caller can add titles,
limits or more curves. matplotlib is imported only when a function is called.

References
----------
.. [1] Efron, B. & Tibshirani, R. J. (1993). An Introduction to the Bootstrap.
   Chapman & Hall. Chapter 13 (percentile intervals).
.. [2] Agarwal, R., Schwarzer, M., Castro, P. S., Courville, A. & Bellemare,
   M. G. (2021). Deep Reinforcement Learning at the Edge of the Statistical
   Precipice. NeurIPS 34 (confidence intervals over runs, not only means).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np

from ._errors import InvalidParameterError
from ._seeding import SeedLike, as_generator
from ._validation import require_float_array, require_in_range, require_positive_int
from .envs.finite import FiniteMDP
from .envs.problems import KING_ACTIONS
from .runs._results import RunRecord, SweepResult, setting_label
from .runs.history import History
from .stats import bootstrap_band

__all__ = ["plot_returns", "plot_values", "moving_average"]

# Row and column offsets of the grid actions, in the order of tdkit.envs.problems.KING_ACTIONS
# (up, right, down, left, then the diagonals and stay).
_ARROWS = ((-1, 0), (0, 1), (1, 0), (0, -1), (-1, 1), (1, 1), (1, -1), (-1, -1), (0, 0))


def _pyplot(owner: str) -> Any:
    try:
        import matplotlib.pyplot as plt
    except ImportError as exc:  # pragma: no cover - depends on the environment
        raise ImportError(f"{owner} needs matplotlib: pip install 'tdkit[plot]'") from exc
    return plt


def _axes(owner: str, ax: Any) -> Any:
    if ax is None:
        _, ax = _pyplot(owner).subplots()
        return ax
    _pyplot(owner)
    if not callable(getattr(ax, "plot", None)) or not callable(getattr(ax, "imshow", None)):
        raise InvalidParameterError(
            f"{owner}: ax must be a matplotlib Axes (or None for a new figure); got {ax!r:.80}."
        )
    return ax


# ---------------------------------------------------------------- learning curves
def _run_returns(owner: str, item: Any, where: str) -> np.ndarray:
    """The per-episode returns of one run: a History, RunRecord or 1-D array."""
    if isinstance(item, RunRecord):
        item = item.history
    if isinstance(item, History):
        returns = item.returns
    else:
        returns = require_float_array(
            owner, where, item, what="a History, a RunRecord or a 1-D array of returns", ndim=1
        )
    if returns.size == 0:
        raise InvalidParameterError(
            f"{owner}: {where} has no episodes; train for at least one episode first."
        )
    if not np.isfinite(returns).all():
        raise InvalidParameterError(
            f"{owner}: {where} holds non-finite returns; got "
            f"{returns[~np.isfinite(returns)][:3]!r} among them."
        )
    return returns


def _is_one_run(data: Any) -> bool:
    if isinstance(data, (History, RunRecord)):
        return True
    if isinstance(data, np.ndarray):
        return data.ndim == 1
    return (
        isinstance(data, Sequence) and not isinstance(data, str) and len(data) > 0
        and all(isinstance(x, (int, float, np.number)) and not isinstance(x, bool) for x in data)
    )


def _runs(owner: str, data: Any, where: str) -> np.ndarray:
    """A ``(runs, episodes)`` array from one run or a collection of runs (cut to the shortest)."""
    if _is_one_run(data):
        return _run_returns(owner, data, where)[None, :]
    if isinstance(data, np.ndarray) and data.ndim == 2:
        items: Sequence[Any] = list(data)
    elif isinstance(data, Sequence) and not isinstance(data, (str, bytes)) and len(data) > 0:
        items = data
    else:
        raise InvalidParameterError(
            f"{owner}: {where} must be a History, a list of Histories (runs), a (runs, episodes) "
            f"array, a SweepResult or a dict of those; got {data!r:.80}."
        )
    curves = [_run_returns(owner, item, f"{where}[{i}]") for i, item in enumerate(items)]
    shortest = min(curve.size for curve in curves)
    return np.stack([curve[:shortest] for curve in curves])


def _series(owner: str, data: Any, label: Any) -> list[tuple[str | None, np.ndarray]]:
    """``(label, (runs, episodes) returns)`` for each curve to draw."""
    if isinstance(data, SweepResult):
        # Settings without a finished run (failed or missing runs) draw no curve.
        finished = [[run for run in data.runs_for(i) if not run.failed]
                    for i in range(len(data.settings))]
        kept = [i for i, runs in enumerate(finished) if runs]
        if not kept:
            raise InvalidParameterError(
                f"{owner}: the sweep has no finished run to draw; look at result.failures."
            )
        names = [setting_label(data.settings[i]) for i in kept]
        groups = [_runs(owner, finished[i], f"the runs of setting {name}")
                  for i, name in zip(kept, names, strict=True)]
    elif isinstance(data, Mapping):
        if not data:
            raise InvalidParameterError(f"{owner}: the dict of runs is empty; nothing to draw.")
        names = [str(key) for key in data]
        groups = [_runs(owner, value, f"data[{key!r}]") for key, value in data.items()]
    else:
        if label is not None and not isinstance(label, str):
            raise InvalidParameterError(
                f"{owner}: label of a single curve must be a str or None; got {label!r:.80}."
            )
        return [(label, _runs(owner, data, "data"))]
    if label is None:
        return list(zip(names, groups, strict=True))
    if callable(label) and isinstance(data, SweepResult):
        names = [str(label(data.settings[i])) for i in kept]
    elif (isinstance(data, SweepResult) and isinstance(label, Sequence)
          and not isinstance(label, str) and len(label) == len(data.settings)):
        names = [str(label[i]) for i in kept]  # one label per setting, drawn ones kept
    elif isinstance(label, Sequence) and not isinstance(label, str) and len(label) == len(groups):
        names = [str(name) for name in label]
    else:
        raise InvalidParameterError(
            f"{owner}: with {len(groups)} curves, label must be None (automatic), a list of "
            f"{len(groups)} strings" + (" or a callable setting -> str" if isinstance(
                data, SweepResult) else "") + f"; got {label!r:.80}."
        )
    return list(zip(names, groups, strict=True))


def moving_average(returns: np.ndarray, window: int) -> np.ndarray:
    """Trailing means over ``window`` episodes along the last axis (``T - window + 1`` points).

    Examples
    --------
    >>> moving_average(np.array([1.0, 2.0, 3.0, 4.0]), 2)
    array([1.5, 2.5, 3.5])
    """
    cumulative = np.cumsum(returns, axis=-1)
    pad = np.zeros((*returns.shape[:-1], 1))
    cumulative = np.concatenate([pad, cumulative], axis=-1)
    return (cumulative[..., window:] - cumulative[..., :-window]) / window


def plot_returns(
    data: Any,
    *,
    ax: Any = None,
    window: int = 10,
    label: str | Sequence[str] | Callable[[dict[str, Any]], str] | None = None,
    ci: bool = True,
    confidence: float = 0.95,
    n_resamples: int = 1000,
    seed: SeedLike = 0,
) -> Any:
    """Learning curves: moving averages of per-episode returns, with a band over runs.

    Parameters
    ----------
    data : History, runs, SweepResult or dict
        What to draw:

        * one run: a :class:`tdkit.History`, a :class:`tdkit.sweep.RunRecord`
          or a 1-D array of per-episode returns -- one curve;
        * several runs of one configuration: a list of those or a
          ``(runs, episodes)`` array -- one curve, the mean over runs;
        * a :class:`tdkit.sweep.SweepResult` -- one curve per setting, over
          its seeds (failed runs are left out, and a setting without a
          finished run draws no curve);
        * a dict ``{label: runs}`` -- one curve per entry.

        Runs of different lengths (a step budget ends runs after different
        numbers of episodes) are cut to the shortest.
    ax : matplotlib Axes, optional
        Draw here; default: a new figure.
    window : int, default 10
        Episodes in the trailing moving average (cut to the run length when
        runs are shorter); 1 draws the raw returns. The point at episode
        ``k`` averages episodes ``k - window + 1 .. k`` (counted from 1).
    label : str, list of str, callable or None
        Legend entry of a single curve; for several curves a list with one
        string each, or for a SweepResult a callable ``setting -> str``.
        None labels sweep settings (``"step_size=0.5"``) and dict keys
        automatically and leaves a single curve unlabelled.
    ci : bool, default True
        Shade a percentile bootstrap confidence band of the mean curve over
        runs (curves of two or more runs only).
    confidence : float, default 0.95
        Confidence of the band, in (0, 1).
    n_resamples : int, default 1000
        Bootstrap resamples of the band.
    seed : int, Generator or None, default 0
        Seed of the bootstrap, so the band is reproducible.

    Returns
    -------
    matplotlib.axes.Axes
        One line per curve in ``ax.lines``; bands are ``ax.collections``.

    Raises
    ------
    InvalidParameterError
        On empty or non-finite returns, unknown input, a bad window or labels.
    ImportError
        Without matplotlib (install ``tdkit[plot]``).

    Examples
    --------
    >>> import matplotlib
    >>> matplotlib.use("Agg")
    >>> import numpy as np
    >>> runs = np.array([[0.0, 1.0, 2.0, 3.0], [2.0, 3.0, 4.0, 5.0]])   # 2 runs, 4 episodes
    >>> ax = plot_returns(runs, window=2, label="toy")
    >>> ax.lines[0].get_ydata().tolist()     # mean over runs of 2-episode averages
    [1.5, 2.5, 3.5]
    >>> ax.get_legend_handles_labels()[1]
    ['toy']
    """
    owner = "plot_returns"
    window = require_positive_int(owner, "window", window)
    confidence = require_in_range(owner, "confidence", confidence, 0.0, 1.0,
                                low_open=True, high_open=True)
    n_resamples = require_positive_int(owner, "n_resamples", n_resamples)
    series = _series(owner, data, label)
    rng = as_generator(seed, owner=owner)
    ax = _axes(owner, ax)
    used = window
    for name, runs in series:
        w = min(window, runs.shape[1])
        used = min(used, w)
        curves = moving_average(runs, w)
        x = np.arange(w, runs.shape[1] + 1)
        (line,) = ax.plot(x, curves.mean(axis=0), label=name)
        if ci and runs.shape[0] >= 2:
            low, high = bootstrap_band(curves, confidence=confidence,
                                       n_resamples=n_resamples, seed=rng)
            ax.fill_between(x, low, high, color=line.get_color(), alpha=0.2, linewidth=0)
    ax.set_xlabel("episode")
    ax.set_ylabel("return" if used == 1 else f"return (moving average of {used} episodes)")
    if any(name is not None for name, _ in series):
        ax.legend()
    return ax


# ---------------------------------------------------------------- value maps
def _grid_shape(owner: str, mdp_or_shape: Any, shape: Any) -> tuple[tuple[int, int], Any]:
    """``((rows, cols), terminal mask or None)`` from a shape or a FiniteMDP."""
    if isinstance(mdp_or_shape, FiniteMDP):
        n = mdp_or_shape.n_states
        terminal = np.asarray(mdp_or_shape.terminal, dtype=bool)
        grid = (1, n) if shape is None else _pair(owner, "shape", shape)
        if grid[0] * grid[1] != n:
            raise InvalidParameterError(
                f"{owner}: shape={shape!r} has {grid[0] * grid[1]} cells but the model has "
                f"{n} states; give (rows, cols) with rows * cols == {n}."
            )
        return grid, terminal
    if shape is not None:
        raise InvalidParameterError(
            f"{owner}: shape=... goes with a FiniteMDP; got mdp_or_shape={mdp_or_shape!r:.40} "
            "and shape as well. Give the shape once."
        )
    return _pair(owner, "mdp_or_shape", mdp_or_shape), None


def _pair(owner: str, name: str, value: Any) -> tuple[int, int]:
    if (
        isinstance(value, Sequence) and len(value) == 2
        and all(isinstance(v, (int, np.integer)) and not isinstance(v, bool) and v >= 1
                for v in value)
    ):
        return int(value[0]), int(value[1])
    raise InvalidParameterError(
        f"{owner}: {name} must be a FiniteMDP or a grid shape (rows, cols) of positive ints; "
        f"got {value!r:.80}."
    )


def _grid_values(owner: str, values: Any, grid: tuple[int, int]) -> np.ndarray:
    rows, cols = grid
    n = rows * cols
    array = require_float_array(owner, "values", values, what="an array of numbers")
    if array.shape in ((n,), (rows, cols)):
        grid_values = array.reshape(rows, cols)
    elif array.ndim == 2 and array.shape[0] == n:
        grid_values = array.max(axis=1).reshape(rows, cols)  # action values: v(s) = max_a q(s, a)
    else:
        raise InvalidParameterError(
            f"{owner}: values must have shape ({n},) (state values), {grid} or ({n}, A) "
            f"(action values; the maximum per state is drawn); got shape {array.shape}."
        )
    if np.isinf(grid_values).any():
        raise InvalidParameterError(
            f"{owner}: values must be finite (NaN leaves a cell blank); got an infinite value."
        )
    return grid_values


def plot_values(
    mdp_or_shape: FiniteMDP | tuple[int, int],
    values: Any,
    ax: Any = None,
    *,
    shape: tuple[int, int] | None = None,
    policy: Any = None,
    annotate: bool | None = None,
    cmap: str = "viridis",
    colorbar: bool = True,
) -> Any:
    """Heat map of state values on a grid, optionally with a policy's arrows.

    Parameters
    ----------
    mdp_or_shape : FiniteMDP or (rows, cols)
        The layout. Grid worlds number cells row-major (state
        ``r * n_cols + c``, row 0 at the top), as in
        :mod:`tdkit.envs.problems`. A :class:`tdkit.FiniteMDP` does not know
        its layout: give ``shape=(rows, cols)`` with it, or its states are
        drawn as one row (a chain such as the random walk). With a model,
        terminal states carry no policy arrow and are labelled "T".
    values : array_like
        State values of shape ``(S,)`` or ``(rows, cols)``, or action values
        ``(S, A)`` (such as ``agent.table`` or ``solution.q``), of which the
        maximum over actions is drawn. NaN leaves a cell blank (a wall).
    ax : matplotlib Axes, optional
        Draw here; default: a new figure.
    shape : (rows, cols), optional
        The grid of a FiniteMDP.
    policy : array_like of int, shape (S,), optional
        An action per state in the order of
        :data:`tdkit.envs.problems.KING_ACTIONS` (0 up, 1 right, 2 down,
        3 left, then diagonals, 8 stay), e.g. ``solution.policy``; drawn as
        arrows ("stay" as a dot).
    annotate : bool, optional
        Write each value in its cell; default: when there are at most 400 cells.
    cmap : str, default "viridis"
        A matplotlib colormap name.
    colorbar : bool, default True
        Add a colour bar.

    Returns
    -------
    matplotlib.axes.Axes
        The image is ``ax.images[0]``.

    Raises
    ------
    InvalidParameterError
        On a bad layout, values of the wrong shape or infinite values, or a
        policy with actions outside the grid moves.
    ImportError
        Without matplotlib (install ``tdkit[plot]``).

    Examples
    --------
    >>> import matplotlib
    >>> matplotlib.use("Agg")
    >>> import tdkit
    >>> from tdkit.envs.problems import gridworld_4x4
    >>> mdp = gridworld_4x4()
    >>> sol = tdkit.value_iteration(mdp)
    >>> ax = plot_values(mdp, sol.v, shape=(4, 4), policy=sol.policy)
    >>> ax.images[0].get_array().shape
    (4, 4)
    """
    owner = "plot_values"
    grid, terminal = _grid_shape(owner, mdp_or_shape, shape)
    grid_values = _grid_values(owner, values, grid)
    rows, cols = grid
    actions = None
    if policy is not None:
        try:
            actions = np.asarray(policy)
        except (TypeError, ValueError):  # pragma: no cover - asarray of odd objects
            actions = np.asarray([None])
        if (
            actions.shape != (rows * cols,) or actions.dtype.kind not in "iu"
            or actions.min() < 0 or actions.max() >= len(_ARROWS)
        ):
            raise InvalidParameterError(
                f"{owner}: policy must be {rows * cols} ints in [0, {len(_ARROWS) - 1}] "
                f"(actions {', '.join(KING_ACTIONS)}); got {policy!r:.80}."
            )
    if annotate is None:
        annotate = rows * cols <= 400
    ax = _axes(owner, ax)
    image = ax.imshow(np.ma.masked_invalid(grid_values), cmap=cmap, origin="upper",
                      interpolation="nearest")
    if colorbar:
        ax.figure.colorbar(image, ax=ax, label="value")
    ax.set_xticks(range(cols))
    ax.set_yticks(range(rows))
    ax.set_xlabel("column")
    ax.set_ylabel("row")
    is_terminal = (
        np.zeros(rows * cols, dtype=bool) if terminal is None else terminal
    ).reshape(rows, cols)
    if annotate:
        colormap = image.get_cmap()
        for r in range(rows):
            for c in range(cols):
                value = grid_values[r, c]
                if np.isnan(value):
                    continue
                red, green, blue, _ = colormap(image.norm(value))
                dark = 0.299 * red + 0.587 * green + 0.114 * blue < 0.5
                text = "T" if is_terminal[r, c] else f"{value:.3g}"
                # With arrows, values move to the top of the cell.
                ax.text(c, r - (0.3 if actions is not None else 0.0), text, ha="center",
                        va="center", fontsize=8, color="white" if dark else "black")
    if actions is not None:
        moves = np.array(_ARROWS, dtype=np.float64)[actions.reshape(rows, cols)]
        live = ~is_terminal & ~np.isnan(grid_values)
        row_idx, col_idx = np.nonzero(live & moves.any(axis=-1))
        if row_idx.size:
            d_row = moves[row_idx, col_idx, 0]
            d_col = moves[row_idx, col_idx, 1]
            ax.quiver(col_idx, row_idx, d_col, d_row, angles="xy", scale_units="xy", scale=2.5,
                      pivot="middle", color="white", edgecolor="black", linewidth=0.5)
        stay_r, stay_c = np.nonzero(live & ~moves.any(axis=-1))
        if stay_r.size:
            ax.plot(stay_c, stay_r, "o", color="white", markeredgecolor="black")
    return ax

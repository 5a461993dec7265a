"""Hypothesis strategies for property tests of code that works on finite MDPs.

Needs the ``test`` extra (``pip install tdkit[test]``) for hypothesis.

Examples
--------
>>> from hypothesis import given, settings
>>> from tdkit.dp import value_iteration
>>> @settings(max_examples=5, deadline=None)
... @given(finite_mdps(gamma=(0.0, 0.9)))
... def test_values_are_bounded(mdp):
...     bound = abs(mdp.R).max() / (1 - mdp.gamma)
...     assert abs(value_iteration(mdp).v).max() <= bound + 1e-6
>>> test_values_are_bounded()
"""

from __future__ import annotations

from typing import Any

import numpy as np

try:
    from hypothesis import strategies as st
    from hypothesis.extra import numpy as hnp
except ImportError as exc:  # pragma: no cover - depends on the environment
    raise ImportError(
        "tdkit.testing.strategies needs hypothesis; install the test extra: "
        "pip install 'tdkit[test]'."
    ) from exc

from .._errors import InvalidParameterError
from ..envs.finite import FiniteMDP

__all__ = ["finite_mdps", "policies"]

_IntRange = int | tuple[int, int]
_FloatRange = float | tuple[float, float]


def _int_range(name: str, value: _IntRange, minimum: int) -> tuple[int, int]:
    low, high = (value, value) if isinstance(value, int) else value
    if not minimum <= low <= high:
        raise InvalidParameterError(
            f"finite_mdps: {name} must be an int or a (low, high) pair with "
            f"{minimum} <= low <= high; got {value!r}."
        )
    return int(low), int(high)


def _float_range(name: str, value: _FloatRange, low_bound: float, high_bound: float):
    low, high = (value, value) if isinstance(value, (int, float)) else value
    if not low_bound <= low <= high <= high_bound:
        raise InvalidParameterError(
            f"finite_mdps: {name} must be a float or a (low, high) pair inside "
            f"[{low_bound}, {high_bound}]; got {value!r}."
        )
    return float(low), float(high)


def _weights(draw: Any, shape: tuple[int, ...]) -> np.ndarray:
    """Integer weights 0..4 (so exact zeros and ties appear), no all-zero row."""
    weights = draw(hnp.arrays(np.int64, shape, elements=st.integers(0, 4))).astype(np.float64)
    weights[..., 0] += weights.sum(axis=-1) == 0
    return weights / weights.sum(axis=-1, keepdims=True)


def finite_mdps(
    *,
    n_states: _IntRange = (1, 6),
    n_actions: _IntRange = (1, 3),
    gamma: _FloatRange = (0.0, 0.95),
    terminal: bool | None = None,
    sparse: bool | None = None,
    successors: _IntRange | None = None,
    reward_range: tuple[float, float] = (-1.0, 1.0),
    min_termination: float = 0.1,
) -> st.SearchStrategy[FiniteMDP]:
    """Strategy drawing random :class:`~tdkit.envs.finite.FiniteMDP` models.

    Transition probabilities come from small integer weights, so exact
    zeros, ties and repeated rows occur and shrink well.

    Parameters
    ----------
    n_states, n_actions : int or (low, high)
        Sizes (inclusive ranges).
    gamma : float or (low, high)
        Discount range inside [0, 1]. When ``gamma`` is drawn as 1, the model
        has terminal states and every non-terminal state-action pair moves to
        a terminal state with probability at least ``min_termination``, so
        every policy is proper and all values are finite.
    terminal : bool, optional
        True: at least one terminal state (and one non-terminal); False: none;
        None: either.
    sparse : bool, optional
        True: the successor form; False: the dense form; None: either.
    successors : int or (low, high), optional
        Successor slots ``K`` of the sparse form (default 1..n_states);
        slots may repeat a next state.
    reward_range : (low, high)
        Expected rewards are drawn from this interval.
    min_termination : float, default 0.1
        See ``gamma``.

    Returns
    -------
    hypothesis.strategies.SearchStrategy[FiniteMDP]
    """
    s_low, s_high = _int_range("n_states", n_states, 1)
    a_low, a_high = _int_range("n_actions", n_actions, 1)
    g_low, g_high = _float_range("gamma", gamma, 0.0, 1.0)
    r_low, r_high = _float_range("reward_range", reward_range, -1e6, 1e6)
    k_range = None if successors is None else _int_range("successors", successors, 1)
    if terminal is True or g_high == 1.0:
        s_low = max(s_low, 2)
        if s_low > s_high:
            raise InvalidParameterError(
                "finite_mdps: terminal states need n_states >= 2 (one terminal and one "
                f"non-terminal); got n_states={n_states!r}."
            )
    if terminal is False and g_high == 1.0:
        raise InvalidParameterError(
            "finite_mdps: gamma=1 needs terminal states for finite values; "
            "use gamma < 1 or terminal=None/True."
        )
    if not 0.0 < min_termination <= 1.0:
        raise InvalidParameterError(
            f"finite_mdps: min_termination must be in (0, 1]; got {min_termination!r}."
        )

    @st.composite
    def build(draw: Any) -> FiniteMDP:
        n = draw(st.integers(s_low, s_high))
        m = draw(st.integers(a_low, a_high))
        discount = draw(
            st.one_of(st.just(g_high), st.floats(g_low, g_high)) if g_low < g_high else
            st.just(g_low)
        )
        needs_terminal = discount == 1.0 or terminal is True
        has_terminal = needs_terminal or (terminal is None and n >= 2 and draw(st.booleans()))
        mask = np.zeros(n, dtype=bool)
        if has_terminal:
            count = draw(st.integers(1, n - 1))
            chosen = draw(st.permutations(range(n)))[:count]
            mask[list(chosen)] = True
        use_sparse = draw(st.booleans()) if sparse is None else sparse
        rewards = draw(
            hnp.arrays(
                np.float64,
                (n, m),
                elements=st.floats(r_low, r_high, allow_nan=False, allow_subnormal=False),
            )
        )
        absorbing = int(np.argmax(mask))
        if use_sparse:
            k_low, k_high = k_range if k_range is not None else (1, n)
            k = draw(st.integers(k_low, k_high))
            nxt = draw(hnp.arrays(np.int64, (n, m, k), elements=st.integers(0, n - 1)))
            probs = _weights(draw, (n, m, k))
            if discount == 1.0:
                nxt = np.concatenate([nxt, np.full((n, m, 1), absorbing)], axis=2)
                probs = np.concatenate(
                    [(1 - min_termination) * probs, np.full((n, m, 1), min_termination)],
                    axis=2,
                )
            return FiniteMDP.from_successors(
                nxt, probs, rewards, gamma=discount, terminal=mask if has_terminal else None
            )
        probs = _weights(draw, (n, m, n))
        if discount == 1.0:
            probs *= 1 - min_termination
            probs[:, :, absorbing] += min_termination
        return FiniteMDP(probs, rewards, gamma=discount, terminal=mask if has_terminal else None)

    return build()


def policies(mdp: FiniteMDP, *, stochastic: bool | None = None) -> st.SearchStrategy[np.ndarray]:
    """Strategy drawing policies of ``mdp``: ``(S,)`` action indices or ``(S, A)`` probabilities.

    Parameters
    ----------
    mdp : FiniteMDP
    stochastic : bool, optional
        True: ``(S, A)`` probabilities; False: ``(S,)`` indices; None: either.
    """
    n, m = mdp.n_states, mdp.n_actions
    deterministic = hnp.arrays(np.int64, (n,), elements=st.integers(0, m - 1))

    @st.composite
    def random_rows(draw: Any) -> np.ndarray:
        return _weights(draw, (n, m))

    if stochastic is None:
        return st.one_of(deterministic, random_rows())
    return random_rows() if stochastic else deterministic

r"""Sparse eligibility traces: the one place a trace step is written, and the trace learners' base.

Traces live in a dict ``{flat index: e}`` holding only the active entries,
so one step costs :math:`O(\text{active traces})`, not :math:`O(|S||A|)`.
After each step every trace decays by :math:`\gamma\lambda`; a trace that
falls to ``cutoff`` or below is dropped. Traces are never negative, so
``cutoff = 0`` drops only exact zeros (after :math:`\gamma\lambda = 0` or an
underflow) and keeps the algorithm exact; a positive cutoff bounds the
neglected change of a value per later step by
:math:`\alpha\,|\delta|\,\text{cutoff}\,/(1 - \gamma\lambda)` per dropped trace.

References
----------
.. [1] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
   Introduction, 2nd ed., Sections 12.2, 12.5, 12.7 and 12.8.
.. [2] Singh, S. P. & Sutton, R. S. (1996). Reinforcement learning with
   replacing eligibility traces. Machine Learning 22, 123-158.
.. [3] van Seijen, H. & Sutton, R. S. (2014). True online TD(lambda).
   Proceedings of the 31st ICML.
"""

from __future__ import annotations

from typing import Any, ClassVar

import numpy as np

from .._errors import InvalidParameterError
from .._seeding import SeedLike
from .._validation import require_in_range
from ..agent import TabularAgent, Transition
from ..exploration import Exploration
from ..schedules import Schedule
from ..tables import InitialValue

__all__ = ["TRACE_KINDS", "TraceLearner", "require_trace", "trace_step"]

#: The trace kinds every trace learner accepts.
TRACE_KINDS = ("accumulating", "replacing", "dutch")


def require_trace(owner: str, trace: object) -> str:
    """Return ``trace`` if it is one of :data:`TRACE_KINDS`, else raise naming it."""
    if not isinstance(trace, str) or trace not in TRACE_KINDS:
        raise InvalidParameterError(
            f"{owner}: trace must be one of 'accumulating', 'replacing' or 'dutch'; "
            f"got {trace!r}."
        )
    return trace


def trace_step(
    values: np.ndarray,
    traces: dict[int, float],
    k: int,
    delta: float,
    alpha: float,
    decay: float,
    kind: str,
    cutoff: float,
    correction: float = 0.0,
) -> float | None:
    r"""Bump the trace of entry ``k``, move every traced value, then decay the traces.

    With :math:`x` the indicator of entry ``k`` and :math:`z` the traces:

    * ``"accumulating"``: :math:`z_k \leftarrow z_k + 1`;
    * ``"replacing"``: :math:`z_k \leftarrow 1`;
    * ``"dutch"``: :math:`z_k \leftarrow (1 - \alpha) z_k + 1`;

    then :math:`v \leftarrow v + \alpha(\delta + c)\,z - \alpha c\,x` with
    ``c = correction`` (0 except for the true online forms, where
    :math:`c = Q - Q_{old}`), and finally :math:`z \leftarrow \gamma\lambda z`
    (``decay``), dropping traces at or below ``cutoff``.

    Because the stored traces are already decayed, this is the book's
    :math:`z \leftarrow \gamma\lambda z + (1 - \alpha\gamma\lambda z^\top x)\,x`
    for the dutch trace with one-hot features.

    Parameters
    ----------
    values : ndarray, 1-D
        Flat view of the value table (changed in place).
    traces : dict of int to float
        Active traces (changed in place).
    k : int
        Flat index of the entry visited now.
    delta, alpha, decay, correction : float
        TD error, step size, :math:`\gamma\lambda`, true-online correction.
    kind : str
        One of :data:`TRACE_KINDS`.
    cutoff : float
        Traces at or below it are dropped after decaying.

    Returns
    -------
    float or None
        None; or, when the update would overflow a value to inf or NaN
        (rewards near the float limit), the offending value, and then
        neither ``values`` nor ``traces`` was changed.

    Examples
    --------
    >>> import numpy as np
    >>> v = np.zeros(3); z = {0: 0.5}
    >>> trace_step(v, z, 2, delta=1.0, alpha=0.5, decay=0.5, kind="accumulating", cutoff=0.0)
    >>> v.tolist(), z
    ([0.25, 0.0, 0.5], {0: 0.25, 2: 0.5})
    """
    e = traces.get(k, 0.0)
    if kind == "accumulating":
        e += 1.0
    elif kind == "replacing":
        e = 1.0
    else:
        e = (1.0 - alpha) * e + 1.0
    step = alpha * (delta + correction)
    bad = _overflow(values, traces, k, e, step, alpha * correction)
    if bad is not None:
        return bad  # nothing was changed
    traces[k] = e
    dead: list[int] = []
    for j, ej in traces.items():
        values[j] += step * ej
        ej *= decay
        if ej <= cutoff:
            dead.append(j)
        else:
            traces[j] = ej  # same key: allowed while iterating
    for j in dead:
        del traces[j]
    if correction != 0.0:
        values[k] -= alpha * correction
    return None


def _overflow(
    values: np.ndarray, traces: dict[int, float], k: int, e: float, step: float, shift: float
) -> float | None:
    """The first new value that would not be finite, or None (nothing is changed)."""
    if step - step == 0.0:  # finite: then only huge entries can overflow
        new_k = values[k] + step * e - shift
        if new_k - new_k != 0.0:
            return float(new_k)
        for j, ej in traces.items():
            if j != k:
                new = values[j] + step * ej
                if new - new != 0.0:
                    return float(new)
        return None
    return step


class TraceLearner(TabularAgent):
    """Trace bookkeeping shared by the trace learners (control and prediction).

    Subclasses provide :meth:`_next_value` (the bootstrap value) and may
    override :meth:`_before_step` and :meth:`_column`; the TD error and the
    trace step are computed here, once.
    """

    _saved_state: ClassVar[tuple[tuple[str, str], ...]] = (
        ("_traces", "per_episode"), ("_q_old", "per_episode"), ("_expect", "per_episode"),
        ("_mask_now", "per_episode"),
    )

    def __init__(
        self,
        n_states: int,
        n_actions: int,
        *,
        lam: float = 0.9,
        trace: str = "accumulating",
        trace_cutoff: float = 1e-8,
        gamma: float = 0.99,
        step_size: float | Schedule = 0.1,
        exploration: float | Schedule | Exploration = 0.1,
        initial_value: InitialValue = 0.0,
        seed: SeedLike = None,
        state_encoder: Any = None,
        action_encoder: Any = None,
    ) -> None:
        self._require_trace_params(lam, trace, trace_cutoff)
        super().__init__(
            n_states, n_actions, gamma=gamma, step_size=step_size, exploration=exploration,
            initial_value=initial_value, seed=seed, state_encoder=state_encoder,
            action_encoder=action_encoder,
        )
        self._start_traces()

    def _require_trace_params(self, lam: float, trace: str, trace_cutoff: float) -> None:
        name = type(self).__name__
        self.lam = require_in_range(name, "lam", lam, 0.0, 1.0)
        self.trace = require_trace(name, trace)
        self.trace_cutoff = require_in_range(
            name, "trace_cutoff", trace_cutoff, 0.0, 1.0, high_open=True,
            hint="Use 0 to keep every nonzero trace (exact), or a small value like 1e-8.",
        )

    def _start_traces(self) -> None:
        """Set up the (empty) traces; the tables must exist."""
        self._flat = self._values.reshape(-1)
        if not np.shares_memory(self._flat, self._values):  # pragma: no cover - contiguous
            raise RuntimeError(f"{type(self).__name__}: the value table must be C-contiguous.")
        self._traces: dict[int, float] = {}
        self._q_old = 0.0  # true online: the value of this step's pair as estimated last step
        self._expect: int | None = None  # where the next transition should start
        self._mask_now: np.ndarray | None = None  # mask of that state, if known

    # -------------------------------------------------------------- hooks
    def _column(self, a: int) -> int:
        """Table column of action ``a`` (prediction learners have one column)."""
        return a

    def _next_value(
        self, s2: int, next_mask: np.ndarray | None, terminated: bool, truncated: bool
    ) -> float:
        """The bootstrap value of ``s2`` (ignored when ``terminated``)."""
        raise NotImplementedError

    def _before_step(self, s: int, a: int) -> None:
        """Called before the trace of ``(s, a)`` is bumped."""

    # -------------------------------------------------------------- machinery
    def _reset_traces(self) -> None:
        self._traces.clear()
        self._q_old = 0.0
        self._expect = None
        self._mask_now = None

    def _learn(self, transition: Transition) -> tuple[float, ...]:
        s, a, r, s2, terminated, truncated, next_mask = transition
        if self._expect is not None and s != self._expect:
            self._reset_traces()
        self._before_step(s, a)
        q_next = self._next_value(s2, next_mask, terminated, truncated)
        col = self._column(a)
        alpha = self._count_visit(self._visits, s, col)
        k = s * self._width + col
        q_sa = float(self._flat[k])
        target = r if terminated else r + self.gamma * q_next
        delta = target - q_sa
        dutch = self.trace == "dutch"
        rows, width = self._rows, self._width
        rows[s] = None  # trace_step writes the array: drop the rows it will change
        for j in self._traces:
            rows[j // width] = None
        bad = trace_step(
            self._flat, self._traces, k, delta, alpha, self.gamma * self.lam, self.trace,
            self.trace_cutoff, (q_sa - self._q_old) if dutch else 0.0,
        )
        if bad is not None:
            self._visits[s, col] -= 1
            self._refuse_overflow(s, col, target, bad)
        if terminated or truncated:
            self._reset_traces()
        else:
            self._q_old = q_next
            self._expect = s2
            self._mask_now = next_mask
        return (delta,)

    def _end_episode(self) -> None:
        self._reset_traces()
        super()._end_episode()

    @property
    def traces(self) -> dict[tuple[int, int], float]:
        """The active eligibility traces ``{(state, column): e}`` (a copy)."""
        width = self._width
        return {divmod(k, width): e for k, e in self._traces.items()}  # type: ignore[misc]

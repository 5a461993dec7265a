r"""Sparse eligibility traces: the one place a trace step is written.

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

import numpy as np

from .._errors import InvalidParameterError

__all__ = ["TRACE_KINDS", "check_trace", "trace_step"]

#: The trace kinds every trace learner accepts.
TRACE_KINDS = ("accumulating", "replacing", "dutch")


def check_trace(owner: str, trace: object) -> str:
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
) -> None:
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
    traces[k] = e
    step = alpha * (delta + correction)
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

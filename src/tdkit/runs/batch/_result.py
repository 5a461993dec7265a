"""What :func:`tdkit.batch.train_batch` returns."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ...dp import greedy_policy

__all__ = ["BatchResult", "batch_result", "split_episodes"]


@dataclass(frozen=True, eq=False)
class BatchResult:
    """What :func:`train_batch` returns.

    Attributes
    ----------
    learner : str
        The learner's name (one of :data:`LEARNERS`).
    tables : ndarray, shape (K, S, A)
        Learned action values of each learner. For ``"double_q"`` the mean
        :math:`(Q^A + Q^B)/2`, as :attr:`tdkit.DoubleQLearning.table`.
    visits : ndarray of int64, shape (K, S, A)
        Number of updates of each pair (for ``"double_q"``: of both tables
        together).
    episode_returns : list of K ndarrays
        Undiscounted return of every *completed* episode of each learner, in
        order (an episode still running after the last step is not included).
    episode_lengths : list of K ndarrays of int64
        Number of steps of the same episodes.
    steps : int
        Steps taken by each learner.
    double_tables : ndarray, shape (2, K, S, A), or None
        For ``"double_q"`` the two tables :math:`Q^A, Q^B`; otherwise None.
    backend : str
        ``"numpy"`` or ``"compiled"``: the path that ran (both give the same
        result for the same seed).
    """

    learner: str
    tables: np.ndarray
    visits: np.ndarray
    episode_returns: list[np.ndarray]
    episode_lengths: list[np.ndarray]
    steps: int
    double_tables: np.ndarray | None = None
    backend: str = "numpy"

    @property
    def n_learners(self) -> int:
        """Number of learners K."""
        return int(self.tables.shape[0])

    def greedy_policies(self, *, atol: float = 0.0) -> np.ndarray:
        """Greedy action of every state for every learner, shape ``(K, S)``.

        Uses :func:`tdkit.dp.greedy_policy` on each table: the lowest-index
        action among those within ``atol`` of the state's maximum
        (deterministic, so the policy can be evaluated exactly with
        :func:`tdkit.evaluate_policy`).

        Examples
        --------
        >>> import numpy as np
        >>> q = np.array([[[0.0, 1.0], [2.0, 2.0]]])      # K=1, S=2, A=2
        >>> res = BatchResult("q_learning", q, np.zeros((1, 2, 2), np.int64), [], [], 0)
        >>> res.greedy_policies()
        array([[1, 0]])
        """
        k, s, a = self.tables.shape
        flat = greedy_policy(self.tables.reshape(k * s, a), atol=atol).policy
        return flat.reshape(k, s)

    def __repr__(self) -> str:
        k, s, a = self.tables.shape
        episodes = sum(len(r) for r in self.episode_returns)
        return (
            f"BatchResult(learner={self.learner!r}, n_learners={k}, n_states={s}, "
            f"n_actions={a}, steps={self.steps}, episodes={episodes})"
        )


def batch_result(
    learner: str,
    q: np.ndarray,
    visits: np.ndarray,
    ended: tuple[list[np.ndarray], list[np.ndarray], list[np.ndarray]],
    steps: int,
    backend: str,
) -> BatchResult:
    """The :class:`BatchResult` of a finished run of either path (numpy or compiled).

    ``q`` (T, K, S, A) holds the final tables (T = 2 for ``"double_q"``);
    ``ended`` holds the batches of ended-episode records ``(ids, returns,
    lengths)`` in the order they ended (see :func:`split_episodes`).
    """
    double = learner == "double_q"
    ids, returns, lengths = ended
    n_learners = q.shape[1]
    return BatchResult(
        learner=learner,
        tables=(q[0] + q[1]) / 2.0 if double else q[0],
        visits=visits,
        episode_returns=split_episodes(ids, returns, n_learners, np.float64),
        episode_lengths=split_episodes(ids, lengths, n_learners, np.int64),
        steps=steps,
        double_tables=q if double else None,
        backend=backend,
    )


def split_episodes(
    ids: list[np.ndarray], values: list[np.ndarray], n_learners: int, dtype: type
) -> list[np.ndarray]:
    """Group records of ended episodes into one array per learner, in order.

    ``ids[j]`` and ``values[j]`` are parallel arrays (learner, value) of one
    batch of records; within a learner, records keep their order.
    """
    if not ids:
        return [np.zeros(0, dtype=dtype) for _ in range(n_learners)]
    all_ids = np.concatenate(ids)
    all_values = np.concatenate(values).astype(dtype, copy=False)
    order = np.argsort(all_ids, kind="stable")
    bounds = np.cumsum(np.bincount(all_ids, minlength=n_learners))[:-1]
    return [part.copy() for part in np.split(all_values[order], bounds)]

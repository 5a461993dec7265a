r"""Learned models of the environment for the planning learners.

Two tabular models answer the same questions:

* :class:`LastOutcomeModel` (``model="last"``): each pair predicts the last
  outcome observed, the deterministic model of the book's Tabular Dyna-Q.
* :class:`CountsModel` (``model="counts"``): each pair keeps a count of each
  distinct ``(next state, terminated)`` outcome and the mean reward seen with
  it, i.e. the maximum-likelihood model of a stochastic environment.

Both answer with :class:`Outcome` named tuples ``(probability, next_state,
reward, terminated, next_mask)``. Transitions cut by a time limit are
recorded as ordinary, non-terminal outcomes: truncation is not part of the
dynamics. Both models keep predecessor lists (which pairs
are predicted to lead to a state) for prioritized sweeping.

References
----------
.. [1] Sutton, R. S. & Barto, A. G. (2018). Reinforcement Learning: An
   Introduction, 2nd ed., Sections 8.2 (Tabular Dyna-Q) and 8.4
   (prioritized sweeping with counts for stochastic environments).
"""

from __future__ import annotations

import math
from typing import Any, ClassVar, NamedTuple

import numpy as np

from .._errors import InvalidParameterError

__all__ = ["MODEL_KINDS", "CountsModel", "LastOutcomeModel", "Outcome", "make_model"]

#: The model kinds the planning learners accept.
MODEL_KINDS = ("last", "counts")


class Outcome(NamedTuple):
    """One predicted outcome of an observed pair.

    The field order is that of the outcomes of :class:`tdkit.FiniteMDP` and of
    gymnasium's ``P[s][a]`` tables, plus the mask of the next state.
    """

    probability: float
    next_state: int
    reward: float
    terminated: bool
    next_mask: np.ndarray | None


_new_outcome = tuple.__new__  # builds an Outcome without the Python-level __new__ (hot path)


class _PairIndex:
    """Observed states and, per state, the actions taken there (insertion order)."""

    def __init__(self) -> None:
        self.states: list[int] = []
        self.actions: dict[int, list[int]] = {}
        self.predecessors: dict[int, dict[tuple[int, int], None]] = {}

    def _note_pair(self, s: int, a: int, is_new: bool) -> None:
        if not is_new:
            return
        acts = self.actions.get(s)
        if acts is None:
            self.states.append(s)
            self.actions[s] = [a]
        else:
            acts.append(a)

    def sample_pair(self, rng: np.random.Generator) -> tuple[int, int]:
        """A uniformly random observed state, then a uniformly random action taken there."""
        states = self.states
        s = states[int(rng.random() * len(states))]
        acts = self.actions[s]
        return s, acts[int(rng.random() * len(acts))]

    def predecessors_of(self, s2: int) -> list[tuple[int, int]]:
        """Pairs the model predicts can lead to ``s2``."""
        return list(self.predecessors.get(s2, ()))

    def __len__(self) -> int:
        return len(self.states)

    def _index_state(self) -> dict:
        return {
            "states": list(self.states),
            "actions": [[s, list(acts)] for s, acts in self.actions.items()],
            "predecessors": [
                [s2, [list(pair) for pair in pairs]] for s2, pairs in self.predecessors.items()
            ],
        }

    @staticmethod
    def _require_index_state(state: Any, n_states: int, n_actions: int) -> set[tuple[int, int]]:
        """Check the index part of a saved state; return the observed pairs."""
        _expect(isinstance(state, dict) and {"states", "actions", "predecessors", "table"}
                <= set(state), "", state, "an object with states, actions, predecessors, table")
        states = state["states"]
        _expect(isinstance(states, list) and all(_is_index(s, n_states) for s in states)
                and len(set(states)) == len(states), "states", states,
                f"a list of distinct states in [0, {n_states})")
        pairs: set[tuple[int, int]] = set()
        seen: set[int] = set()
        actions = state["actions"]
        _expect(isinstance(actions, list), "actions", actions, "a list")
        for item in actions:
            ok = (isinstance(item, list) and len(item) == 2 and _is_index(item[0], n_states)
                  and item[0] not in seen and isinstance(item[1], list) and item[1]
                  and all(_is_index(a, n_actions) for a in item[1])
                  and len(set(item[1])) == len(item[1]))
            _expect(ok, "actions", item, "[state, [distinct actions]] with indices in range")
            seen.add(item[0])
            pairs.update((item[0], a) for a in item[1])
        _expect(seen == set(states), "actions", actions, "one entry per observed state")
        predecessors = state["predecessors"]
        _expect(isinstance(predecessors, list), "predecessors", predecessors, "a list")
        for item in predecessors:
            ok = (isinstance(item, list) and len(item) == 2 and _is_index(item[0], n_states)
                  and isinstance(item[1], list)
                  and all(isinstance(p, list) and len(p) == 2 and (p[0], p[1]) in pairs
                          for p in item[1]))
            _expect(ok, "predecessors", item, "[state, [observed pairs]]")
        return pairs

    def _set_index_state(self, state: dict) -> None:
        self.states = [int(s) for s in state["states"]]
        self.actions = {int(s): [int(a) for a in acts] for s, acts in state["actions"]}
        self.predecessors = {
            int(s2): {(int(s), int(a)): None for s, a in pairs}
            for s2, pairs in state["predecessors"]
        }


def _require_predecessors(state: dict, derived: dict[int, set[tuple[int, int]]]) -> None:
    """The saved predecessor lists must be exactly those the saved outcomes imply.

    They are derived data (kept in insertion order, which prioritized sweeping
    reads); a file whose lists disagree with its outcomes is refused.
    """
    saved: dict[int, set[tuple[int, int]]] = {}
    for s2, pairs in state["predecessors"]:
        _expect(s2 not in saved, "predecessors", s2, "listed once")
        found = {(p[0], p[1]) for p in pairs}
        _expect(len(found) == len(pairs), "predecessors", pairs, "distinct pairs")
        if found:
            saved[s2] = found
    derived = {s2: pairs for s2, pairs in derived.items() if pairs}
    _expect(saved == derived, "predecessors", state["predecessors"],
            "the pairs whose recorded outcomes lead to each state")


def _expect(ok: Any, where: str, value: Any, expected: str) -> None:
    if not ok:
        raise ValueError(f"model.{where}: {value!r:.80} is not {expected}.")


def _is_index(value: Any, size: int) -> bool:
    return isinstance(value, int) and not isinstance(value, bool) and 0 <= value < size


def _is_real(value: Any) -> bool:
    return (isinstance(value, (int, float)) and not isinstance(value, bool)
            and math.isfinite(value))


def _is_mask(value: Any, n_actions: int) -> bool:
    return value is None or (isinstance(value, list) and len(value) == n_actions
                             and all(isinstance(x, bool) for x in value) and any(value))


def _mask_to_json(mask: np.ndarray | None) -> list[bool] | None:
    return None if mask is None else [bool(x) for x in mask]


def _mask_from_json(mask: list[bool] | None) -> np.ndarray | None:
    return None if mask is None else np.array(mask, dtype=bool)


class _Model(_PairIndex):
    """What both models share: recording a transition, the saved-state layout and its check.

    ``_table`` maps each observed pair to what the model keeps for it;
    subclasses say how a transition changes that entry (:meth:`_update`),
    how an entry is written to and read from a saved row, and which next
    states a saved row predicts (for the predecessor check).
    """

    #: Completes "covered: pairs without ..." in the message about a pair with no row.
    _missing: ClassVar[str] = "outcomes"

    _table: dict[tuple[int, int], Any]

    def record(
        self, s: int, a: int, r: float, s2: int, terminated: bool, mask: np.ndarray | None
    ) -> None:
        """Learn the real transition from ``(s, a)`` to ``(r, s2, terminated, mask)``."""
        key = (s, a)
        entry = self._table.get(key)
        self._note_pair(s, a, entry is None)
        self._update(key, entry, r, s2, terminated, mask)
        self.predecessors.setdefault(s2, {})[key] = None

    def _update(
        self, key: tuple[int, int], entry: Any, r: float, s2: int, terminated: bool,
        mask: np.ndarray | None,
    ) -> None:
        raise NotImplementedError

    def __contains__(self, pair: object) -> bool:
        return pair in self._table

    def get_state(self) -> dict:
        """JSON-serialisable contents, in insertion order (for :mod:`tdkit.store`)."""
        row = self._row_to_json
        return {**self._index_state(), "table": [row(key, v) for key, v in self._table.items()]}

    @staticmethod
    def _row_to_json(key: tuple[int, int], entry: Any) -> list:
        raise NotImplementedError

    @classmethod
    def require_state(cls, state: Any, n_states: int, n_actions: int) -> None:
        """Raise ValueError naming the entry unless ``state`` fits a table of this size."""
        pairs = cls._require_index_state(state, n_states, n_actions)
        table = state["table"]
        _expect(isinstance(table, list) and len(table) == len(pairs), "table", table,
                "one row per observed pair")
        derived: dict[int, set[tuple[int, int]]] = {}
        for row in table:
            for s2 in cls._checked_successors(row, pairs, n_states, n_actions):
                derived.setdefault(s2, set()).add((row[0], row[1]))
            pairs.discard((row[0], row[1]))
        _expect(not pairs, "table", sorted(pairs), f"covered: pairs without {cls._missing}")
        _require_predecessors(state, derived)

    @staticmethod
    def _checked_successors(
        row: Any, pairs: set[tuple[int, int]], n_states: int, n_actions: int
    ) -> list[int]:
        """Raise unless ``row`` is a saved row of a pair in ``pairs``; return its next states."""
        raise NotImplementedError


class LastOutcomeModel(_Model):
    """Each observed pair predicts the outcome it had last (deterministic model).

    Examples
    --------
    >>> m = LastOutcomeModel()
    >>> m.record(0, 1, 2.0, 3, False, None)
    >>> m.outcomes(0, 1)
    [Outcome(probability=1.0, next_state=3, reward=2.0, terminated=False, next_mask=None)]
    >>> m.predecessors_of(3)
    [(0, 1)]
    """

    _missing = "an outcome"

    def __init__(self) -> None:
        super().__init__()
        self._table: dict[tuple[int, int], Outcome] = {}

    def _update(
        self, key: tuple[int, int], entry: Outcome | None, r: float, s2: int, terminated: bool,
        mask: np.ndarray | None,
    ) -> None:
        if entry is not None and entry.next_state != s2:
            self.predecessors[entry.next_state].pop(key, None)
        self._table[key] = Outcome(1.0, s2, r, terminated, mask)

    def sample(self, s: int, a: int, rng: np.random.Generator) -> Outcome:
        """The predicted outcome of ``(s, a)`` (``rng`` is unused)."""
        return self._table[(s, a)]

    def outcomes(self, s: int, a: int) -> list[Outcome]:
        """The one predicted outcome of ``(s, a)``, with probability 1."""
        return [self._table[(s, a)]]

    @staticmethod
    def _row_to_json(key: tuple[int, int], entry: Outcome) -> list:
        s, a = key
        return [s, a, entry.reward, entry.next_state, bool(entry.terminated),
                _mask_to_json(entry.next_mask)]

    @staticmethod
    def _checked_successors(
        row: Any, pairs: set[tuple[int, int]], n_states: int, n_actions: int
    ) -> list[int]:
        ok = (isinstance(row, list) and len(row) == 6 and (row[0], row[1]) in pairs
              and _is_real(row[2]) and _is_index(row[3], n_states)
              and isinstance(row[4], bool) and _is_mask(row[5], n_actions))
        _expect(ok, "table", row, "[state, action, reward, next state, terminated, mask]")
        return [row[3]]

    def set_state(self, state: dict) -> None:
        """Inverse of :meth:`get_state`."""
        self._set_index_state(state)
        self._table = {
            (int(s), int(a)): Outcome(1.0, int(s2), float(r), bool(t), _mask_from_json(m))
            for s, a, r, s2, t, m in state["table"]
        }


class CountsModel(_Model):
    """Outcome counts and mean rewards per pair (maximum-likelihood model).

    Examples
    --------
    >>> m = CountsModel()
    >>> for r, s2 in [(1.0, 1), (3.0, 1), (0.0, 2)]:
    ...     m.record(0, 0, r, s2, False, None)
    >>> [(round(o.probability, 3), o.reward, o.next_state) for o in m.outcomes(0, 0)]
    [(0.667, 2.0, 1), (0.333, 0.0, 2)]
    """

    def __init__(self) -> None:
        super().__init__()
        # (s, a) -> {(s2, terminated): [count, mean reward, latest mask]}, and total counts
        self._table: dict[tuple[int, int], dict[tuple[int, bool], list]] = {}
        self._totals: dict[tuple[int, int], int] = {}
        # (s, a) -> its outcomes as built by ``outcomes``, until (s, a) is recorded again
        self._outcomes: dict[tuple[int, int], list[Outcome]] = {}

    def _update(
        self, key: tuple[int, int], per_pair: dict[tuple[int, bool], list] | None, r: float,
        s2: int, terminated: bool, mask: np.ndarray | None,
    ) -> None:
        """Count the outcome and update its mean reward incrementally."""
        self._outcomes.pop(key, None)
        if per_pair is None:
            per_pair = self._table[key] = {}
            self._totals[key] = 0
        entry = per_pair.get((s2, terminated))
        if entry is None:
            per_pair[(s2, terminated)] = [1, r, mask]
        else:
            entry[0] += 1
            entry[1] += (r - entry[1]) / entry[0]
            entry[2] = mask
        self._totals[key] += 1

    def sample(self, s: int, a: int, rng: np.random.Generator) -> Outcome:
        """An outcome of ``(s, a)`` drawn with probability proportional to its count."""
        key = (s, a)
        total = self._totals[key]
        u = rng.random() * total
        for (s2, terminated), (count, mean_r, mask) in self._table[key].items():
            u -= count
            if u < 0:
                return _new_outcome(Outcome, (count / total, s2, mean_r, terminated, mask))
        return _new_outcome(Outcome, (count / total, s2, mean_r, terminated, mask))  # rounding

    def outcomes(self, s: int, a: int) -> list[Outcome]:
        """Every outcome seen from ``(s, a)``, with its frequency and mean reward.

        The list is kept until ``(s, a)`` is recorded again (prioritized
        sweeping asks for it far more often): read it, do not change it.
        """
        key = (s, a)
        found = self._outcomes.get(key)
        if found is None:
            total = self._totals[key]
            found = self._outcomes[key] = [
                _new_outcome(Outcome, (count / total, s2, mean_r, terminated, mask))
                for (s2, terminated), (count, mean_r, mask) in self._table[key].items()
            ]
        return found

    @staticmethod
    def _row_to_json(key: tuple[int, int], outcomes: dict[tuple[int, bool], list]) -> list:
        s, a = key
        return [s, a, [[s2, bool(t), count, mean_r, _mask_to_json(mask)]
                       for (s2, t), (count, mean_r, mask) in outcomes.items()]]

    @staticmethod
    def _checked_successors(
        row: Any, pairs: set[tuple[int, int]], n_states: int, n_actions: int
    ) -> list[int]:
        ok = (isinstance(row, list) and len(row) == 3 and (row[0], row[1]) in pairs
              and isinstance(row[2], list) and row[2])
        _expect(ok, "table", row, "[state, action, [outcomes]]")
        seen = set()
        for out in row[2]:
            ok = (isinstance(out, list) and len(out) == 5 and _is_index(out[0], n_states)
                  and isinstance(out[1], bool) and (out[0], out[1]) not in seen
                  and _is_index(out[2], 2**62) and out[2] >= 1 and _is_real(out[3])
                  and _is_mask(out[4], n_actions))
            _expect(ok, "table", out,
                    "[next state, terminated, count >= 1, mean reward, mask], distinct")
            seen.add((out[0], out[1]))
        return [out[0] for out in row[2]]

    def set_state(self, state: dict) -> None:
        """Inverse of :meth:`get_state`."""
        self._set_index_state(state)
        self._table = {}
        self._totals = {}
        self._outcomes = {}
        for s, a, outcomes in state["table"]:
            key = (int(s), int(a))
            self._table[key] = {
                (int(s2), bool(t)): [int(count), float(mean_r), _mask_from_json(m)]
                for s2, t, count, mean_r, m in outcomes
            }
            self._totals[key] = sum(int(o[2]) for o in outcomes)


def make_model(owner: str, kind: object) -> LastOutcomeModel | CountsModel:
    """Build the model named ``kind`` or raise naming the parameter."""
    if kind == "last":
        return LastOutcomeModel()
    if kind == "counts":
        return CountsModel()
    raise InvalidParameterError(
        f"{owner}: model must be 'last' (deterministic, last outcome) or 'counts' "
        f"(stochastic, outcome counts); got {kind!r}."
    )

r"""The probe problems the verifier trains agents on (public, to rebuild a failing run).

Each probe is a :class:`~tdkit.envs.finite.FiniteMDP` built so that one
classic bug changes what a learner converges to by a wide margin, while a
correct learner's answer does not depend on its exploration: every state a
target bootstraps from has actions with identical outcomes (or a single
allowed action), so on-policy and off-policy learners share the fixed point
:math:`Q^*`, computed exactly by :func:`tdkit.dp.value_iteration`. The
*choice* states, where a greedy agent must pick the optimal action, are only
ever start states, so their values are never bootstrapped from.

Environments are sampled through :meth:`FiniteMDP.to_env` (so
``env.unwrapped.gamma`` is the discount), wrapped by
:class:`~tdkit.verify._probes.ProbeEnv` to report action masks in
``info["action_mask"]``, to record masked actions the agent took, and to
report some terminal states under the observation of a live state (as
gymnasium's Taxi does when a drop-off lands in a state that is also entered
without ending the episode). A probe's time limit (:attr:`Probe.max_steps`)
is not built into its environment: the verifier passes it to the episode
driver as ``max_episode_steps``, exactly as ``tdkit.train`` does, so a failing
run is rebuilt by

>>> import tdkit
>>> from tdkit.verify import probes
>>> probe = probes.get("truncation-probe")
>>> env = probe.make_env()
>>> agent = tdkit.QLearning.for_env(env, step_size=0.5, seed=3)
>>> history = tdkit.train(agent, env, episodes=50, seed=3,
...                       max_episode_steps=probe.max_steps)
>>> round(float(agent.q_values(1).max()), 2)   # Q*(1, .) = 1 / (1 - 0.5)
2.0

(the "reproduce:" line of a failed check prints these calls with its own
factory, seed, episodes and time limit).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

from .._errors import InvalidParameterError
from ..dp import value_iteration
from ..envs.finite import FiniteMDP
from ._probes import ProbeEnv

__all__ = [
    "PROBES",
    "Probe",
    "ProbeEnv",
    "both_flags_probe",
    "get",
    "discount_probe",
    "masks_probe",
    "next_action_probe",
    "numeric_probe",
    "state_probe",
    "terminal_probe",
    "tie_probe",
    "truncation_probe",
]

Moves = dict[tuple[int, int], tuple[int, float]]

TWICE = "discounting twice (gamma squared per step)"
"""The bug named when values match a model discounted by gamma**2."""

BOTH_FLAGS = (
    "bootstrapping although terminated and truncated are both set: terminated wins"
)
"""The bug named by the both-flags probe."""


def _mdp(
    n_states: int,
    n_actions: int,
    moves: Moves,
    *,
    gamma: float,
    terminal: tuple[int, ...] = (),
    starts: tuple[int, ...],
) -> FiniteMDP:
    """A deterministic model from ``moves[(s, a)] = (next state, reward)``.

    A move given as ``(s, -1)`` applies to every action of ``s``.
    """
    P = np.zeros((n_states, n_actions, n_states))
    R = np.zeros((n_states, n_actions))
    for (s, a), (s2, r) in moves.items():
        actions = range(n_actions) if a == -1 else (a,)
        for b in actions:
            P[s, b, :] = 0.0
            P[s, b, s2] = 1.0
            R[s, b] = r
    term = np.zeros(n_states, dtype=bool)
    term[list(terminal)] = True
    for s in np.flatnonzero(term):
        P[s, :, s] = 1.0
    initial = np.zeros(n_states)
    initial[list(starts)] = 1.0 / len(starts)
    return FiniteMDP(P, R, gamma=gamma, terminal=term, initial=initial)


@dataclass(frozen=True)
class Probe:
    """A probe problem: the model sampled, the model solved, and what to look at.

    Attributes
    ----------
    name : str
    mdp : FiniteMDP
        What the environment samples.
    model : FiniteMDP
        What :func:`value_iteration` solves for the right answer (it differs
        from ``mdp`` only where masked actions are modelled as ruinous).
    value_states : tuple of int
        States whose optimal-action values are compared with :math:`Q^*`.
    choice_states : tuple of int
        States where the greedy action must be optimal.
    max_steps : int or None
        Time limit of the environment (``truncated=True`` when reached).
    alias : dict
        Terminal state -> the observation reported on entering it.
    masks : ndarray of bool (S, A) or None
    bug : str
        The classic bug this probe exposes, for messages.
    bug_model : FiniteMDP or None
        A model whose optimal values are what that bug converges to.
    more_bugs : tuple of (str, FiniteMDP)
        Other bugs this probe exposes, with the models of what they converge
        to; a failure message names the bug whose values are nearest to the
        values seen.
    source : str
        Where the problem comes from.
    """

    name: str
    mdp: FiniteMDP
    model: FiniteMDP
    value_states: tuple[int, ...]
    choice_states: tuple[int, ...] = ()
    max_steps: int | None = None
    alias: dict[int, int] = field(default_factory=dict)
    masks: np.ndarray | None = None
    bug: str = ""
    bug_model: FiniteMDP | None = None
    more_bugs: tuple[tuple[str, FiniteMDP], ...] = ()
    source: str = "tdkit verifier probe"

    def make_env(self) -> ProbeEnv:
        """A fresh environment sampling :attr:`mdp` (the time limit is the driver's)."""
        return ProbeEnv(self.mdp.to_env(), name=self.name, alias=self.alias, masks=self.masks)

    @cached_property
    def bugs(self) -> tuple[tuple[str, np.ndarray], ...]:
        """``(bug, Q of its model)`` for every modelled bug of this probe."""
        found = []
        if self.bug_model is not None:
            found.append((self.bug, value_iteration(self.bug_model, tol=1e-12).q))
        for text, model in self.more_bugs:
            found.append((text, value_iteration(model, tol=1e-12).q))
        return tuple(found)

    @cached_property
    def q(self) -> np.ndarray:
        """:math:`Q^*` of :attr:`model`."""
        return value_iteration(self.model, tol=1e-12).q

    @cached_property
    def bug_q(self) -> np.ndarray | None:
        """The values the classic bug converges to (None when not modelled)."""
        if self.bug_model is None:
            return None
        return value_iteration(self.bug_model, tol=1e-12).q

    def allowed(self, s: int) -> np.ndarray:
        """Boolean mask of the actions allowed in ``s``."""
        if self.masks is None:
            return np.ones(self.mdp.n_actions, dtype=bool)
        return self.masks[s]

    def optimal_actions(self, s: int, q: np.ndarray | None = None) -> np.ndarray:
        """Allowed actions within 1e-9 of the best value of ``s``."""
        row = np.where(self.allowed(s), self.q[s] if q is None else q[s], -np.inf)
        return np.flatnonzero(row >= row.max() - 1e-9)


# ---------------------------------------------------------------- the probes
def masks_probe() -> Probe:
    r"""Action 1 of state 1 is masked, tempting (+10) and would dominate a careless max.

    State 0 chooses between going to state 1 (reward 2) and ending with +1;
    state 1 allows only action 0, which ends with -10. So with
    :math:`\gamma = 0.9`, :math:`Q^*(0, \cdot) = (2 - 9, 1) = (-7, 1)` and the
    greedy action in 0 is 1. A target that lets the masked action (still at
    its initial value 0) into the max gives :math:`Q(0, 0) = 2` and prefers 0.
    """
    moves: Moves = {(0, 0): (1, 2.0), (0, 1): (2, 1.0), (1, 0): (2, -10.0), (1, 1): (2, 10.0)}
    mdp = _mdp(3, 2, moves, gamma=0.9, terminal=(2,), starts=(0, 1))
    model = _mdp(3, 2, {**moves, (1, 1): (2, -1000.0)}, gamma=0.9, terminal=(2,), starts=(0, 1))
    bug = _mdp(3, 2, {**moves, (1, 1): (2, 0.0)}, gamma=0.9, terminal=(2,), starts=(0, 1))
    masks = np.array([[True, True], [True, False], [True, True]])
    return Probe(
        "masks-probe", mdp, model, value_states=(0, 1), choice_states=(0,), masks=masks,
        bug="letting masked actions into the target's max or expectation", bug_model=bug,
    )


def terminal_probe(prediction: bool = False) -> Probe:
    r"""Episodes end in a terminal state reported as observation 1, whose row is worth 10.

    State 1 is a start state worth 10 (both actions end the episode with
    +10), and every terminal transition reports observation 1. A learner that
    bootstraps past ``terminated`` adds :math:`\gamma \max_a Q(1, a)` to every
    final reward and converges to :math:`Q(1, \cdot) = 10 / (1 - 0.9) = 100`.
    Control version: state 0 ends at once with -1 or moves to state 2 (which
    ends with +1): :math:`Q^*(0, \cdot) = (-1, 0.9)`, greedy action 1; the bug
    gives :math:`(89, 81.9)`, greedy action 0.
    """
    if prediction:
        moves: Moves = {(0, 0): (2, 1.0), (1, 0): (2, 10.0)}
        mdp = _mdp(3, 1, moves, gamma=0.9, terminal=(2,), starts=(0, 1))
        bug = _mdp(3, 1, {(0, 0): (1, 1.0), (1, 0): (1, 10.0), (2, 0): (2, 0.0)}, gamma=0.9,
                   starts=(0, 1))
        return Probe(
            "terminal-probe", mdp, mdp, value_states=(0, 1), alias={2: 1},
            bug="bootstrapping past terminated", bug_model=bug,
        )
    moves = {(0, 0): (3, -1.0), (0, 1): (2, 0.0), (1, -1): (3, 10.0), (2, -1): (3, 1.0)}
    mdp = _mdp(4, 2, moves, gamma=0.9, terminal=(3,), starts=(0, 1, 2))
    bug_moves = {(0, 0): (1, -1.0), (0, 1): (2, 0.0), (1, -1): (1, 10.0), (2, -1): (1, 1.0),
                 (3, -1): (3, 0.0)}
    bug = _mdp(4, 2, bug_moves, gamma=0.9, starts=(0, 1, 2))
    return Probe(
        "terminal-probe", mdp, mdp, value_states=(0, 1, 2), choice_states=(0,), alias={3: 1},
        bug="bootstrapping past terminated", bug_model=bug,
    )


def truncation_probe(prediction: bool = False) -> Probe:
    r"""Every episode is cut after one step (``truncated=True``) in a state worth 2.

    State 1 loops on itself with reward 1 forever: with :math:`\gamma = 0.5`,
    :math:`Q^*(1, \cdot) = 2`. A learner that treats the time limit as
    termination learns 1. Control version: state 0 moves to 1 (reward -0.5,
    :math:`Q^* = -0.5 + 0.5 \cdot 2 = 0.5`) or ends with -0.25; the greedy
    action is 0, while the bug values it at -0.5 and prefers 1.
    """
    if prediction:
        mdp = _mdp(2, 1, {(0, 0): (1, 0.0), (1, 0): (1, 1.0)}, gamma=0.5, starts=(0, 1))
        bug = _mdp(3, 1, {(0, 0): (2, 0.0), (1, 0): (2, 1.0)}, gamma=0.5, terminal=(2,),
                   starts=(0, 1))
        return Probe(
            "truncation-probe", mdp, mdp, value_states=(0, 1), max_steps=1,
            bug="treating truncation (a time limit) as termination", bug_model=bug,
            more_bugs=((TWICE, mdp.with_gamma(0.25)),),
        )
    moves: Moves = {(0, 0): (1, -0.5), (0, 1): (2, -0.25), (1, -1): (1, 1.0)}
    mdp = _mdp(3, 2, moves, gamma=0.5, terminal=(2,), starts=(0, 1))
    bug = _mdp(3, 2, {(0, 0): (2, -0.5), (0, 1): (2, -0.25), (1, -1): (2, 1.0)}, gamma=0.5,
               terminal=(2,), starts=(0, 1))
    return Probe(
        "truncation-probe", mdp, mdp, value_states=(0, 1), choice_states=(0,), max_steps=1,
        bug="treating truncation (a time limit) as termination", bug_model=bug,
        more_bugs=((TWICE, mdp.with_gamma(0.25)),),
    )


def both_flags_probe(prediction: bool = False) -> Probe:
    r"""Episodes that terminate exactly at the time limit: ``terminated`` and ``truncated``.

    The time limit is 2 steps. States 0 and 4 move to state 1 (reward 0), and
    every action of state 1 ends the episode with +1 on the second step, so
    that transition carries both flags; its terminal state is reported as
    observation 2, a start state worth 10 (both actions end at once with
    +10, on the first step: ``terminated`` only). Episodes start in 0, 2 or 4
    with equal probability. With :math:`\gamma = 0.9`,
    :math:`Q^*(1, \cdot) = 1`; an agent that bootstraps whenever
    ``truncated`` is set learns :math:`Q(1, \cdot) = 1 + 0.9 \cdot 10 = 10`.
    Control version: action 1 of state 0 ends at once with +2
    (:math:`Q^*(0, \cdot) = (0.9, 2)`).

    The values of states 1 and 2 are checked. State 1 is reached from start
    4 whatever the agent does: about 267 of 800 episodes (at least 200 with
    probability above :math:`1 - 10^{-6}`, a binomial tail), so each checked
    pair has enough updates at step sizes from 0.1 up. State 0 is not
    checked: its action 0 is taken only when exploring (about 5% of its
    visits at ε = 0.1), too rarely for a budget of 800 episodes, and
    calibration found correct Double Q-learning agents failing on it.

    The gymnasium step contract (``terminated`` and ``truncated`` may both be
    True; a terminal state has value 0 whatever the time limit says) is
    Towers et al. (2024), "Gymnasium: A Standard Interface for Reinforcement
    Learning Environments", and Pardo et al. (2018), "Time Limits in
    Reinforcement Learning", ICML.
    """
    n_actions = 1 if prediction else 2
    moves: Moves = {(0, 0): (1, 0.0), (1, -1): (3, 1.0), (2, -1): (3, 10.0), (4, -1): (1, 0.0)}
    bug_moves: Moves = {(0, 0): (1, 0.0), (1, -1): (2, 1.0), (2, -1): (3, 10.0),
                        (4, -1): (1, 0.0)}
    if not prediction:
        moves[(0, 1)] = (3, 2.0)
        bug_moves[(0, 1)] = (3, 2.0)
    mdp = _mdp(5, n_actions, moves, gamma=0.9, terminal=(3,), starts=(0, 2, 4))
    bug = _mdp(5, n_actions, bug_moves, gamma=0.9, terminal=(3,), starts=(0, 2, 4))
    return Probe(
        "both-flags-probe", mdp, mdp, value_states=(1, 2),
        choice_states=(), max_steps=2, alias={3: 2},
        bug=BOTH_FLAGS, bug_model=bug,
    )


def discount_probe(prediction: bool = False) -> Probe:
    r"""A deterministic chain 0 -> 1 -> ... -> 4 -> end, gamma = 0.8.

    Prediction version: the last step pays 1, so :math:`v(s) = 0.8^{4 - s}`
    exactly. Control version: the last step pays 2, so
    :math:`Q^*(s, \cdot) = 2 \cdot 0.8^{4 - s}` for ``s = 1..4`` (both
    actions move along the chain); in state 0, action 0 enters the chain for a
    toll of -1 (:math:`Q^* = -1 + 2 \cdot 0.8^4 = -0.18`) and action 1 ends at
    once with 0.5, which is optimal. Without discounting the chain would be
    worth :math:`-1 + 2 = 1` and win. A missing or misplaced discount, a wrong
    sign, or a multi-step return with the wrong power of :math:`\gamma` all
    change these values.
    """
    starts = (0, 1, 2, 3, 4)
    bug_text = "a missing discount (gamma = 1)"
    moves: Moves = {(s, -1): (s + 1, 0.0) for s in range(1, 4)}
    if prediction:
        moves[(0, 0)] = (1, 0.0)
        moves[(4, -1)] = (5, 1.0)
        mdp = _mdp(6, 1, moves, gamma=0.8, terminal=(5,), starts=starts)
        return Probe("discount-probe", mdp, mdp, value_states=starts, bug=bug_text,
                     bug_model=mdp.with_gamma(1.0),
                     more_bugs=((TWICE, mdp.with_gamma(0.64)),))
    moves[(4, -1)] = (5, 2.0)
    moves[(0, 0)] = (1, -1.0)
    moves[(0, 1)] = (5, 0.5)
    mdp = _mdp(6, 2, moves, gamma=0.8, terminal=(5,), starts=starts)
    return Probe(
        "discount-probe", mdp, mdp, value_states=starts, choice_states=(0,), bug=bug_text,
        bug_model=mdp.with_gamma(1.0),
        more_bugs=((TWICE, mdp.with_gamma(0.64)),),
    )


#: Best action of each state of the state probe: the Thue-Morse sequence (parity of
#: the number of 1 bits), so states that differ in any one bit of their index
#: disagree, and folding indices by a modulus or a shift mixes disagreeing states.
_BEST = tuple(bin(s).count("1") % 2 for s in range(8))


def state_probe(prediction: bool = False) -> Probe:
    """Eight start states, each with its own value and (control) its own best action.

    State ``s`` ends the episode at once; its best action pays
    ``1 + s / 7`` and the other pays -1 (prediction version: one action
    paying ``±(1 + s/7)``). An encoder that sends two observations to one
    table row mixes their values, and the greedy action of one of them turns
    wrong whenever their best actions differ.
    """
    starts = tuple(range(8))
    if prediction:
        moves: Moves = {(s, 0): (8, (1.0 - 2.0 * _BEST[s]) * (1.0 + s / 7)) for s in starts}
        mdp = _mdp(9, 1, moves, gamma=0.9, terminal=(8,), starts=starts)
        return Probe("state-probe", mdp, mdp, value_states=starts,
                     bug="sending two observations to one table row (an encoder collision)")
    moves = {}
    for s in starts:
        moves[(s, _BEST[s])] = (8, 1.0 + s / 7)
        moves[(s, 1 - _BEST[s])] = (8, -1.0)
    mdp = _mdp(9, 2, moves, gamma=0.9, terminal=(8,), starts=starts)
    return Probe(
        "state-probe", mdp, mdp, value_states=starts, choice_states=starts,
        bug="sending two observations to one table row (an encoder collision)",
    )


def tie_probe(n_actions: int = 4) -> Probe:
    """One state whose actions all end the episode with reward 0: every action ties."""
    mdp = _mdp(2, n_actions, {(0, -1): (1, 0.0)}, gamma=0.9, terminal=(1,), starts=(0,))
    return Probe("tie-probe", mdp, mdp, value_states=(0,))


def next_action_probe() -> Probe:
    r"""State 0 leads to state 1, whose three actions end with 0, 5 and 10.

    Once :math:`Q(1, \cdot)` has separated, the target of a transition
    0 -> 1 names the action it bootstraps on, which lets the verifier compare
    it with the action then taken in state 1.
    """
    moves: Moves = {(0, -1): (1, 0.0), (1, 0): (2, 0.0), (1, 1): (2, 5.0), (1, 2): (2, 10.0)}
    mdp = _mdp(3, 3, moves, gamma=0.9, terminal=(2,), starts=(0,))
    return Probe("next-action-probe", mdp, mdp, value_states=(0, 1))


#: Reward scale of the numeric probe: large, yet squares (1e300) stay below the
#: float64 maximum (1.8e308), so a careful learner never overflows.
NUMERIC_SCALE = 1e150


def numeric_probe(prediction: bool = False) -> Probe:
    """A stochastic 3-state model with rewards of magnitude up to 1e150 of both signs.

    Episodes end with probability 0.2 per step or after 20 steps.
    """
    n_actions = 1 if prediction else 2
    rng = np.random.default_rng(20210101)
    P = np.zeros((4, n_actions, 4))
    P[:3, :, :3] = rng.dirichlet(np.ones(3), size=(3, n_actions)) * 0.8
    P[:3, :, 3] = 0.2
    P[3, :, 3] = 1.0
    R = rng.choice([-1.0, 1.0], size=(4, n_actions, 4)) * NUMERIC_SCALE * rng.uniform(
        0.5, 1.0, size=(4, n_actions, 4)
    )
    mdp = FiniteMDP(P, R, gamma=0.9, terminal=[False, False, False, True],
                    initial=[1 / 3, 1 / 3, 1 / 3, 0.0])
    return Probe("numeric-probe", mdp, mdp, value_states=(0, 1, 2), max_steps=20)


#: Every probe by name: ``PROBES[name](prediction)`` builds it (``prediction``
#: selects the one-action version used for state-value learners, where there is one).
PROBES = {
    "masks-probe": lambda prediction=False: masks_probe(),
    "terminal-probe": terminal_probe,
    "truncation-probe": truncation_probe,
    "both-flags-probe": both_flags_probe,
    "discount-probe": discount_probe,
    "state-probe": state_probe,
    "tie-probe": lambda prediction=False: tie_probe(),
    "next-action-probe": lambda prediction=False: next_action_probe(),
    "numeric-probe": numeric_probe,
}


def get(name: str, *, prediction: bool = False) -> Probe:
    """The probe called ``name`` (as in a report's "reproduce:" line).

    Parameters
    ----------
    name : str
        One of :data:`PROBES`.
    prediction : bool, default False
        The version for state-value learners (one action), where there is one.

    Raises
    ------
    InvalidParameterError
        If ``name`` is not a probe.

    Examples
    --------
    >>> get("both-flags-probe").max_steps
    2
    """
    if name not in PROBES:
        raise InvalidParameterError(
            f"probes.get: unknown probe {name!r}; choose one of {sorted(PROBES)}."
        )
    return PROBES[name](prediction)

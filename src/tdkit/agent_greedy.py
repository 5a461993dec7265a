"""The greedy policy of any agent on a finite model: :func:`agent_policy`.

Bridges a learner and the exact solvers: ``evaluate_policy(mdp,
agent_policy(agent, mdp))`` is the exact value of what the agent would do
greedily. It asks the agent itself (duck-typed, any object with
``act(obs, *, mask=None, explore=True)``), with the model's action masks,
so it sees the same choice as :func:`tdkit.evaluate` and never a masked
action that the agent's table happens to rate highly.
"""

from __future__ import annotations

import numbers
from typing import Any

import numpy as np

from ._errors import EnvironmentProtocolError, InvalidParameterError
from .envs.finite import FiniteMDP

__all__ = ["agent_policy"]


def agent_policy(agent: Any, mdp: FiniteMDP) -> np.ndarray:
    """The agent's greedy action in every state of ``mdp``, as an ``(S,)`` int array.

    For every non-terminal state ``s`` this calls
    ``agent.act(s, mask=mdp.masks[s], explore=False)`` (``mask=None`` when the
    model has no masks). Terminal states, including the absorbing sink that
    :meth:`FiniteMDP.from_gymnasium` adds after the env's own states (state
    500 of Taxi's 501), are never shown to the agent: they get their first
    allowed action, which is action 0 (terminal rows allow every action).
    The result can be passed to :func:`tdkit.evaluate_policy`.

    States are the model's indices, which are the env's observations for
    models read by ``from_gymnasium`` and for ``mdp.to_env()``.

    Parameters
    ----------
    agent : object
        Anything with ``act(obs, *, mask=None, explore=True)`` returning an
        action index (every tdkit learner).
    mdp : FiniteMDP

    Returns
    -------
    ndarray of int, shape (S,)

    Raises
    ------
    InvalidParameterError
        If ``mdp`` is not a :class:`FiniteMDP`.
    EnvironmentProtocolError
        If ``agent`` has no ``act`` method, or it returns something that is
        not an allowed action index of the model.

    Examples
    --------
    >>> import tdkit
    >>> from tdkit.envs import problems
    >>> mdp = problems.gridworld_4x4()
    >>> agent = tdkit.QLearning(16, 4, gamma=1.0, step_size=1.0, seed=0)
    >>> _ = tdkit.train(agent, mdp.to_env(max_episode_steps=100), episodes=300, seed=0)
    >>> policy = tdkit.agent_policy(agent, mdp)
    >>> policy.shape, int(policy[0])          # state 0 is terminal: action 0
    ((16,), 0)
    >>> bool((tdkit.evaluate_policy(mdp, policy) == tdkit.value_iteration(mdp).v).all())
    True
    """
    owner = "agent_policy"
    if not isinstance(mdp, FiniteMDP):
        raise InvalidParameterError(
            f"{owner}: mdp must be a tdkit.FiniteMDP; got {type(mdp).__name__}. "
            "Build one with FiniteMDP(P, R, gamma=...) or FiniteMDP.from_gymnasium(env)."
        )
    act = getattr(agent, "act", None)
    if not callable(act):
        raise EnvironmentProtocolError(
            f"{owner}: agent must have a method act(obs, *, mask=None, explore=True); "
            f"got {type(agent).__name__} without one."
        )
    masks = mdp.masks
    n_actions = mdp.n_actions
    policy = np.zeros(mdp.n_states, dtype=np.intp)
    if masks is not None:
        policy[:] = np.argmax(masks, axis=1)  # first allowed action
    for s in np.flatnonzero(~mdp.terminal):
        state = int(s)
        row = None if masks is None else masks[state].copy()
        action = act(state, mask=row, explore=False)
        if (
            isinstance(action, bool)
            or not isinstance(action, numbers.Integral)
            or not 0 <= action < n_actions
        ):
            raise EnvironmentProtocolError(
                f"{owner}: agent.act({state}, mask=..., explore=False) returned {action!r}; "
                f"expected an action index in [0, {n_actions})."
            )
        if row is not None and not row[action]:
            raise EnvironmentProtocolError(
                f"{owner}: agent.act({state}, mask=..., explore=False) returned action "
                f"{int(action)}, which the mask forbids in state {state}; an agent must "
                "never choose a masked action."
            )
        policy[state] = int(action)
    return policy

"""Training one agent per sub-environment of a gymnasium vector environment.

``tdkit.train(vector_env, agents, ...)`` steps ``K = vector_env.num_envs``
agents in lockstep, one per sub-environment, with the same semantics as the
scalar episode driver (:func:`tdkit.runs.run_episode`): masks from ``info``,
finite rewards, time limits that hand over ``truncated=True`` (keeping
``terminated``), and a cut episode settled by ``end_episode()``.

Seeding makes a vector run equal, bit for bit, to ``K`` separate scalar runs:
every episode of sub-environment ``k`` is reset with
``episode_seed(root_k, e)``, exactly as ``tdkit.train(agents[k], env,
seed=root_k)`` would. The vector environment's own autoreset (unseeded) is
overridden by a seeded partial reset (``options={"reset_mask": ...}``) of the
sub-environments whose episode ended. With ``autoreset_mode`` *next step* the
observation returned with ``truncated`` is the final one; with *same step*
the final observation is read from ``info["final_obs"]``: in both cases a
truncated episode bootstraps from the state it really ended in.
"""

from __future__ import annotations

import math
import time
from collections.abc import Sequence
from types import SimpleNamespace
from typing import Any

import gymnasium
import numpy as np
from gymnasium.vector.utils import iterate

from .._errors import InvalidParameterError
from .episode import MaskReader, bad_reward
from .fit import require_agent_fits
from .history import History
from .seeds import episode_seed, root_sequence

__all__ = ["agent_roots", "train_vector"]

_INF = math.inf


def agent_roots(seed: Any, n: int) -> list[np.random.SeedSequence]:
    """The root seed of each of ``n`` agents of a vector run.

    An int (or SeedSequence, Generator, None) is spawned into ``n`` children:
    agent ``k``'s run equals ``tdkit.train(agent_k, env, seed=roots[k])``. A
    sequence of ``n`` seeds gives each agent its own.

    Examples
    --------
    >>> [r.spawn_key for r in agent_roots(7, 2)]
    [(0,), (1,)]
    """
    if isinstance(seed, Sequence) and not isinstance(seed, (str, bytes)):
        if len(seed) != n:
            raise InvalidParameterError(
                f"train: seed is a sequence of {len(seed)} seeds but the vector environment "
                f"has {n} sub-environments; pass one seed per sub-environment or one int."
            )
        return [root_sequence(s) for s in seed]
    return root_sequence(seed).spawn(n)


def _vector_mask(infos: dict, k: int, read: MaskReader) -> np.ndarray | None:
    """Sub-environment ``k``'s action mask in batched vector ``infos`` (None when absent).

    ``read`` converts it as the scalar driver does (each distinct mask once per run).
    """
    masks = infos.get("action_mask")
    if masks is None:
        return None
    present = infos.get("_action_mask")
    if present is not None and not present[k]:
        return None
    return read({"action_mask": masks[k]})


class _Lane:
    """One agent and the episode it is in."""

    __slots__ = (
        "action",
        "active",
        "agent",
        "episode",
        "history",
        "length",
        "mask",
        "obs",
        "started",
        "td_max",
        "td_n",
        "td_sum",
        "total",
        "total_steps",
    )

    def __init__(self, agent: Any) -> None:
        self.agent = agent
        self.history = History()
        self.active = True
        self.episode = 0
        self.total_steps = 0
        self.action: Any = None
        self.new_episode(None, None)

    def new_episode(self, obs: Any, mask: np.ndarray | None) -> None:
        self.obs, self.mask = obs, mask
        self.length = 0
        self.total = 0.0
        self.td_n = 0
        self.td_sum = 0.0
        self.td_max = 0.0
        self.started = time.perf_counter()

    def record(self, end: str) -> None:
        self.history.add_episode(
            ret=float(self.total), length=self.length, end=end, td_count=self.td_n,
            td_abs_sum=self.td_sum, td_abs_max=self.td_max,
            seconds=time.perf_counter() - self.started,
        )
        self.total_steps += self.length
        self.episode += 1


def train_vector(
    agents: Sequence[Any],
    venv: gymnasium.vector.VectorEnv,
    *,
    episodes: int | None,
    steps: int | None,
    seed: Any,
    max_episode_steps: int | None,
    use_action_masks: bool,
) -> list[History]:
    """Train ``agents[k]`` on sub-environment ``k``; return one History per agent.

    ``episodes`` and ``steps`` are budgets *per agent*, as in ``K`` scalar
    runs. See the module docstring for seeding and autoreset.
    """
    n = int(venv.num_envs)
    agents = list(agents)
    if len(agents) != n:
        raise InvalidParameterError(
            f"train: the vector environment has {n} sub-environments but {len(agents)} agents "
            "were given; pass a list with one agent per sub-environment."
        )
    single = SimpleNamespace(
        observation_space=venv.single_observation_space, action_space=venv.single_action_space
    )
    for agent in agents:
        require_agent_fits(agent, single, owner="train")
    mode = venv.metadata.get("autoreset_mode")
    same_step = getattr(mode, "value", mode) == "SameStep"
    roots = agent_roots(seed, n)
    limit = max_episode_steps if max_episode_steps is not None else -1
    lanes = [_Lane(agent) for agent in agents]
    read = MaskReader()  # one cache for every lane: the masks are immutable
    obs_space = venv.observation_space  # the batched space: iterate() splits it per lane
    try:
        obs, infos = venv.reset(seed=[episode_seed(roots[k], 0) for k in range(n)])
        for k, o in enumerate(iterate(obs_space, obs)):
            lanes[k].new_episode(o, _vector_mask(infos, k, read) if use_action_masks else None)
        while any(lane.active for lane in lanes):
            actions = []
            for lane in lanes:
                if lane.active:
                    lane.action = lane.agent.act(lane.obs, mask=lane.mask)
                actions.append(lane.action)  # a finished lane repeats its last action
            next_obs, rewards, terms, truncs, infos = venv.step(np.asarray(actions))
            next_list = list(iterate(obs_space, next_obs))
            reset = np.zeros(n, dtype=bool)
            for k, lane in enumerate(lanes):
                if not lane.active:
                    continue
                reward = float(rewards[k])
                if not -_INF < reward < _INF:
                    raise bad_reward(reward, lane.length + 1)
                terminated, truncated = bool(terms[k]), bool(truncs[k])
                lane.length += 1
                if lane.length == limit:
                    truncated = True
                o2, info_k = next_list[k], infos
                if same_step and (terms[k] or truncs[k]):
                    o2 = infos["final_obs"][k]
                    final = infos["final_info"]
                    next_mask = (_vector_mask(final, k, read) if use_action_masks else None)
                else:
                    next_mask = _vector_mask(info_k, k, read) if use_action_masks else None
                lane.agent.observe(lane.obs, lane.action, reward, o2, terminated, truncated,
                                   next_mask=next_mask)
                for err in lane.agent.update():
                    err = abs(err)
                    lane.td_sum += err
                    lane.td_max = max(lane.td_max, err)
                    lane.td_n += 1
                lane.total += reward
                if terminated or truncated:
                    lane.record("terminated" if terminated else "truncated")
                    if (episodes is not None and lane.episode >= episodes) or (
                        steps is not None and lane.total_steps >= steps
                    ):
                        lane.active = False
                    else:
                        reset[k] = True
                elif steps is not None and lane.total_steps + lane.length >= steps:
                    _settle(lane)
                else:
                    lane.obs, lane.mask = o2, next_mask
            # Lanes whose environment ended on its own but whose agent is done still
            # autoreset inside the vector env; a seeded partial reset restarts the others.
            if reset.any():
                seeds = [episode_seed(roots[k], lanes[k].episode) if reset[k] else None
                         for k in range(n)]
                obs, rinfos = venv.reset(seed=seeds, options={"reset_mask": reset})
                fresh = list(iterate(obs_space, obs))
                for k in np.flatnonzero(reset):
                    lanes[k].new_episode(
                        fresh[k], _vector_mask(rinfos, k, read) if use_action_masks else None
                    )
    finally:
        for lane in lanes:
            if lane.active and lane.length:
                _settle(lane)
    return [lane.history for lane in lanes]


def _settle(lane: _Lane) -> None:
    """End ``lane``'s episode without flags (step budget or error) and stop the lane."""
    lane.active = False
    end_episode = getattr(lane.agent, "end_episode", None)
    lane.record("unfinished")
    if end_episode is not None:
        end_episode()

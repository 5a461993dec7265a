"""The runs layer: the one episode driver and the seeds every run derives from.

Everything that runs episodes (``tdkit.train``, ``tdkit.evaluate``, the
verifier, comparisons and sweeps) goes through :func:`run_episode`.
"""

from .episode import (
    EndlessEpisodeWarning,
    EpisodeHooks,
    EpisodeResult,
    MaskReader,
    info_mask,
    run_episode,
)
from .faults import (
    AgentFault,
    check_update_result,
    checked_calls,
    describe_exception,
    require_update_result,
)
from .seeds import RunSeed, episode_seed, root_sequence
from .vector import agent_roots, train_vector

__all__ = [
    "AgentFault",
    "agent_roots",
    "train_vector",
    "EndlessEpisodeWarning",
    "EpisodeHooks",
    "EpisodeResult",
    "MaskReader",
    "RunSeed",
    "check_update_result",
    "checked_calls",
    "describe_exception",
    "require_update_result",
    "episode_seed",
    "info_mask",
    "root_sequence",
    "run_episode",
]

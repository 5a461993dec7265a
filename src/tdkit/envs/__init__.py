"""Environments: adapters to one reset/step contract, finite models, problems."""

from .adapters import EnvAdapter, adapt

__all__ = ["EnvAdapter", "adapt"]

# Finite models and the catalogue of published problems (issue 3).
from . import problems
from .finite import FiniteMDP
from .model_env import FiniteMDPEnv

__all__ += ["FiniteMDP", "FiniteMDPEnv", "problems"]

# Continuing tasks (issue 12).
from . import access_control  # noqa: E402

__all__ += ["access_control"]

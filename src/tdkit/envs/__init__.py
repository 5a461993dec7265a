"""Environments: adapters to one reset/step contract, finite models, problems."""

from .adapters import EnvAdapter, adapt

__all__ = ["EnvAdapter", "adapt"]

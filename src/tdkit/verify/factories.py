"""Picklable agent factories (public path); they live in the runs layer, :mod:`tdkit._factories`."""

from __future__ import annotations

from .._factories import AgentFactory, agent_factory

__all__ = ["AgentFactory", "agent_factory"]

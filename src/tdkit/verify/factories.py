"""Picklable agent factories (public path); they live in :mod:`tdkit.runs._factories`."""

from __future__ import annotations

from ..runs._factories import AgentFactory, agent_factory

__all__ = ["AgentFactory", "agent_factory"]

"""Tabular TD learners; each module holds one family."""

from __future__ import annotations

from .one_step import DoubleQLearning, ExpectedSarsa, QLearning, Sarsa

__all__ = ["DoubleQLearning", "ExpectedSarsa", "QLearning", "Sarsa"]

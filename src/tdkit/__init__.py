"""tdkit: reference tabular temporal-difference control learners.

Train them on any reset/step simulator, compare them with the exact
dynamic-programming optimum, and verify your own agents against them.
"""

from __future__ import annotations

from . import envs, exploration, schedules
from ._errors import (
    CapacityError,
    EnvironmentProtocolError,
    InvalidParameterError,
    StoreError,
    TdkitError,
)
from .agent import Agent, TabularAgent
from .history import History
from .learners import DoubleQLearning, ExpectedSarsa, QLearning, Sarsa
from .loop import evaluate, train
from .store import load, save

__version__ = "0.1.0"

__all__ = [
    # protocol and base class
    "Agent",
    "TabularAgent",
    # learners
    "DoubleQLearning",
    "ExpectedSarsa",
    "QLearning",
    "Sarsa",
    # training
    "History",
    "evaluate",
    "train",
    # persistence
    "load",
    "save",
    # building blocks
    "envs",
    "exploration",
    "schedules",
    # errors
    "CapacityError",
    "EnvironmentProtocolError",
    "InvalidParameterError",
    "StoreError",
    "TdkitError",
]

"""tdkit: reference tabular temporal-difference control learners.

Train them on any reset/step simulator, compare them with the exact
dynamic-programming optimum, and verify your own agents against them.
"""

from __future__ import annotations

from . import batch, dp, encoders, envs, exploration, plot, schedules, stats, sweep, testing, verify
from ._errors import (
    CapacityError,
    EnvironmentProtocolError,
    InvalidParameterError,
    StoreError,
    TdkitError,
)
from .agent import Agent, TabularAgent
from .agent_greedy import agent_policy
from .dp import (
    ConvergenceError,
    GreedyPolicy,
    Solution,
    action_values,
    bellman_expectation_operator,
    bellman_optimality_operator,
    bellman_residual,
    evaluate_policy,
    greedy_policy,
    policy_iteration,
    value_iteration,
)
from .dp_average import AverageSolution, policy_gain, relative_value_iteration
from .dp_solve import solve
from .envs.finite import FiniteMDP
from .learners import (
    TD0,
    DifferentialQLearning,
    DifferentialSarsa,
    DifferentialTD,
    DoubleQLearning,
    DynaQ,
    DynaQPlus,
    ExpectedSarsa,
    NStepSarsa,
    PrioritizedSweeping,
    QLearning,
    Sarsa,
    SarsaLambda,
    TDLambda,
    TreeBackup,
    WatkinsQLambda,
)
from .runs.history import History
from .runs.store import load, save
from .runs.training import evaluate, train

__version__ = "0.1.0"

__all__ = [
    # protocol and base class
    "Agent",
    "TabularAgent",
    # one-step control
    "DoubleQLearning",
    "ExpectedSarsa",
    "QLearning",
    "Sarsa",
    # multi-step control and traces
    "NStepSarsa",
    "TreeBackup",
    "SarsaLambda",
    "WatkinsQLambda",
    # planning
    "DynaQ",
    "DynaQPlus",
    "PrioritizedSweeping",
    # prediction
    "TD0",
    "TDLambda",
    # average reward (continuing tasks)
    "DifferentialQLearning", "DifferentialSarsa", "DifferentialTD",
    "AverageSolution", "policy_gain", "relative_value_iteration",
    # training and persistence
    "History",
    "evaluate",
    "train",
    "load",
    "save",
    # finite models and exact solvers
    "FiniteMDP",
    "GreedyPolicy",
    "Solution",
    "action_values",
    "agent_policy",
    "bellman_expectation_operator",
    "bellman_optimality_operator",
    "bellman_residual",
    "evaluate_policy",
    "greedy_policy",
    "policy_iteration",
    "solve",
    "value_iteration",
    # modules
    "batch",
    "dp",
    "encoders",
    "envs",
    "exploration",
    "plot",
    "schedules",
    "stats",
    "sweep",
    "testing",
    "verify",
    # errors
    "CapacityError",
    "ConvergenceError",
    "EnvironmentProtocolError",
    "InvalidParameterError",
    "StoreError",
    "TdkitError",
]

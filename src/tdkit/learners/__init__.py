"""Tabular TD learners; each module holds one family.

* :mod:`~tdkit.learners.one_step`: Q-learning, SARSA, Expected SARSA, Double Q-learning.
* :mod:`~tdkit.learners.n_step`: n-step SARSA and n-step Tree Backup.
* :mod:`~tdkit.learners.traces`: Sarsa(λ) and Watkins's Q(λ).
* :mod:`~tdkit.learners.planning`: Dyna-Q, Dyna-Q+ and prioritized sweeping.
* :mod:`~tdkit.learners.prediction`: TD(0) and TD(λ) state-value prediction.
* :mod:`~tdkit.learners.differential`: average-reward learners for continuing tasks.
"""

from __future__ import annotations

from .differential import DifferentialQLearning, DifferentialSarsa, DifferentialTD
from .n_step import NStepSarsa, TreeBackup
from .one_step import DoubleQLearning, ExpectedSarsa, QLearning, Sarsa
from .planning import DynaQ, DynaQPlus, PrioritizedSweeping
from .prediction import TD0, TDLambda
from .traces import SarsaLambda, WatkinsQLambda

__all__ = [
    # one-step control
    "DoubleQLearning",
    "ExpectedSarsa",
    "QLearning",
    "Sarsa",
    # multi-step control
    "NStepSarsa",
    "TreeBackup",
    # eligibility traces
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
]

"""Every multi-step, trace and planning learner passes tdkit.verify at both levels.

Level "full" of the planning learners runs in test_verify_planning_learners.py
(to keep each file short); the prediction learners (TD0, TDLambda) are
verified in test_prediction.py.
Hyper-parameters follow the verifier's advice: step size 0.1, and decaying
exploration for on-policy learners (which converge to the values of the
policy they follow). Planning learners use the counts model, since some of
the verifier's problems are stochastic (a last-outcome model would keep
replaying one sampled outcome).
"""

from __future__ import annotations

import pytest

from tdkit.learners import (
    DynaQ,
    DynaQPlus,
    NStepSarsa,
    PrioritizedSweeping,
    SarsaLambda,
    TreeBackup,
    WatkinsQLambda,
)
from tdkit.schedules import Exponential
from tdkit.verify import agent_factory, verify_agent

DECAYING = Exponential(0.3, 0.999)

FACTORIES = {
    "NStepSarsa": agent_factory(NStepSarsa, n=3, step_size=0.1, exploration=DECAYING),
    "TreeBackup": agent_factory(TreeBackup, n=3, step_size=0.1, exploration=0.2),
    "SarsaLambda": agent_factory(SarsaLambda, lam=0.8, trace="dutch", step_size=0.1,
                                 exploration=DECAYING),
    "WatkinsQLambda": agent_factory(WatkinsQLambda, lam=0.8, step_size=0.1, exploration=0.2),
    "DynaQ": agent_factory(DynaQ, planning_steps=2, model="counts", step_size=0.1,
                           exploration=0.2),
    "DynaQPlus": agent_factory(DynaQPlus, planning_steps=2, kappa=1e-4, model="counts",
                               step_size=0.1, exploration=0.2),
    "PrioritizedSweeping": agent_factory(PrioritizedSweeping, planning_steps=2, model="counts",
                                         step_size=0.1, exploration=0.2),
}


PLANNING = ("DynaQ", "DynaQPlus", "PrioritizedSweeping")
CASES = [(name, "quick") for name in FACTORIES] + [
    (name, "full") for name in FACTORIES if name not in PLANNING
]


@pytest.mark.parametrize(("name", "level"), CASES)
def test_learner_passes_the_verifier(name, level):
    report = verify_agent(FACTORIES[name], level=level)
    assert report.passed, str(report)
    if name == "SarsaLambda":
        # the verifier reads Sarsa(lambda)'s one-step part: it must honour the next action
        assert report["next_action"].status == "passed"

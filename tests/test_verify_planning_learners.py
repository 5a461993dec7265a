"""The planning learners pass tdkit.verify at level "full".

Level "quick" (and both levels of the other new learners) runs in
test_verify_new_learners.py; the settings are the same: step size 0.1, the
counts model (some of the verifier's problems are stochastic), epsilon 0.2.
"""

from __future__ import annotations

import pytest

from tdkit.learners import DynaQ, DynaQPlus, PrioritizedSweeping
from tdkit.verify import agent_factory, verify_agent

FACTORIES = {
    "DynaQ": agent_factory(DynaQ, planning_steps=2, model="counts", step_size=0.1,
                           exploration=0.2),
    "DynaQPlus": agent_factory(DynaQPlus, planning_steps=2, kappa=1e-4, model="counts",
                               step_size=0.1, exploration=0.2),
    "PrioritizedSweeping": agent_factory(PrioritizedSweeping, planning_steps=2, model="counts",
                                         step_size=0.1, exploration=0.2),
}


@pytest.mark.parametrize("name", list(FACTORIES))
def test_planning_learner_passes_the_full_verifier(name):
    report = verify_agent(FACTORIES[name], level="full")
    assert report.passed, str(report)

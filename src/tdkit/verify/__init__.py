"""Verify agents: conformance checks, differential tests and statistical comparison.

* :func:`verify_agent` / :func:`assert_agent`: a battery of named checks
  (protocol, reproducibility, tie-breaking, masks, terminal and truncation
  handling, discounting, SARSA's next action, state encoding, numerical
  hygiene, convergence to the exact optimum) run through the agent protocol
  only, so they work on agents that are not tdkit classes.
* :func:`compare_updates`: feed one transition stream to a reference and a
  candidate and report the first step where their values diverge.
* :func:`compare_performance`: train both over many seeds and compare mean
  and interquartile-mean returns with bootstrap confidence intervals and
  Welch's test.

See ``docs/verify.md`` for a pytest suite a team can copy.
"""

from __future__ import annotations

from . import probes
from ._report import CheckResult, VerificationReport
from ._runner import CHECK_NAMES, assert_agent, run_check, verify_agent
from .differential import Divergence, RecordedTransition, compare_updates, record_transitions
from .factories import AgentFactory, agent_factory, recommended_settings
from .performance import AgentScores, PerformanceComparison, compare_performance

__all__ = [
    # conformance checks
    "verify_agent",
    "assert_agent",
    "run_check",
    "CHECK_NAMES",
    "CheckResult",
    "VerificationReport",
    # differential testing
    "compare_updates",
    "record_transitions",
    "Divergence",
    "RecordedTransition",
    # statistical comparison
    "compare_performance",
    "PerformanceComparison",
    "AgentScores",
    # factories
    "agent_factory",
    "AgentFactory",
    "recommended_settings",
    # the probe problems (a module)
    "probes",
]

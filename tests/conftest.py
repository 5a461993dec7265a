"""Shared test configuration.

Hypothesis profiles: ``ci`` (the default) draws 60 examples per property; when
the ``CI`` environment variable is set it also derandomizes, so a CI run
explores the same examples every time and cannot turn red by luck. Locally
examples are random, so repeated runs keep exploring. ``dev`` is a quicker
profile: ``TDKIT_HYPOTHESIS_PROFILE=dev python -m pytest``.
"""

from __future__ import annotations

import os

from hypothesis import HealthCheck, settings

settings.register_profile(
    "ci",
    max_examples=60,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
    derandomize=bool(os.environ.get("CI")),
)
settings.register_profile("dev", max_examples=30, deadline=None)
settings.load_profile(os.environ.get("TDKIT_HYPOTHESIS_PROFILE", "ci"))

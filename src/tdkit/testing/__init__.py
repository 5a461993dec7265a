"""Helpers for testing code built on tdkit.

:mod:`tdkit.testing.strategies` holds hypothesis strategies (``finite_mdps``,
``policies``); it needs the ``test`` extra and is imported on first use, so
``import tdkit.testing`` works without hypothesis. :mod:`tdkit.testing.streams`
holds transition-stream strategies for :func:`tdkit.verify.compare_updates`,
and :mod:`tdkit.testing.pytest_helpers` turns the verifier's checks into
parametrized tests (needs pytest).
"""

from __future__ import annotations

import importlib
from typing import Any

__all__ = ["pytest_helpers", "strategies", "streams"]


def __getattr__(name: str) -> Any:
    if name in ("strategies", "streams", "pytest_helpers"):
        return importlib.import_module(f"{__name__}.{name}")
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")

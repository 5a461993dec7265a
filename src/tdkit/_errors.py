"""Exception hierarchy of tdkit.

Every error tdkit raises on purpose derives from :class:`TdkitError` and also
from the matching builtin, so ``except ValueError`` in user code keeps working.
"""

from __future__ import annotations

__all__ = [
    "CapacityError",
    "EnvironmentProtocolError",
    "InvalidParameterError",
    "StoreError",
    "TdkitError",
]


class TdkitError(Exception):
    """Root of every exception raised deliberately by tdkit."""


class InvalidParameterError(TdkitError, ValueError):
    """A hyper-parameter or argument is outside its allowed range."""


class CapacityError(TdkitError, ValueError):
    """A growing index (for example of hashable states) is full."""


class EnvironmentProtocolError(TdkitError, TypeError):
    """An environment returned something that breaks the reset/step contract."""


class StoreError(TdkitError, ValueError):
    """A saved file is foreign, truncated, tampered with or of the wrong version."""


# Show the public path (tdkit.InvalidParameterError) in tracebacks and reprs.
for _cls in (
    TdkitError, InvalidParameterError, CapacityError, EnvironmentProtocolError, StoreError
):
    _cls.__module__ = "tdkit"
del _cls

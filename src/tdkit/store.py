"""Public path of :mod:`tdkit.runs.store` (its home in the runs layer).

Everything :mod:`tdkit.runs.store` exports is importable from here.
"""

from .runs.store import *  # noqa: F403
from .runs.store import __all__  # noqa: F401

"""Public path of :mod:`tdkit.runs.history` (its home in the runs layer).

Everything :mod:`tdkit.runs.history` exports is importable from here.
"""

from .runs.history import *  # noqa: F403
from .runs.history import __all__  # noqa: F401

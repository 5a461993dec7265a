"""Public path of :mod:`tdkit.runs.sweep` (its home in the runs layer).

Everything :mod:`tdkit.runs.sweep` exports is importable from here.
"""

from .runs.sweep import *  # noqa: F403
from .runs.sweep import __all__  # noqa: F401

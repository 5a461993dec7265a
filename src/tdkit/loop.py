"""Public path of :mod:`tdkit.runs.training` (its home in the runs layer).

Everything :mod:`tdkit.runs.training` exports is importable from here.
"""

from .runs.training import *  # noqa: F403
from .runs.training import __all__  # noqa: F401

"""Public path of :mod:`tdkit.runs.batch` (its home in the runs layer).

Everything :mod:`tdkit.runs.batch` exports is importable from here.
"""

from .runs.batch import *  # noqa: F403
from .runs.batch import __all__  # noqa: F401

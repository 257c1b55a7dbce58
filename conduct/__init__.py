"""conduct: demand, conduct parameter and markups from a panel of markets.

The main entry point is :func:`estimate`, which runs a study file end to end
and returns :class:`Results`.
"""

from conduct.errors import ConductError
from conduct.pipeline import Results, estimate
from conduct.study import Study, load_study

__all__ = ["ConductError", "Results", "Study", "estimate", "load_study"]
__version__ = "0.1.0"

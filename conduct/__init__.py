"""conduct: demand, conduct parameter and markups from a panel of markets.

The main entry point is :func:`estimate`, which runs a study file end to end
and returns :class:`Results`; :func:`estimate_partitioned` estimates demand,
theta and the candidate tests on a Parquet dataset partitioned by market, part
by part, for panels larger than memory.
"""

from conduct.errors import ConductError
from conduct.partitioned import PartitionedResult, estimate_partitioned
from conduct.pipeline import Results, estimate
from conduct.study import Study, load_study

__all__ = [
    "ConductError", "PartitionedResult", "Results", "Study", "estimate", "estimate_partitioned",
    "load_study",
]
__version__ = "0.1.0"

"""The analysis on a Dask cluster (optional extra ``modescope[cluster]``).

Importing this package does not import dask; :func:`analyze_on_cluster` does, and raises
:class:`ClusterError` naming the extra when it is missing.
"""

from modescope.core.engine.cluster.connect import ClusterError, open_client, require_dask
from modescope.core.engine.cluster.engine import analyze_on_cluster

__all__ = ["ClusterError", "analyze_on_cluster", "open_client", "require_dask"]

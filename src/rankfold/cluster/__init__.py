"""Running passes as tasks on a dask.distributed cluster.

A pass over the data (:func:`rankfold.routes.common.run_pass`) becomes one
task per contiguous range of blocks: the worker reopens the source from its
:class:`~rankfold.sources.spec.SourceSpec`, folds its blocks into a fresh
state and returns ``state.to_bytes()``; states merge pairwise in a balanced
tree of tasks.  Only states, bases and the recipe of the source travel
between processes, never data blocks.

Passes whose states hand rows to a sink (scores, the randomized route's
captured thin product) give each task a range of whole output chunks that
it writes itself (``rows``).

Modules: ``session`` (connecting, checking versions and data visibility,
BLAS caps), ``passes`` (a pass as tasks, client side), ``rows`` (passes whose
workers write per-sample rows), ``worker`` (the functions that run on
workers).  dask and distributed are imported only when
a cluster is used.
"""

from __future__ import annotations

from rankfold.cluster.session import ClusterSession, check_cluster_argument, connect, optional_session

__all__ = ["ClusterSession", "check_cluster_argument", "connect", "optional_session"]

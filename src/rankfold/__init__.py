"""rankfold: principal components of tables too big for memory.

Public API
----------
decompose(source, rank, ...) -> Result
    Stream a Parquet, Zarr or .npy table into its leading principal components.
open_result(path) -> Result
    Open a result group written by :func:`decompose`.
plan(source, rank, ...) -> Plan
    The route, passes, memory and time a decomposition would take, from metadata only.
open_source(path, ...) -> Source
    Open a table without reading its data (shape, names, blocks).
project(result, source, ...) -> Projection
    Scores, residuals and flags of new samples in an existing decomposition.
open_projection(path) -> Projection
    Open a projection written by :func:`project`.
compare_subset(source, rank, ...) -> dict
    Exact against randomized components on a reproducible random subset.
compare_results(a, b, ...) -> dict
    The per-component agreement of two stored results of the same source.
"""

from rankfold.api import decompose, plan
from rankfold.compare import compare_results, compare_subset
from rankfold.errors import (
    CheckpointError,
    DataError,
    Interrupted,
    MemoryLimitError,
    OutputError,
    RankfoldError,
    SourceError,
    UsageError,
)
from rankfold.projection import Projection, open_projection, project
from rankfold.result import Result, open_result
from rankfold.sources import open_source

__version__ = "0.1.0"

__all__ = [
    "decompose",
    "plan",
    "compare_subset",
    "compare_results",
    "open_result",
    "open_source",
    "project",
    "open_projection",
    "Result",
    "Projection",
    "RankfoldError",
    "UsageError",
    "SourceError",
    "DataError",
    "MemoryLimitError",
    "OutputError",
    "CheckpointError",
    "Interrupted",
    "__version__",
]

"""Table formats behind one interface; :func:`open_source` picks the reader.

Folder layout: ``base`` holds the interface and :class:`Partition`; one module
per format; ``readahead`` overlaps reading with arithmetic.
"""

from __future__ import annotations

import os

from rankfold.errors import SourceError, UsageError
from rankfold.sources.base import Partition, Source
from rankfold.sources.npy import NpySource
from rankfold.sources.parquet import ParquetSource
from rankfold.sources.zarr_array import ZarrSource

__all__ = ["open_source", "Source", "Partition", "NpySource", "ParquetSource", "ZarrSource"]


def detect_format(path: str) -> str:
    """``"parquet"``, ``"zarr"`` or ``"npy"`` from the path's name and contents."""
    if not os.path.exists(path):
        raise SourceError(f"{path}: no such file or folder")
    if not os.access(path, os.R_OK):
        raise SourceError(f"{path}: permission denied; the file must be readable by this user")
    lower = path.rstrip("/").lower()
    if os.path.isfile(path):
        if lower.endswith(".npy"):
            return "npy"
        if lower.endswith((".parquet", ".parq", ".pq")):
            return "parquet"
        with open(path, "rb") as fh:
            head = fh.read(6)
        if head.startswith(b"PAR1"):
            return "parquet"
        if head == b"\x93NUMPY":
            return "npy"
    else:
        if any(os.path.exists(os.path.join(path, f)) for f in ("zarr.json", ".zarray", ".zgroup")):
            return "zarr"
        for _root, _dirs, files in os.walk(path):
            if any(f.endswith((".parquet", ".parq", ".pq")) for f in files):
                return "parquet"
    raise SourceError(
        f"{path}: unknown format; rankfold reads Parquet files or folders (.parquet), "
        "Zarr arrays or groups (a folder with zarr.json or .zarray) and .npy files")


def open_source(path: str, *, samples_as: str = "rows", columns=None, exclude=None,
                id_column: str | None = None, missing_code: float | None = None,
                array: str | None = None) -> Source:
    """Open a table for block reading without reading its data.

    Parameters
    ----------
    path : str
        Parquet file or folder, Zarr array or group, or ``.npy`` file.
    samples_as : {"rows", "columns"}
        How samples are stored in a 2-D array (Zarr, .npy). Parquet rows are
        always samples.
    columns, exclude : list of str, optional
        Parquet feature columns to use or to leave out, by name or fnmatch pattern.
    id_column : str, optional
        Parquet column carried along as sample ids.
    missing_code : float, optional
        A stored value meaning "missing" (for example -1 in integer genotype stores).
    array : str, optional
        Array name inside a Zarr group.

    Returns
    -------
    Source
    """
    if samples_as not in ("rows", "columns"):
        raise UsageError(f"samples_as must be 'rows' or 'columns', got {samples_as!r}")
    fmt = detect_format(path)
    if fmt == "parquet":
        if samples_as != "rows":
            raise UsageError(f"{path}: Parquet rows are always samples; samples_as='columns' applies to Zarr and .npy")
        source = ParquetSource(path, columns=columns, exclude=exclude, id_column=id_column,
                               missing_code=missing_code)
    elif columns or exclude or id_column:
        raise UsageError(f"{path}: column selection (columns, exclude, id_column) applies to Parquet sources only")
    elif fmt == "zarr":
        source = ZarrSource(path, samples_as=samples_as, array=array, missing_code=missing_code)
    else:
        source = NpySource(path, samples_as=samples_as, missing_code=missing_code)
    # The state every pass must find unchanged (Source.check_unchanged).
    source.record_file_stats()
    return source

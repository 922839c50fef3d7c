"""Table formats behind one interface; :func:`open_source` picks the reader.

Folder layout: ``base`` holds the interface and :class:`Partition`; one module
per format; ``readahead`` overlaps reading with arithmetic.
"""

from __future__ import annotations

import os
import uuid

from rankfold.errors import SourceError, UsageError
from rankfold.sources.base import Partition, Source
from rankfold.sources.location import is_url, url_fs
from rankfold.sources.npy import NpySource
from rankfold.sources.parquet import ParquetSource
from rankfold.sources.spec import SourceSpec
from rankfold.sources.zarr_array import ZarrSource

__all__ = ["open_source", "Source", "Partition", "NpySource", "ParquetSource", "ZarrSource"]


SUFFIXES = (".parquet", ".parq", ".pq")


def detect_format(path: str) -> str:
    """``"parquet"``, ``"zarr"`` or ``"npy"`` from the path's name and contents (a local path or an fsspec URL)."""
    if is_url(path):
        try:
            fs, p = url_fs(path)
            if not fs.exists(p):
                raise SourceError(f"{path}: no such file or folder")
            found = _detect_on(fs, p)
        except SourceError:
            raise
        except Exception as exc:  # fsspec back ends raise their own types (credentials, network)
            raise SourceError(f"{path}: cannot reach ({type(exc).__name__}: {exc})") from None
    else:
        if not os.path.exists(path):
            raise SourceError(f"{path}: no such file or folder")
        if not os.access(path, os.R_OK):
            raise SourceError(f"{path}: permission denied; the file must be readable by this user")
        import fsspec

        try:
            found = _detect_on(fsspec.filesystem("file"), path)
        except OSError as exc:  # a folder inside that this user may not list
            raise SourceError(f"{path}: cannot read ({exc.strerror or exc}); the files must be readable by "
                              "this user") from None
    if found is None:
        raise SourceError(
            f"{path}: unknown format; rankfold reads Parquet files or folders (.parquet), "
            "Zarr arrays or groups (a folder with zarr.json or .zarray) and .npy files")
    return found


def _detect_on(fs, p: str) -> str | None:
    """The format of ``p`` on file system ``fs``: by suffix, then by magic bytes, then by a folder's contents."""
    lower = p.rstrip("/").lower()
    if fs.isfile(p):
        if lower.endswith(".npy"):
            return "npy"
        if lower.endswith(SUFFIXES):
            return "parquet"
        with fs.open(p, "rb") as fh:
            head = fh.read(6)
        if head.startswith(b"PAR1"):
            return "parquet"
        if head == b"\x93NUMPY":
            return "npy"
        return None
    if any(fs.exists(f"{p.rstrip('/')}/{f}") for f in ("zarr.json", ".zarray", ".zgroup")):
        return "zarr"
    if any(f.endswith(SUFFIXES) for f in fs.find(p)):
        return "parquet"
    return None


def open_source(path: str, *, samples_as: str = "rows", columns=None, exclude=None,
                id_column: str | None = None, missing_code: float | None = None,
                array: str | None = None) -> Source:
    """Open a table for block reading without reading its data.

    Parameters
    ----------
    path : str
        Parquet file or folder, Zarr array or group, or ``.npy`` file; a local
        path or an fsspec URL (``file://``, ``memory://``, ``s3://``, ``gs://``;
        not for ``.npy``), credentials from fsspec's usual configuration.
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
    src = _open(path, samples_as=samples_as, columns=columns, exclude=exclude, id_column=id_column,
                missing_code=missing_code, array=array)
    options = {"samples_as": samples_as, "columns": columns, "exclude": exclude, "id_column": id_column,
               "missing_code": missing_code, "array": array}
    src._spec = SourceSpec(
        path if "://" in path else os.path.abspath(path),
        tuple((k, tuple(v) if isinstance(v, list) else v) for k, v in options.items() if v is not None),
        uuid.uuid4().hex, (src.n_samples, src.n_features), str(src.storage_dtype))
    return src


def _open(path: str, *, samples_as, columns, exclude, id_column, missing_code, array) -> Source:
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
    elif is_url(path):
        raise SourceError(f"{path}: .npy files are read through memory maps, which need a local file; copy it "
                          "locally, or store the table as Zarr or Parquet to read it from a URL")
    else:
        source = NpySource(path, samples_as=samples_as, missing_code=missing_code)
    # The state every pass must find unchanged (Source.check_unchanged).
    source.record_file_stats()
    return source

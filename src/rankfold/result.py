"""The result store: one Zarr v3 group, written under a temporary name, then renamed.

Layout (dimension names in brackets, so that ``xarray.open_zarr`` reads it)::

    RESULT.zarr/
      zarr.json            group attributes (see ATTRIBUTES below)
      loadings             float64 [feature, component]
      variance             float64 [component]   eigenvalues of the covariance (ddof=1)
      variance_fraction    float64 [component]   variance / total variance
      center               float64 [feature]     subtracted column means
      scale                float64 [feature]     divisors (standard deviations, or ones)
      feature_names        string  [feature]
      component            int32   [component]   1, 2, ... (a coordinate for xarray)
      scores               float32 [sample, component]  (float64 on request; absent with --no-scores)
      residual             float64 [sample]       squared distance to the rank-k reconstruction
      residual_fraction    float64 [sample]       residual / squared norm of the centered sample
      flagged              bool    [sample]       residual above the robust cutoff (attrs residual_flag)
      sample_ids           [sample]               beside scores, when the source has ids

Per-sample arrays are chunked along samples only, and written a whole chunk
at a time while the last pass runs (:mod:`rankfold.sample_outputs`).

A store that is being written lives at ``.NAME.partial-PID`` beside the target
and only becomes ``NAME`` once every array and attribute is on disk, so a
store found under the requested name is always complete.
"""

from __future__ import annotations

import os
import shutil
from dataclasses import dataclass

import numpy as np

from rankfold.errors import OutputError
from rankfold.sources.location import exists, is_url, join, local_or_url, parent, url_fs

FORMAT_VERSION = 1
FORMAT_KEY = "rankfold_format"


@dataclass(frozen=True)
class Result:
    """A decomposition read back from (or just written to) a result store.

    Attributes
    ----------
    path : str
    loadings : ndarray, shape (m, k)
        Orthonormal columns: the principal axes in feature space.
    variance : ndarray, shape (k,)
        Variance along each component (covariance eigenvalues, ddof=1), descending.
    variance_fraction : ndarray, shape (k,)
        ``variance / total_variance``.
    center, scale : ndarray, shape (m,)
        The transformation applied before decomposing: ``(x - center) / scale``.
    feature_names : ndarray of str, shape (m,)
    scores : array, shape (n, k), or None
    sample_ids : array, shape (n,), or None
    residual, residual_fraction : array, shape (n,), or None
    flagged : array of bool, shape (n,), or None
        Per-sample outputs (:mod:`rankfold.sample_outputs`).  Read from a store
        they are Zarr arrays, read lazily: index them (``result.scores[:1000]``,
        ``result.residual[:]``) to get numpy arrays.
    attrs : dict
        Route, rank, counts, total variance, parameters, source fingerprint,
        library versions and per-pass timings.
    """

    path: str
    loadings: np.ndarray
    variance: np.ndarray
    variance_fraction: np.ndarray
    center: np.ndarray
    scale: np.ndarray
    feature_names: np.ndarray
    scores: np.ndarray | None
    sample_ids: np.ndarray | None
    attrs: dict
    residual: np.ndarray | None = None
    residual_fraction: np.ndarray | None = None
    flagged: np.ndarray | None = None

    @property
    def route(self) -> str:
        return self.attrs["route"]

    @property
    def rank(self) -> int:
        return int(self.attrs["rank"])

    @property
    def total_variance(self) -> float:
        return float(self.attrs["total_variance"])

    @property
    def n_samples(self) -> int:
        return int(self.attrs["n_samples"])

    @property
    def n_features(self) -> int:
        return int(self.attrs["n_features"])

    def project(self, source, out=None, **options):
        """Place the samples of ``source`` in these components; see :func:`rankfold.projection.project`."""
        from rankfold.projection import project

        return project(self, source, out=out, **options)


def open_result(path: str) -> Result:
    """Open a result store written by :func:`rankfold.decompose`.

    Raises
    ------
    OutputError
        If ``path`` is not a complete rankfold result of a format this version reads.
    """
    import zarr

    path = local_or_url(path)
    if not _isdir(path):
        raise OutputError(f"{path}: no such result folder")
    try:
        group = zarr.open_group(path, mode="r")
    except Exception as exc:
        raise OutputError(f"{path}: not a Zarr group ({type(exc).__name__}: {exc})") from None
    attrs = dict(group.attrs)
    version = attrs.get(FORMAT_KEY)
    if version is None:
        raise OutputError(f"{path}: not a rankfold result (no {FORMAT_KEY!r} attribute)")
    if not isinstance(version, int) or isinstance(version, bool):
        raise OutputError(f"{path}: {FORMAT_KEY!r} is {version!r}, not a format number; the store was "
                          "not written by rankfold or was edited")
    if version > FORMAT_VERSION:
        raise OutputError(f"{path}: written in result format {version}, newer than the {FORMAT_VERSION} "
                          "this rankfold reads; upgrade rankfold")

    def get(name):
        return group[name][:] if name in group else None

    def lazy(name):  # per-sample arrays can be far larger than memory
        return group[name] if name in group else None

    return Result(path, get("loadings"), get("variance"), get("variance_fraction"), get("center"),
                  get("scale"), get("feature_names"), lazy("scores"), lazy("sample_ids"), attrs,
                  lazy("residual"), lazy("residual_fraction"), lazy("flagged"))


def check_output_path(out: str, overwrite: bool) -> None:
    """Refuse an existing output unless ``overwrite``; refuse an unwritable parent.

    ``overwrite`` replaces only a previous rankfold result: a mistyped ``--out``
    must not delete a data folder.
    """
    out = local_or_url(out)
    if is_url(out):
        fs, p = url_fs(out)
        if fs.exists(p):
            if not overwrite:
                raise OutputError(f"{out}: already exists; choose another --out or pass --overwrite to replace it")
            if not is_result(out):
                raise OutputError(f"{out}: exists and is not a rankfold result, so --overwrite will not "
                                  "replace it; remove it yourself or choose another --out")
        return  # object stores have no folders to check; a write failure is reported when it happens
    if os.path.lexists(out):
        if not overwrite:
            raise OutputError(f"{out}: already exists; choose another --out or pass --overwrite to replace it")
        if not is_result(out):
            raise OutputError(f"{out}: exists and is not a rankfold result, so --overwrite will not "
                              "replace it; remove it yourself or choose another --out")
    check_parent_folder(out)


def check_parent_folder(out: str, hint: str = "") -> None:
    """Refuse an output whose folder is missing or not writable (results, projections, reports)."""
    parent = os.path.dirname(os.path.abspath(out))
    if not os.path.isdir(parent):
        raise OutputError(f"{out}: the folder {parent} does not exist; create it first")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(f"{out}: the folder {parent} is not writable{hint}")


def is_result(path: str) -> bool:
    """Whether ``path`` is a folder holding a rankfold result (complete or not)."""
    import json

    if is_url(path):
        fs, p = url_fs(path)
        try:
            with fs.open(p.rstrip("/") + "/zarr.json", "rb") as fh:
                attrs = json.load(fh).get("attributes", {})
        except (OSError, ValueError):
            return False
        return FORMAT_KEY in attrs or "route" in attrs
    meta = os.path.join(path, "zarr.json")
    if not os.path.isdir(path) or not os.path.isfile(meta):
        return False
    try:
        with open(meta) as fh:
            attrs = json.load(fh).get("attributes", {})
    except (OSError, ValueError):
        return False
    return FORMAT_KEY in attrs or "route" in attrs


class ResultWriter:
    """A result store under construction at ``.NAME.partial-PID``; :meth:`commit` renames it to ``NAME``.

    Large per-sample arrays are created early with :meth:`create` and filled
    while a pass runs; small arrays are added with :meth:`add`.  Until
    :meth:`commit`, nothing exists under the requested name; :meth:`abandon`
    removes the partial store.
    """

    def __init__(self, out: str, overwrite: bool, marker: tuple[str, int] = (FORMAT_KEY, FORMAT_VERSION),
                 checked: bool = True, tag: str | None = None):
        import zarr

        out = local_or_url(out)  # file:// gets the local rename, atomic
        if checked:
            check_output_path(out, overwrite)
        self.out, self.overwrite, self.marker, self.checked = out, overwrite, marker, checked
        # The process id keeps concurrent writers apart; a resumable run passes a fixed
        # ``tag`` instead (its checkpoint lock keeps runs apart) so that it replaces what a
        # killed run left under the same name.
        self.tag = tag or str(os.getpid())
        parent, name = _split(out)
        self.tmp = join(parent, f".{name}.partial-{self.tag}")
        _remove(self.tmp)
        _remove(self.scratch_folder())
        try:
            self.group = zarr.open_group(self.tmp, mode="w", zarr_format=3)
        except OSError as exc:
            self.abandon()
            raise OutputError(f"{out}: cannot write the result ({exc.strerror or exc}); nothing was left behind") from None

    def scratch_folder(self) -> str:
        """A folder beside the output for scratch arrays, removed by commit or abandon."""
        parent, name = _split(self.out)
        return join(parent, f".{name}.scratch-{self.tag}")

    def create(self, name: str, shape: tuple, dtype, dims: tuple, chunks: tuple):
        """An empty array to be filled in whole chunks."""
        return self.group.create_array(name, shape=shape, dtype=dtype, chunks=chunks, dimension_names=dims)

    def add(self, name: str, data, dims: tuple, chunks: tuple | None = None) -> None:
        data = np.asarray(data)
        dtype = str if data.dtype.kind in "OUS" else data.dtype
        arr = self.group.create_array(name, shape=data.shape, dtype=dtype, chunks=chunks or data.shape or None,
                                      dimension_names=dims)
        arr[...] = data.astype(str) if dtype is str else data

    def commit(self, attrs: dict) -> None:
        """Write the attributes, mark the store complete, and move it to its name."""
        out = self.out
        parent, name = _split(out)
        self.group.attrs.update(attrs)
        key, version = self.marker
        self.group.attrs[key] = version  # written last: marks the store complete
        if exists(out):
            if self.checked:
                check_output_path(out, self.overwrite)
            trash = join(parent, f".{name}.replaced-{os.getpid()}")
            _rename(out, trash)
            _rename(self.tmp, out)
            _remove(trash)
        else:
            _rename(self.tmp, out)
        _remove(self.scratch_folder())

    def abandon(self) -> None:
        _remove(self.tmp)
        _remove(self.scratch_folder())

    def __enter__(self) -> "ResultWriter":
        return self

    def __exit__(self, kind, exc, tb) -> None:
        if kind is None:
            return
        self.abandon()
        if issubclass(kind, OSError):
            raise OutputError(f"{self.out}: cannot write the result ({exc.strerror or exc}); "
                              "nothing was left behind") from None


def write_result(out: str, arrays: dict, attrs: dict, overwrite: bool) -> None:
    """Write ``arrays`` (name -> (data, dims, chunks)) and ``attrs`` atomically to ``out``."""
    with ResultWriter(out, overwrite) as writer:
        for key, (data, dims, chunks) in arrays.items():
            writer.add(key, data, dims, chunks)
        writer.commit(attrs)


# Local paths use plain os calls (a rename within a folder is atomic); fsspec URLs use
# the URL's filesystem: on file:// and memory:// a move is a rename, on object stores
# (s3://, gs://) a copy then a delete, so there the complete-store marker written last
# (FORMAT_KEY) is what tells a finished store from an interrupted one.
def _split(out: str) -> tuple[str, str]:
    if is_url(out):
        return parent(out), out.rstrip("/").rsplit("/", 1)[1]
    return os.path.split(os.path.abspath(out))


def _isdir(path: str) -> bool:
    if is_url(path):
        fs, p = url_fs(path)
        return fs.isdir(p)
    return os.path.isdir(path)


def _rename(src: str, dst: str) -> None:
    if is_url(src):
        fs, p = url_fs(src)
        fs.mv(p, url_fs(dst)[1], recursive=True)
    else:
        os.rename(src, dst)


def _remove(path: str) -> None:
    """Delete a folder tree or a file, whichever ``path`` is; ignore a missing one."""
    if is_url(path):
        fs, p = url_fs(path)
        if fs.exists(p):
            fs.rm(p, recursive=True)
        return
    if os.path.isdir(path) and not os.path.islink(path):
        shutil.rmtree(path, ignore_errors=True)
    elif os.path.lexists(path):
        os.remove(path)

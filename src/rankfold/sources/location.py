"""Where a table lives: a local path, or an fsspec URL (file://, memory://, s3://, gs://, ...).

Local paths keep the plain ``os`` calls the readers were built on.  URLs go
through fsspec for listing, stat and opening, and the readers hand them to
zarr's and pyarrow's own fsspec support (zarr's ``FsspecStore`` from the URL
string; pyarrow through ``PyFileSystem(FSSpecHandler(fs))``).  Credentials and
endpoints are fsspec's usual configuration (environment, config files), never
rankfold options.
"""

from __future__ import annotations

import os
import posixpath


def is_url(path: str) -> bool:
    """True for ``scheme://...`` locations (anything fsspec resolves)."""
    return "://" in str(path)


def url_fs(url: str):
    """``(fsspec filesystem, path inside it)`` for ``url``."""
    import fsspec

    return fsspec.core.url_to_fs(url)


def join(base: str, name: str) -> str:
    """``base/name`` for a local path or a URL."""
    return base.rstrip("/") + "/" + name if is_url(base) else os.path.join(base, name)


def parent(path: str) -> str:
    """The folder holding ``path`` (a URL stays a URL)."""
    if is_url(path):
        scheme, rest = path.split("://", 1)
        return f"{scheme}://{posixpath.dirname(rest.rstrip('/'))}"
    return os.path.dirname(os.path.abspath(path))


def exists(path: str) -> bool:
    if is_url(path):
        fs, p = url_fs(path)
        return fs.exists(p)
    return os.path.exists(path)


def arrow_filesystem(url: str):
    """``(pyarrow filesystem, path)`` reading ``url`` through fsspec."""
    import pyarrow.fs as pafs

    fs, p = url_fs(url)
    return pafs.PyFileSystem(pafs.FSSpecHandler(fs)), p


def stat(path: str) -> dict:
    """Size and modification stamp of one file (the stamp fsspec reports, if any)."""
    if not is_url(path):
        st = os.stat(path)
        return {"bytes": st.st_size, "mtime_ns": st.st_mtime_ns}
    fs, p = url_fs(path)
    info = fs.info(p)
    stamp = next((info[k] for k in ("mtime", "LastModified", "updated", "created") if k in info), None)
    return {"bytes": int(info.get("size") or 0), "modified": str(stamp) if stamp is not None else None}


def tree_stat(path: str) -> dict:
    """Count, total size and latest modification stamp of the files under a URL."""
    fs, p = url_fs(path)
    if fs.isfile(p):
        files = {p: fs.info(p)}
    else:
        files = fs.find(p, detail=True)
    stamps = [str(next((i[k] for k in ("mtime", "LastModified", "updated", "created") if k in i), ""))
              for i in files.values()]
    return {"count": len(files), "bytes": int(sum(int(i.get("size") or 0) for i in files.values())),
            "latest_modified": max(stamps, default="")}


def local_or_url(path: str) -> str:
    """A ``file://`` URL as the plain local path it names (so local guarantees apply); others unchanged."""
    if str(path).startswith("file://"):
        return url_fs(path)[1]
    return path

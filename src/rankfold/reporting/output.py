"""Writing a report folder atomically: a hidden temporary folder beside the target, renamed when complete.

A report folder found under the requested name therefore always holds its
``index.html``, figures and JSON; an interrupted write leaves at most a hidden
``.NAME.partial-PID`` folder, which the next write of the same report removes.
"""

from __future__ import annotations

import json
import os
import shutil

from rankfold.errors import OutputError
from rankfold.result import check_parent_folder

REPORT_MARKER = "rankfold_report"  # key in report.json / comparison.json naming the format version
REPORT_VERSION = 1


def check_report_folder(out_dir: str, overwrite: bool) -> None:
    """Refuse a non-empty existing folder unless ``overwrite`` (and then only a previous report).

    Raises
    ------
    OutputError
        Naming ``out_dir`` or its parent and what to do.
    """
    if os.path.lexists(out_dir):
        if not os.path.isdir(out_dir):
            raise OutputError(f"{out_dir}: exists and is not a folder; choose another report folder")
        if os.listdir(out_dir):
            if not overwrite:
                raise OutputError(f"{out_dir}: folder exists and is not empty; choose another report folder "
                                  "or pass --overwrite to replace it")
            if not is_report(out_dir):
                raise OutputError(f"{out_dir}: exists and is not a rankfold report, so --overwrite will not "
                                  "replace it; remove it yourself or choose another folder")
    check_parent_folder(out_dir, hint="; choose a report folder elsewhere")


def is_report(path: str) -> bool:
    """Whether ``path`` holds a report written by rankfold (its JSON carries the marker)."""
    for name in ("report.json", "comparison.json"):
        try:
            with open(os.path.join(path, name)) as fh:
                if REPORT_MARKER in json.load(fh):
                    return True
        except (OSError, ValueError, TypeError):
            continue
    return False


def write_folder(out_dir: str, files: dict[str, bytes], overwrite: bool) -> str:
    """Write ``files`` (relative path -> bytes) as the folder ``out_dir``, atomically.

    Returns
    -------
    str
        Absolute path of ``out_dir``.
    """
    check_report_folder(out_dir, overwrite)
    out_dir = os.path.abspath(out_dir)
    parent, name = os.path.split(out_dir)
    tmp = os.path.join(parent, f".{name}.partial-{os.getpid()}")
    _remove(tmp)
    try:
        os.makedirs(tmp)
        for rel, data in files.items():
            path = os.path.join(tmp, rel)
            os.makedirs(os.path.dirname(path), exist_ok=True)
            with open(path, "wb") as fh:
                fh.write(data)
        move_into_place(tmp, out_dir)
    except OSError as exc:
        _remove(tmp)
        raise OutputError(f"{out_dir}: cannot write the report ({exc.strerror or exc}); "
                          "nothing was left behind") from None
    except BaseException:
        _remove(tmp)
        raise
    return out_dir


def move_into_place(tmp: str, out_dir: str) -> None:
    """Rename the finished folder ``tmp`` to ``out_dir``, replacing what :func:`check_report_folder` allowed.

    An empty folder or a previous report is moved aside first, so the name
    never points at a mixture of old and new files.
    """
    if os.path.lexists(out_dir):
        parent, name = os.path.split(out_dir)
        trash = os.path.join(parent, f".{name}.replaced-{os.getpid()}")
        _remove(trash)
        os.rename(out_dir, trash)
        os.rename(tmp, out_dir)
        _remove(trash)
    else:
        os.rename(tmp, out_dir)


def _remove(path: str) -> None:
    if os.path.isdir(path) and not os.path.islink(path):
        shutil.rmtree(path, ignore_errors=True)
    elif os.path.lexists(path):
        os.remove(path)

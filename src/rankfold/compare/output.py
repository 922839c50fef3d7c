"""The report folder: written under a hidden temporary name, renamed when complete."""

from __future__ import annotations

import math
import os
import shutil

import numpy as np

from rankfold.errors import OutputError
from rankfold.reporting.output import check_report_folder, move_into_place

class ReportFolder:
    """``with ReportFolder(out) as tmp:`` write into ``tmp``; renamed to ``out`` on success only.

    A folder found under the requested name is therefore complete; on any
    error the temporary folder (and the subset scratch inside it) is removed.
    """

    def __init__(self, out: str, overwrite: bool = False):
        # An existing folder is refused unless overwrite, and then replaced only if it is empty
        # or a rankfold report (reporting.output.check_report_folder).
        check_report_folder(os.fspath(out), overwrite)
        self.out = os.path.abspath(os.fspath(out))
        self.overwrite = overwrite
        parent, name = os.path.split(self.out)
        self.tmp = os.path.join(parent, f".{name}.partial-{os.getpid()}")

    def __enter__(self) -> str:
        shutil.rmtree(self.tmp, ignore_errors=True)
        try:
            os.mkdir(self.tmp)
        except OSError as exc:
            raise OutputError(f"{self.out}: cannot create the report folder ({exc.strerror or exc})") from None
        return self.tmp

    def __exit__(self, kind, exc, tb) -> bool:
        if kind is not None:
            shutil.rmtree(self.tmp, ignore_errors=True)
            return False
        shutil.rmtree(os.path.join(self.tmp, "scratch"), ignore_errors=True)
        try:
            if os.path.lexists(self.out) and not self.overwrite:
                raise OutputError(f"{self.out}: appeared while the comparison ran; the report was not written")
            move_into_place(self.tmp, self.out)
        except OSError as err:
            shutil.rmtree(self.tmp, ignore_errors=True)
            raise OutputError(f"{self.out}: cannot write the report ({err.strerror or err})") from None
        except OutputError:
            shutil.rmtree(self.tmp, ignore_errors=True)
            raise
        return False


def plain(value):
    """Numpy values to JSON-ready Python: lists, floats, ints; non-finite floats become None."""
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [plain(v) for v in value]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        value = float(value)
        return value if math.isfinite(value) else None
    return value


def write_report(comparison: dict, folder: str, **results) -> str:
    """Write the report of ``comparison`` (page, figures, ``comparison.json``) into the empty ``folder``.

    Returns the page's path.
    """
    from rankfold.reporting import write_comparison_report

    return write_comparison_report(comparison, folder, **results)

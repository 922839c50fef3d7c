"""Reports a person can look at: one self-contained HTML page, the figures as PNG, the numbers as JSON.

* :func:`write_result_report` -- one result: scree, scores scatter, largest
  loadings, residual distribution, how it was computed;
* :func:`write_comparison_report` -- a comparison of settings against a
  reference (angles, variance errors, overlaid scree, a table of settings).

Modules: ``figures`` (matplotlib, Agg only, numbers in, PNG bytes out),
``page`` (HTML assembly), ``samples`` (sampled and streamed per-sample reads,
label columns), ``output`` (atomic report folders), ``result_report`` and
``comparison_report`` (what goes on each page).
"""

import os

from rankfold.reporting.comparison_report import write_comparison_report
from rankfold.reporting.result_report import write_result_report

__all__ = ["write_result_report", "write_comparison_report", "default_report_folder"]


def default_report_folder(result_path: str) -> str:
    """Where a result's report goes by default: beside it, ``NAME.zarr`` -> ``NAME.report``."""
    path = os.path.normpath(os.fspath(result_path))
    stem = path[: -len(".zarr")] if path.endswith(".zarr") else path
    return stem + ".report"

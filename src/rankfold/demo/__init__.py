"""Two invented datasets with planted structure, and a run that recovers it.

* a breeding panel (:mod:`rankfold.demo.panel`): marker dosages of lines from
  a few founder populations, a Zarr v3 array with lines as columns;
* a machine fleet (:mod:`rankfold.demo.fleet`): ten-minute sensor records in
  a folder of Parquet files, with shared weather, workload and oil-wear modes
  and a few machines that develop a fault.

:func:`run_demo` writes both (unless an identical copy is already there),
decomposes them and returns a report as lines of text.
"""

from __future__ import annotations

import math
import os
import time
from pathlib import Path

import rankfold
from rankfold.demo.fleet import FleetTruth, read_fleet_truth, stored_fleet_parameters, write_fleet
from rankfold.demo.fleet import fleet_parameters
from rankfold.demo.labels import fleet_labels, panel_labels
from rankfold.demo.panel import PanelTruth, panel_parameters, read_panel_truth, stored_panel_parameters
from rankfold.demo.panel import write_panel
from rankfold.demo.summary import summarize_fleet, summarize_panel
from rankfold.errors import OutputError, UsageError
from rankfold.reporting import write_result_report

__all__ = [
    "run_demo",
    "write_panel",
    "write_fleet",
    "read_panel_truth",
    "read_fleet_truth",
    "PanelTruth",
    "FleetTruth",
    "summarize_panel",
    "summarize_fleet",
]

PANEL_MARKERS = 20_000
FLEET_RECORDS = 6_000
RANK = 6


def _prepare(path: Path, wanted: dict, stored, write, read, overwrite: bool):
    """Reuse `path` if it holds exactly `wanted`, else (re)write it.

    Data that the demo itself wrote with other parameters is replaced freely;
    anything else at `path` is only replaced when `overwrite` is true.

    Returns
    -------
    tuple
        The truth object and the word for what happened.
    """
    found = stored(path)
    if found == wanted and not overwrite:
        return read(path), "reused"
    if path.exists() and found is None and not overwrite:
        raise OutputError(f"{path} exists and was not written by the demo; pass overwrite=True to replace it")
    verb = "regenerated" if path.exists() else "generated"
    return write(path, overwrite=True), verb


def _panel(path: Path, n_markers: int, overwrite: bool) -> tuple[PanelTruth, str]:
    wanted = panel_parameters(n_markers=n_markers)
    return _prepare(path, wanted, stored_panel_parameters,
                    lambda p, overwrite: write_panel(p, n_markers=n_markers, overwrite=overwrite),
                    read_panel_truth, overwrite)


def _fleet(path: Path, records: int, overwrite: bool) -> tuple[FleetTruth, str]:
    wanted = fleet_parameters(records_per_machine=records)
    return _prepare(path, wanted, stored_fleet_parameters,
                    lambda p, overwrite: write_fleet(p, records_per_machine=records, overwrite=overwrite),
                    read_fleet_truth, overwrite)


def _report(result, folder: Path, labels) -> str:
    """Write the scenario's report beside its result (replacing the previous run's); path of index.html."""
    return write_result_report(result, folder, labels=labels, overwrite=True)


def _indent(lines: list[str]) -> list[str]:
    return [f"  {line}" if line else "" for line in lines]


def run_demo(
    out_dir: str | os.PathLike,
    *,
    scale: float = 1.0,
    memory_limit=None,
    overwrite: bool = False,
) -> list[str]:
    """Generate both demo datasets, decompose them and report what was found.

    Parameters
    ----------
    out_dir : str or os.PathLike
        Folder for ``panel.zarr``, ``fleet/``, the two results
        ``panel-result.zarr`` and ``fleet-result.zarr`` and their reports
        ``panel-result.report/`` and ``fleet-result.report/`` (each with an ``index.html``).
    scale : float
        Multiplies the number of panel markers (20,000) and of records per
        machine (6,000); 50 gives about 1.5 GB of dosages and 12 million records.
    memory_limit : optional
        Passed unchanged to :func:`rankfold.decompose`.
    overwrite : bool
        Regenerate the datasets even if matching copies exist, and replace
        files at their paths that the demo did not write.

    Returns
    -------
    list of str
        The report: for each scenario the paths written, the time each step
        took and how well the planted structure was recovered.

    Raises
    ------
    UsageError
        If `scale` is not a positive finite number.
    OutputError
        If a dataset path holds something else and `overwrite` is false.
    """
    if not (isinstance(scale, (int, float)) and math.isfinite(scale) and scale > 0):
        raise UsageError(f"scale must be a positive number, not {scale!r}")
    out = Path(out_dir)
    n_markers = max(100, round(PANEL_MARKERS * scale))
    records = max(144, round(FLEET_RECORDS * scale))  # at least a day per machine
    began = time.perf_counter()
    lines = [f"rankfold demo, scale {scale:g}, in {out}", ""]

    clock = time.perf_counter()
    panel, verb = _panel(out / "panel.zarr", n_markers, overwrite)
    made = time.perf_counter() - clock
    clock = time.perf_counter()
    result = rankfold.decompose(
        f"{out}/panel.zarr/dosage", rank=RANK, samples_as="columns", missing="fill-mean",
        missing_code=-1, route="auto", out=f"{out}/panel-result.zarr", overwrite=True,
        memory_limit=memory_limit,
    )
    solved = time.perf_counter() - clock
    report = _report(result, out / "panel-result.report",
                     panel_labels(result, panel) if result.scores is not None else None)
    lines += [
        "Scenario 1: breeding panel -- do the components tell the founder populations apart?",
        f"  data    {out / 'panel.zarr'}  ({verb} in {made:.1f} s; "
        f"{panel.n_markers:,} markers x {panel.line_ids.size:,} lines, int8, -1 = missing)",
        f"  result  {out / 'panel-result.zarr'}  (computed in {solved:.1f} s)",
        f"  report  {report}",
        "",
        *_indent(summarize_panel(result, panel)),
        "",
    ]

    clock = time.perf_counter()
    fleet, verb = _fleet(out / "fleet", records, overwrite)
    made = time.perf_counter() - clock
    clock = time.perf_counter()
    result = rankfold.decompose(
        f"{out}/fleet", rank=RANK, standardize=True, columns=list(fleet.channel_patterns),
        id_column="record_id", out=f"{out}/fleet-result.zarr", overwrite=True,
        memory_limit=memory_limit,
    )
    solved = time.perf_counter() - clock
    report = _report(result, out / "fleet-result.report",
                     fleet_labels(result, fleet) if result.scores is not None else None)
    lines += [
        "Scenario 2: machine fleet -- do the components find the shared operating modes?",
        f"  data    {out / 'fleet'}  ({verb} in {made:.1f} s; {len(fleet.files)} Parquet files, "
        f"{len(fleet.machine_ids) * fleet.records_per_machine:,} records x "
        f"{len(fleet.channel_names)} channels)",
        f"  result  {out / 'fleet-result.zarr'}  (computed in {solved:.1f} s)",
        f"  report  {report}",
        "",
        *_indent(summarize_fleet(result, fleet)),
        "",
        f"total time {time.perf_counter() - began:.1f} s",
    ]
    return lines

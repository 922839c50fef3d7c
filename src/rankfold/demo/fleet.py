"""An invented fleet of machines logging sensor records every ten minutes.

The records of all machines form one long table (one row per record), split
into a folder of Parquet files, one file per group of machines.  Three modes
are planted (see :mod:`rankfold.demo.fleet_design`): the site's weather, each
machine's workload and oil wear.  A few machines develop a fault late in their
records, a slowly growing offset that no planted mode explains; they should
stand out by reconstruction error.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import math
import os
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from rankfold.demo import fleet_design as design
from rankfold.demo._staging import staged_directory
from rankfold.errors import UsageError

_KIND = "rankfold-demo-fleet"
_VERSION = 1  # bump when the generator changes, so stale folders are rebuilt
_METADATA_KEY = b"rankfold_demo"
_START = dt.datetime(2031, 3, 3, tzinfo=dt.timezone.utc)  # an invented first record
_DRIFT_SIZE = 12.0  # length of the final fault offset, in standardized units
_MIN_FILES = 4


@dataclasses.dataclass(frozen=True, eq=False)
class FleetTruth:
    """What was planted in a generated fleet.

    Attributes
    ----------
    path : str
        The Parquet folder.
    files : tuple of str
        The Parquet files, in machine order.
    machine_ids : tuple of str
        All machines, e.g. ``"M07"``.
    channel_names, channel_units : tuple of str
        The numeric sensor columns and their units, in column order.
    channel_patterns : tuple of str
        fnmatch patterns selecting exactly the sensor columns, one per subsystem.
    mode_patterns : dict of str to numpy.ndarray
        Unit vector over channels (standardized units) of each planted mode.
    drifting_machines : tuple of str
        Machines with a late fault.
    drift_start : dict of str to int
        Record number at which each drifting machine's fault begins.
    drift_patterns : dict of str to numpy.ndarray
        Unit direction of each fault, orthogonal to every mode pattern.
    records_per_machine : int
        Records logged by every machine.
    parameters : dict
        The generator's parameters, as stored in each file's metadata.
    """

    path: str
    files: tuple
    machine_ids: tuple
    channel_names: tuple
    channel_units: tuple
    channel_patterns: tuple
    mode_patterns: dict
    drifting_machines: tuple
    drift_start: dict
    drift_patterns: dict
    records_per_machine: int
    parameters: dict


def fleet_parameters(
    *,
    n_machines: int = 40,
    records_per_machine: int = 6000,
    n_channels: int = 240,
    n_drifting: int = 3,
    row_group_rows: int = 20_000,
    seed: int = 20261203,
) -> dict:
    """Check and collect the generator parameters in their stored form.

    Parameters
    ----------
    n_machines, records_per_machine, n_channels, n_drifting, row_group_rows, seed
        See :func:`write_fleet`.

    Returns
    -------
    dict
        JSON-ready parameters, also used to recognise an up-to-date folder.

    Raises
    ------
    UsageError
        If a parameter is out of range.
    """
    if n_channels < len(design.SUBSYSTEMS):
        raise UsageError(f"n_channels must be at least {len(design.SUBSYSTEMS)} (one per subsystem)")
    if n_machines < 1 or records_per_machine < 10 or row_group_rows < 1:
        raise UsageError("need at least one machine, ten records each, and positive row groups")
    if not 0 <= n_drifting <= n_machines:
        raise UsageError("n_drifting must be between 0 and n_machines")
    return {
        "kind": _KIND,
        "version": _VERSION,
        "n_machines": int(n_machines),
        "records_per_machine": int(records_per_machine),
        "n_channels": int(n_channels),
        "n_drifting": int(n_drifting),
        "row_group_rows": int(row_group_rows),
        "seed": int(seed),
    }


def _layout(params: dict) -> dict:
    """Everything about the fleet except the records themselves.

    Drawn from its own stream (``[seed, 0]``) so the truth of an existing folder
    can be rebuilt from its stored parameters alone.
    """
    rng = np.random.default_rng([params["seed"], 0])
    n, records = params["n_machines"], params["records_per_machine"]
    channels = design.design_channels(params["n_channels"], rng)
    width = max(2, len(str(n)))
    machines = [f"M{i + 1:0{width}d}" for i in range(n)]
    drifting = sorted(rng.choice(n, size=params["n_drifting"], replace=False).tolist())
    drift_start = {machines[i]: int(rng.uniform(0.55, 0.75) * records) for i in drifting}
    drift_dirs = {machines[i]: design.drift_direction(channels, rng) for i in drifting}
    per_file = math.ceil(n / _MIN_FILES)
    groups = [list(range(s, min(s + per_file, n))) for s in range(0, n, per_file)]
    return {
        "channels": channels,
        "machines": machines,
        "drift_start": drift_start,
        "drift_dirs": drift_dirs,
        "groups": groups,
        "files": [f"{machines[g[0]]}-{machines[g[-1]]}.parquet" for g in groups],
    }


def _truth(path: Path, params: dict, layout: dict) -> FleetTruth:
    channels = layout["channels"]
    loadings = channels["loadings"]
    return FleetTruth(
        path=str(path),
        files=tuple(str(path / name) for name in layout["files"]),
        machine_ids=tuple(layout["machines"]),
        channel_names=tuple(channels["names"]),
        channel_units=tuple(channels["units"]),
        channel_patterns=tuple(f"{row[0]}_*" for row in design.SUBSYSTEMS),
        mode_patterns={m: loadings[i] / np.linalg.norm(loadings[i]) for i, m in enumerate(design.MODES)},
        drifting_machines=tuple(layout["drift_start"]),
        drift_start=dict(layout["drift_start"]),
        drift_patterns=dict(layout["drift_dirs"]),
        records_per_machine=params["records_per_machine"],
        parameters=params,
    )


def _schema(params: dict, channels: dict) -> pa.Schema:
    fields = [
        pa.field("record_id", pa.string(), nullable=False),
        pa.field("machine", pa.string(), nullable=False),
        pa.field("recorded_at", pa.timestamp("ms", tz="UTC"), nullable=False),
    ]
    fields += [
        pa.field(name, pa.float32(), nullable=False, metadata={"unit": unit, "resolution": f"{res:g}"})
        for name, unit, res in zip(channels["names"], channels["units"], channels["resolution"])
    ]
    description = (
        "Invented machine fleet: one row per ten-minute sensor record; "
        "numeric channels are named <subsystem>_<number>, units in field metadata."
    )
    return pa.schema(fields, metadata={_METADATA_KEY: json.dumps(params), b"description": description})


def _machine_batches(params, layout, machine_index, weather, schema):
    """Yield one machine's records as tables of at most ``row_group_rows`` rows."""
    records = params["records_per_machine"]
    machine = layout["machines"][machine_index]
    channels = layout["channels"]
    rng = np.random.default_rng([params["seed"], 2, machine_index])
    signals = np.column_stack([
        weather, design.workload_signal(records, rng), design.oil_wear_signal(records, rng),
    ]).astype(np.float32)
    # float32 throughout: the stored values are float32 anyway, and it halves
    # the memory traffic of the largest arrays.
    loadings = channels["loadings"].astype(np.float32)
    noise_sd = np.sqrt(1.0 - (channels["loadings"] ** 2).sum(axis=0)).astype(np.float32)
    mean, spread, grid = (channels[k].astype(np.float32) for k in ("mean", "spread", "resolution"))
    start = layout["drift_start"].get(machine)
    direction = layout["drift_dirs"].get(machine)
    step = params["row_group_rows"]
    id_width = max(6, len(str(records - 1)))
    for first in range(0, records, step):
        index = np.arange(first, min(first + step, records))
        z = signals[index] @ loadings
        z += rng.standard_normal(z.shape, dtype=np.float32) * noise_sd
        if start is not None and index[-1] >= start:
            # Wear accelerates: the offset grows with the square of the time since
            # the fault began, reaching _DRIFT_SIZE at the last record.  Few rows
            # carry much of it, so across the whole fleet the fault adds less
            # variance than a pure-noise channel and no component absorbs it.
            ramp = np.clip((index - start) / max(1, records - 1 - start), 0.0, None) ** 2
            z += (_DRIFT_SIZE * ramp[:, None] * direction[None, :]).astype(np.float32)
        z *= spread
        z += mean
        values = np.round(z / grid) * grid
        stamps = np.datetime64(_START.replace(tzinfo=None), "ms") + index * np.timedelta64(600_000, "ms")
        ids = pc.binary_join_element_wise(
            f"{machine}-", pc.utf8_lpad(pc.cast(pa.array(index), pa.string()), id_width, "0"), ""
        )
        columns = [ids, pa.array([machine] * index.size, pa.string()),
                   pa.array(stamps, pa.timestamp("ms", tz="UTC"))]
        columns += [pa.array(column) for column in np.ascontiguousarray(values.T)]
        yield pa.Table.from_arrays(columns, schema=schema)


def _write_file(path: Path, params, layout, machine_indices, weather, schema) -> None:
    """Write some machines' records with row groups of exactly ``row_group_rows`` rows.

    Machine boundaries do not end a row group: pieces are buffered until a full
    group is ready, so row groups stay the promised size at any scale.
    """
    step = params["row_group_rows"]
    pending: list[pa.Table] = []
    buffered = 0
    # Unique record ids and timestamps gain nothing from a dictionary; the
    # machine name and the gridded sensor values gain a lot.
    dictionary = [name for name in schema.names if name not in ("record_id", "recorded_at")]
    with pq.ParquetWriter(path, schema, compression="zstd", use_dictionary=dictionary) as writer:
        for machine_index in machine_indices:
            for table in _machine_batches(params, layout, machine_index, weather, schema):
                pending.append(table)
                buffered += table.num_rows
                while buffered >= step:
                    joined = pa.concat_tables(pending)
                    writer.write_table(joined.slice(0, step), row_group_size=step)
                    pending, buffered = [joined.slice(step)], buffered - step
        if buffered:
            writer.write_table(pa.concat_tables(pending), row_group_size=step)


def write_fleet(
    path: str | os.PathLike,
    *,
    n_machines: int = 40,
    records_per_machine: int = 6000,
    n_channels: int = 240,
    n_drifting: int = 3,
    row_group_rows: int = 20_000,
    seed: int = 20261203,
    overwrite: bool = False,
) -> FleetTruth:
    """Generate the fleet's sensor records as a folder of Parquet files.

    Parameters
    ----------
    path : str or os.PathLike
        Folder to create, e.g. ``"fleet"``.
    n_machines : int
        Number of machines; the records are split into files of whole machines
        (four files when there are at least four machines).
    records_per_machine : int
        Ten-minute records per machine, all on the same timeline.
    n_channels : int
        Number of float32 sensor channels (at least one per subsystem).
    n_drifting : int
        Machines that develop a fault in the later part of their records.
    row_group_rows : int
        Rows per Parquet row group (the last one of a file may be shorter).
    seed : int
        Seed of every random stream; the same seed gives the same records.
    overwrite : bool
        Replace `path` if it exists.

    Returns
    -------
    FleetTruth
        The planted modes, the drifting machines and the files written.

    Notes
    -----
    Columns: ``record_id`` (unique string such as ``"M07-000123"``),
    ``machine``, ``recorded_at`` (UTC timestamp), then the channels.  There are
    no nulls.  Memory use is bounded by one row group, whatever the size.
    """
    params = fleet_parameters(
        n_machines=n_machines, records_per_machine=records_per_machine, n_channels=n_channels,
        n_drifting=n_drifting, row_group_rows=row_group_rows, seed=seed,
    )
    layout = _layout(params)
    schema = _schema(params, layout["channels"])
    start_day = _START.timetuple().tm_yday
    weather = design.weather_signal(records_per_machine, start_day, np.random.default_rng([seed, 1]))
    with staged_directory(path, overwrite=overwrite) as scratch:
        for name, machine_indices in zip(layout["files"], layout["groups"]):
            _write_file(scratch / name, params, layout, machine_indices, weather, schema)
    return _truth(Path(path), params, layout)


def stored_fleet_parameters(path: str | os.PathLike) -> dict | None:
    """Parameters of a folder written by :func:`write_fleet`, or None.

    Parameters
    ----------
    path : str or os.PathLike
        The Parquet folder.

    Returns
    -------
    dict or None
        The stored parameters; None unless every expected file is present
        and carries them.
    """
    folder = Path(path)
    try:
        first = min(folder.glob("*.parquet"))
        params = json.loads(pq.read_schema(first).metadata[_METADATA_KEY])
        if params.get("kind") != _KIND:
            return None
        expected = _layout(params)["files"]
        present = sorted(p.name for p in folder.iterdir())
        if present != sorted(expected):
            return None
        for name in expected:
            if json.loads(pq.read_schema(folder / name).metadata[_METADATA_KEY]) != params:
                return None
    except Exception:  # missing, foreign or damaged folders are simply not ours
        return None
    return params


def read_fleet_truth(path: str | os.PathLike) -> FleetTruth:
    """Rebuild the planted structure of an existing demo fleet.

    Parameters
    ----------
    path : str or os.PathLike
        The Parquet folder written by :func:`write_fleet`.

    Returns
    -------
    FleetTruth

    Raises
    ------
    UsageError
        If `path` is not a demo fleet.
    """
    params = stored_fleet_parameters(path)
    if params is None:
        raise UsageError(f"{path} is not a fleet written by rankfold.demo")
    return _truth(Path(path), params, _layout(params))

"""The demo generators write what they promise, reproducibly, with findable structure.

Sizes are small so the whole module runs in a few seconds.  The structure
checks use numpy.linalg.svd (LAPACK's gesdd driver) on the whole small table,
independently of rankfold's own streaming code.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import zarr

from rankfold.demo.fleet import read_fleet_truth, stored_fleet_parameters, write_fleet
from rankfold.demo.panel import MISSING_CODE, read_panel_truth, stored_panel_parameters, write_panel
from rankfold.errors import OutputError

PANEL = dict(n_lines=120, n_markers=3000, n_founders=3, missing_rate=0.05, chunk_markers=1000)
FLEET = dict(n_machines=8, records_per_machine=2000, n_channels=60, n_drifting=1, row_group_rows=3000)


@pytest.fixture(scope="module")
def panel(tmp_path_factory):
    path = tmp_path_factory.mktemp("panel") / "panel.zarr"
    return path, write_panel(path, **PANEL)


@pytest.fixture(scope="module")
def fleet(tmp_path_factory):
    path = tmp_path_factory.mktemp("fleet") / "fleet"
    return path, write_fleet(path, **FLEET)


@pytest.fixture(scope="module")
def fleet_svd(fleet):
    """Standardized channels of the small fleet and their right singular vectors."""
    _, truth = fleet
    table = _fleet_table(truth)
    data = np.column_stack([table[c].to_numpy() for c in truth.channel_names]).astype(float)
    z = (data - data.mean(axis=0)) / data.std(axis=0)
    _, _, vt = np.linalg.svd(z, full_matrices=False)  # LAPACK gesdd
    return table, z, vt


def _fleet_table(truth) -> pa.Table:
    return pa.concat_tables([pq.read_table(f) for f in truth.files])


# ---------------------------------------------------------------- panel


def test_panel_layout(panel):
    path, truth = panel
    group = zarr.open_group(path, mode="r")
    dosage = group["dosage"]
    assert truth.path == f"{path}/dosage"
    assert dosage.shape == (PANEL["n_markers"], PANEL["n_lines"])
    assert dosage.dtype == np.int8
    assert dosage.metadata.dimension_names == ("marker", "line")
    assert dosage.chunks == (PANEL["chunk_markers"], PANEL["n_lines"])
    assert group["marker"].metadata.dimension_names == ("marker",)
    assert group["line"].metadata.dimension_names == ("line",)
    assert group["line"][:].tolist() == truth.line_ids.tolist()
    markers = group["marker"][:].tolist()
    assert len(set(markers)) == PANEL["n_markers"]
    assert group.attrs["missing_code"] == MISSING_CODE == -1
    values = dosage[:]
    assert set(np.unique(values).tolist()) == {-1, 0, 1, 2}
    # 360,000 calls: the missing share has a standard error of ~0.0004.
    assert abs((values == -1).mean() - PANEL["missing_rate"]) < 0.003


def test_panel_truth_matches_store(panel):
    path, truth = panel
    group = zarr.open_group(path, mode="r")
    assert np.array_equal(group["founder"][:], truth.founder)
    assert set(truth.founder.tolist()) == set(range(PANEL["n_founders"]))
    crosses = truth.admixed
    assert 0 < crosses.sum() < 0.25 * PANEL["n_lines"]
    assert np.all((truth.founder_share[crosses] >= 0.5) & (truth.founder_share[crosses] < 0.9))
    assert np.all(truth.founder_share[~crosses] == 1.0)
    assert np.all(truth.second_founder[crosses] != truth.founder[crosses])
    rebuilt = read_panel_truth(path)
    assert np.array_equal(rebuilt.founder, truth.founder)
    assert np.array_equal(rebuilt.second_founder, truth.second_founder)


def test_panel_reproducible(panel, tmp_path):
    path, _ = panel
    again = tmp_path / "again.zarr"
    write_panel(again, **PANEL)
    def chunk_files(root):
        return sorted(p.relative_to(root) for p in (root / "dosage").rglob("*") if p.is_file())

    chunks = chunk_files(path)
    assert len(chunks) > 2 and chunks == chunk_files(again)
    for chunk in chunks:  # zstd output is deterministic: identical bytes, not just values
        assert (path / chunk).read_bytes() == (again / chunk).read_bytes()
    other = tmp_path / "other.zarr"
    write_panel(other, **PANEL, seed=7)
    assert not np.array_equal(zarr.open_array(other / "dosage")[:], zarr.open_array(path / "dosage")[:])


def test_panel_founders_separate(panel):
    path, truth = panel
    dosage = zarr.open_array(path / "dosage", mode="r")[:].astype(float)
    missing = dosage == MISSING_CODE
    dosage[missing] = np.nan
    means = np.nanmean(dosage, axis=1, keepdims=True)
    centred = np.where(missing, means, dosage) - means
    # Lines are columns, so their scores are the right singular vectors.
    _, s, vt = np.linalg.svd(centred, full_matrices=False)
    k = PANEL["n_founders"] - 1
    scores = vt[:k].T * s[:k]
    pure = ~truth.admixed
    centres = np.array([scores[pure & (truth.founder == f)].mean(axis=0) for f in range(k + 1)])
    nearest = ((scores[pure, None, :] - centres) ** 2).sum(axis=2).argmin(axis=1)
    assert (nearest == truth.founder[pure]).mean() > 0.98
    # The founders' components stand clearly above the noise floor.
    assert s[k - 1] > 1.5 * s[k]


def test_panel_refuses_to_clobber(panel, tmp_path):
    path, _ = panel
    with pytest.raises(OutputError):
        write_panel(path, **PANEL)
    assert stored_panel_parameters(path)["n_lines"] == PANEL["n_lines"]
    assert stored_panel_parameters(tmp_path) is None
    assert not list(path.parent.glob(".*partial"))  # no scratch folder left behind


# ---------------------------------------------------------------- fleet


def test_fleet_layout(fleet):
    path, truth = fleet
    files = sorted(Path(path).glob("*.parquet"))
    assert [str(f) for f in files] == sorted(truth.files)
    assert len(files) >= 3
    total = 0
    for f in files:
        meta = pq.ParquetFile(f).metadata
        sizes = [meta.row_group(i).num_rows for i in range(meta.num_row_groups)]
        assert len(sizes) >= 2 and max(sizes) == FLEET["row_group_rows"]
        total += meta.num_rows
    assert total == FLEET["n_machines"] * FLEET["records_per_machine"]
    schema = pq.read_schema(files[0])
    assert schema.names[:3] == ["record_id", "machine", "recorded_at"]
    assert schema.field("record_id").type == pa.string()
    assert schema.field("machine").type == pa.string()
    assert pa.types.is_timestamp(schema.field("recorded_at").type)
    assert tuple(schema.names[3:]) == truth.channel_names
    assert len(truth.channel_names) == FLEET["n_channels"]
    assert all(schema.field(c).type == pa.float32() for c in truth.channel_names)


def test_fleet_values(fleet):
    _, truth = fleet
    table = _fleet_table(truth)
    assert all(column.null_count == 0 for column in table.columns)
    ids = table["record_id"].to_pylist()
    assert len(set(ids)) == len(ids)
    assert set(table["machine"].to_pylist()) == set(truth.machine_ids)
    first = table.slice(0, 2)["recorded_at"].to_pylist()
    assert (first[1] - first[0]).total_seconds() == 600
    means = {c: float(np.mean(table[c].to_numpy())) for c in truth.channel_names}
    # Units differ by orders of magnitude: the reason to standardize.
    assert means["hydraulic_pressure_01"] > 1e5 > 1e3 > means["bearing_temp_01"] > 30


def test_fleet_reproducible(fleet, tmp_path):
    _, truth = fleet
    again = write_fleet(tmp_path / "again", **FLEET)
    assert _fleet_table(again).equals(_fleet_table(truth))
    other = write_fleet(tmp_path / "other", **FLEET, seed=11)
    assert not _fleet_table(other).equals(_fleet_table(truth))
    assert stored_fleet_parameters(tmp_path / "again") == truth.parameters
    rebuilt = read_fleet_truth(tmp_path / "again")
    assert rebuilt.drift_start == truth.drift_start
    assert all(np.allclose(rebuilt.mode_patterns[m], truth.mode_patterns[m]) for m in truth.mode_patterns)


def test_fleet_modes_recovered(fleet, fleet_svd):
    _, truth = fleet
    _, _, vt = fleet_svd
    n_modes = len(truth.mode_patterns)
    patterns = np.array(list(truth.mode_patterns.values()))
    assert np.allclose(patterns @ patterns.T, np.eye(n_modes), atol=1e-9)
    cosines = np.abs(vt[:n_modes] @ patterns.T)
    # Each planted mode is one of the leading directions, and each leading
    # direction is one planted mode.
    assert cosines.max(axis=0).min() > 0.9
    assert sorted(cosines.argmax(axis=1).tolist()) == list(range(n_modes))


def test_fleet_drift_stands_out(fleet, fleet_svd):
    _, truth = fleet
    table, z, vt = fleet_svd
    # Reconstruction from the planted modes' components leaves the fault in the residual.
    lead = vt[: len(truth.mode_patterns)]
    error = ((z - z @ lead.T @ lead) ** 2).sum(axis=1)
    machine = np.asarray(table["machine"].to_pylist())
    record = np.array([int(r.rsplit("-", 1)[1]) for r in table["record_id"].to_pylist()])
    late = record >= 0.9 * truth.records_per_machine
    per_machine = {m: error[late & (machine == m)].mean() for m in truth.machine_ids}
    healthy = max(v for m, v in per_machine.items() if m not in truth.drifting_machines)
    assert len(truth.drifting_machines) == FLEET["n_drifting"]
    assert min(per_machine[m] for m in truth.drifting_machines) > 1.5 * healthy

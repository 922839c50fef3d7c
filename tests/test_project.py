"""``rankfold project`` / ``Result.project``: new samples placed in an existing decomposition.

References: numpy on the in-memory tables (named beside each check) and the stored
training scores themselves (projecting the training data must reproduce them).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import numpy as np
import pyarrow.parquet as pq
import pytest
import zarr

import rankfold
from rankfold.cli import main
from rankfold.projection import ExtraColumnsWarning, open_projection, project

from _table_files import check_refusal, result_left_behind, write_parquet, write_parquet_matrix

RANK = 3


def _numpy_projection(x, res):
    """reference: numpy -- (x - center) / scale times the loadings, and the residual norms."""
    xc = (x - np.asarray(res.center)) / np.asarray(res.scale)
    scores = xc @ res.loadings
    return scores, np.sum((xc - scores @ res.loadings.T) ** 2, axis=1)


@pytest.fixture
def trained(planted, tmp_path):
    names = [f"ch{j:02d}" for j in range(planted.shape[1])]
    path = write_parquet_matrix(tmp_path / "train.parquet", planted, names, row_group_size=40)
    res = rankfold.decompose(path, RANK, standardize=True, out=str(tmp_path / "train.zarr"),
                             scores_dtype="float64")
    return res, names, path


def test_projecting_the_training_data_reproduces_the_stored_scores(trained, tmp_path):
    res, _, path = trained
    done = res.project(path, out=str(tmp_path / "again.zarr"), scores_dtype="float64", memory_limit=90_000)
    assert done.attrs["passes"][0]["blocks"] >= 3  # out of core: several blocks under the ceiling
    np.testing.assert_allclose(done.scores[:], res.scores[:], rtol=0, atol=1e-12 * np.abs(res.scores[:]).max())
    np.testing.assert_allclose(done.residual[:], res.residual[:], rtol=0, atol=1e-12 * res.residual[:].max())
    np.testing.assert_array_equal(done.flagged[:], res.flagged[:])
    assert done.attrs["residual_flag"]["from"] == "training"


def test_columns_are_matched_by_name_and_extras_ignored_with_a_warning(trained, planted, tmp_path):
    res, names, _ = trained
    rng = np.random.default_rng(1)
    new = planted[:57] + rng.normal(0, 0.1, (57, planted.shape[1]))
    order = rng.permutation(len(names))
    columns = {names[j]: new[:, j] for j in order}
    columns["humidity_note"] = rng.normal(size=57)  # a numeric column the decomposition never saw
    path = write_parquet(tmp_path / "new.parquet", columns, 10)
    with pytest.warns(ExtraColumnsWarning, match="humidity_note"):
        done = project(res, path)
    scores, residual = _numpy_projection(new, res)
    np.testing.assert_allclose(done.scores, scores, rtol=0, atol=1e-10 * np.abs(scores).max())
    np.testing.assert_allclose(done.residual, residual, rtol=0, atol=1e-10 * residual.max())


def test_samples_stored_as_columns(planted, write_zarr, tmp_path):
    path = write_zarr(planted, "columns", chunks=(8, 64))
    res = rankfold.decompose(path, RANK, samples_as="columns", route="samples")
    done = project(res, path, memory_limit=100_000)
    assert done.attrs["passes"][0]["axis"] == "features" and done.attrs["passes"][0]["blocks"] >= 3
    scores, residual = _numpy_projection(planted, res)
    np.testing.assert_allclose(done.scores, scores, rtol=0, atol=1e-10 * np.abs(scores).max())
    np.testing.assert_allclose(done.residual, residual, rtol=0, atol=1e-10 * residual.max())


def test_parquet_output_keeps_the_id_column(planted, tmp_path):
    names = [f"ch{j:02d}" for j in range(planted.shape[1])]
    ids = [f"unit-{i:04d}" for i in range(planted.shape[0])]
    table = {"unit": ids, **{n: planted[:, j] for j, n in enumerate(names)}}
    path = write_parquet(tmp_path / "t.parquet", table, 50)
    res = rankfold.decompose(path, RANK, id_column="unit", out=str(tmp_path / "r.zarr"))
    out = str(tmp_path / "p.parquet")
    rc = main(["project", str(tmp_path / "r.zarr"), path, "--out", out, "--format", "parquet", "-q"])
    assert rc == 0
    table = pq.read_table(out)
    assert table.column_names == ["unit", "component_1", "component_2", "component_3", "residual",
                                  "residual_fraction", "flagged"]
    assert table["unit"].to_pylist() == ids
    scores, residual = _numpy_projection(planted, res)
    np.testing.assert_allclose(np.column_stack([table[f"component_{j}"].to_numpy() for j in (1, 2, 3)]), scores,
                               rtol=2e-7, atol=1e-6 * np.abs(scores).max())  # float32 scores
    np.testing.assert_allclose(table["residual"].to_numpy(), residual, rtol=1e-9, atol=1e-12 * residual.max())
    back = open_projection(out)
    assert back.attrs["rank"] == RANK and list(back.sample_ids) == ids
    assert sorted(os.listdir(tmp_path)) == ["p.parquet", "r.zarr", "t.parquet"]


def test_fill_mean_result_fills_new_gaps_with_the_training_means(planted, tmp_path):
    names = [f"ch{j:02d}" for j in range(planted.shape[1])]
    holes = planted.copy()
    holes[::7, 2] = np.nan
    train = write_parquet_matrix(tmp_path / "train.parquet", holes, names)
    res = rankfold.decompose(train, RANK, missing="fill-mean")
    new = planted[:20].copy()
    new[3, 5] = np.nan
    done = project(res, write_parquet_matrix(tmp_path / "new.parquet", new, names))
    filled = new.copy()
    filled[3, 5] = res.center[5]  # reference: the training mean, by hand
    scores, _ = _numpy_projection(filled, res)
    np.testing.assert_allclose(done.scores, scores, rtol=0, atol=1e-10 * np.abs(scores).max())


# ---------------------------------------------------------------- bad input


def _run(capsys, *argv):
    rc = main([str(a) for a in argv])
    captured = capsys.readouterr()
    return rc, captured.out, captured.err


def test_missing_feature_is_named_and_nothing_written(trained, planted, tmp_path, capsys):
    _, names, _ = trained
    columns = {n: planted[:, j] for j, n in enumerate(names) if n not in ("ch03", "ch07")}
    path = write_parquet(tmp_path / "short.parquet", columns, 50)
    out = tmp_path / "p.zarr"
    rc, stdout, err = _run(capsys, "project", tmp_path / "train.zarr", path, "--out", out)
    check_refusal(rc, stdout, err, 3, out, needles=[path, "'ch03'", "'ch07'", "2 feature(s)"])


def test_text_where_numbers_are_expected(trained, planted, tmp_path, capsys):
    _, names, _ = trained
    columns = {n: planted[:, j] for j, n in enumerate(names)}
    columns["ch04"] = [f"{v:.2f}" for v in planted[:, 4]]  # a column exported as text
    path = write_parquet(tmp_path / "text.parquet", columns, 50)
    out = tmp_path / "p.zarr"
    rc, stdout, err = _run(capsys, "project", tmp_path / "train.zarr", path, "--out", out)
    check_refusal(rc, stdout, err, 3, out, needles=[path, "ch04", "non-numeric"])


def test_existing_output_is_refused(trained, tmp_path, capsys):
    _, _, path = trained
    out = tmp_path / "p.zarr"
    out.mkdir()
    (out / "notes.txt").write_text("keep me")
    rc, _, err = _run(capsys, "project", tmp_path / "train.zarr", path, "--out", out)
    assert rc == 5 and "already exists" in err and "Traceback" not in err
    rc, _, err = _run(capsys, "project", tmp_path / "train.zarr", path, "--out", out, "--overwrite")
    assert rc == 5 and "not a rankfold projection" in err
    assert (out / "notes.txt").read_text() == "keep me"


def test_result_from_a_newer_format_is_refused(trained, tmp_path, capsys):
    res, _, path = trained
    meta = os.path.join(res.path, "zarr.json")
    with open(meta) as fh:
        doc = json.load(fh)
    doc["attributes"]["rankfold_format"] = 99
    with open(meta, "w") as fh:
        json.dump(doc, fh)
    out = tmp_path / "p.zarr"
    rc, stdout, err = _run(capsys, "project", res.path, path, "--out", out)
    check_refusal(rc, stdout, err, 5, out, needles=[res.path, "format 99", "upgrade"])


def test_project_cli_in_a_real_process(trained, tmp_path):
    res, _, path = trained
    out = str(tmp_path / "p.zarr")
    proc = subprocess.run([sys.executable, "-m", "rankfold", "project", res.path, path, "--out", out],
                          capture_output=True, text=True, env={**os.environ})
    assert proc.returncode == 0, proc.stderr
    assert "projected 300 sample(s) onto 3 component(s)" in proc.stdout
    group = zarr.open_group(out, mode="r")
    assert group.attrs["rankfold_projection"] == 1
    assert group["scores"].shape == (300, RANK) and group["flagged"].dtype == np.bool_
    assert result_left_behind(out) == [os.path.abspath(out)]

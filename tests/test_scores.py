"""Scores, residuals and flags written by ``decompose`` (issue: scores, projection, residuals).

References are named beside each check: numpy on the in-memory table, facts of the
trade (marked common practice), and Wilson and Hilferty (1931) for the flag rule.
"""

from __future__ import annotations

import os

import numpy as np
import pytest
import zarr

import rankfold
from rankfold.planner import make_plan
from rankfold.sample_outputs import RowWriter, TallProduct, chunk_rows, flag_rule
from rankfold.sources import open_source

from _table_files import result_left_behind

RANK = 3
FORMATS = ["npy-rows", "npy-columns", "zarr-columns", "parquet-file"]
ROUTES = ["memory", "features", "samples", "sketch"]


def _centered(x, standardize=False):
    xc = x - x.mean(axis=0)
    return xc / x.std(axis=0, ddof=1) if standardize else xc


def _numpy_outputs(x, loadings, standardize=False):
    """reference: numpy on the in-memory table -- scores, squared residual norms, fractions."""
    xc = _centered(x, standardize)
    scores = xc @ loadings
    residual = np.sum((xc - scores @ loadings.T) ** 2, axis=1)
    return scores, residual, residual / np.einsum("ij,ij->i", xc, xc)


@pytest.mark.parametrize("fmt", FORMATS)
@pytest.mark.parametrize("route", ROUTES)
def test_stored_scores_and_residuals_match_numpy(planted, write_table, tmp_path, limit_for_blocks, fmt, route):
    path, samples_as = write_table(planted, fmt)
    out = str(tmp_path / "r.zarr")
    limit = (limit_for_blocks(path, route, 4, rank=RANK, samples_as=samples_as, stored=True)
             if route != "sketch" else "64MB")
    res = rankfold.decompose(path, RANK, route=route, samples_as=samples_as, out=out, memory_limit=limit,
                             scores_dtype="float64", standardize=True)
    scores, residual, fraction = _numpy_outputs(planted, res.loadings, standardize=True)
    big = np.abs(scores).max()
    # Sketch scores come from Ritz vectors: as accurate as the loadings, checked to 1e-7 of the largest.
    tol = 1e-9 if route != "sketch" else 1e-7
    np.testing.assert_allclose(res.scores[:], scores, atol=tol * big, rtol=0)
    np.testing.assert_allclose(res.residual[:], residual, atol=tol * big ** 2, rtol=0)
    np.testing.assert_allclose(res.residual_fraction[:], fraction, atol=tol * 10, rtol=0)
    assert result_left_behind(out) == [os.path.abspath(out)]


@pytest.mark.parametrize("route", ["memory", "features", "samples"])
def test_scores_are_uncorrelated_with_the_variances_on_the_diagonal(planted, write_npy, route):
    # common practice: component scores are uncorrelated and their variances are the eigenvalues
    path = write_npy(planted, "rows" if route != "samples" else "columns")
    res = rankfold.decompose(path, RANK, route=route, samples_as="rows" if route != "samples" else "columns")
    cov = np.cov(res.scores, rowvar=False)
    np.testing.assert_allclose(np.diag(cov), res.variance, rtol=1e-10)
    assert np.abs(cov - np.diag(np.diag(cov))).max() < 1e-10 * res.variance[0]


def test_float32_is_the_default_store_dtype(planted, write_npy, tmp_path):
    path = write_npy(planted)
    res = rankfold.decompose(path, RANK, out=str(tmp_path / "r.zarr"))
    assert res.scores.dtype == np.float32 and res.residual.dtype == np.float64
    scores, _, _ = _numpy_outputs(planted, res.loadings)
    # reference: numpy in float64, rounded to float32 (relative 2**-24 per value)
    np.testing.assert_allclose(res.scores[:], scores, rtol=2e-7, atol=1e-6 * np.abs(scores).max())


def test_a_correlated_cloud_is_only_rotated(tmp_path):
    # common practice: with as many components as dimensions, the scores are the centered
    # cloud in rotated axes -- every distance between samples is preserved (numpy's norm).
    rng = np.random.default_rng(3)
    x = rng.multivariate_normal([10.0, -4.0], [[4.0, 3.0], [3.0, 5.0]], size=500)
    path = str(tmp_path / "cloud.npy")
    np.save(path, x)
    for route in ("memory", "features"):
        res = rankfold.decompose(path, 2, route=route)
        pairs = rng.integers(0, 500, size=(2000, 2))
        before = np.linalg.norm(x[pairs[:, 0]] - x[pairs[:, 1]], axis=1)
        after = np.linalg.norm(res.scores[pairs[:, 0]] - res.scores[pairs[:, 1]], axis=1)
        np.testing.assert_allclose(after, before, rtol=1e-12)
        np.testing.assert_allclose(res.loadings.T @ res.loadings, np.eye(2), atol=1e-14)
        # reference: round-off of ||xc||^2 - ||z||^2, a few eps of the largest squared norm
        assert res.residual.max() < 1e-13 * np.einsum("ij,ij->i", x - x.mean(axis=0), x - x.mean(axis=0)).max()


def test_randomized_route_takes_no_extra_pass_and_scratch_equals_memory(make_planted, tmp_path):
    # The last pass keeps Xc Q; under a ceiling a quarter of which cannot hold it, it goes to a
    # scratch Zarr beside the output and is removed afterwards.  Same numbers either way.
    x = make_planted(6000, 40, seed=9)
    path = str(tmp_path / "t.npy")
    np.save(path, x)
    width = RANK + 10
    roomy = rankfold.decompose(path, RANK, route="sketch", out=str(tmp_path / "a.zarr"), memory_limit="64MB",
                               scores_dtype="float64")
    assert TallProduct.bytes_needed(6000, width) > 1_500_000 // 4
    tight = rankfold.decompose(path, RANK, route="sketch", out=str(tmp_path / "b.zarr"), memory_limit=1_500_000,
                               scores_dtype="float64")
    names = [p["name"] for p in tight.attrs["passes"]]
    assert names == ["moments and power iteration", "power iteration", "Rayleigh-Ritz"]
    assert min(p["blocks"] for p in tight.attrs["passes"]) >= 3
    np.testing.assert_allclose(tight.scores[:], roomy.scores[:], rtol=0, atol=1e-9 * np.abs(roomy.scores[:]).max())
    np.testing.assert_array_equal(tight.flagged[:], roomy.flagged[:])
    assert sorted(os.listdir(tmp_path)) == ["a.zarr", "b.zarr", "t.npy"]  # no scratch left


def test_block_size_does_not_change_the_scores(make_planted, tmp_path):
    x = make_planted(3000, 30, seed=2)
    path = str(tmp_path / "t.npy")
    np.save(path, x)
    for route in ("features", "sketch"):
        one = rankfold.decompose(path, RANK, route=route, memory_limit="64MB", seed=4)
        many = rankfold.decompose(path, RANK, route=route, memory_limit=900_000, seed=4)
        assert max(p["blocks"] for p in many.attrs["passes"]) >= 3
        np.testing.assert_allclose(many.scores, one.scores, atol=1e-9 * np.abs(one.scores).max())
        np.testing.assert_allclose(many.residual, one.residual, atol=1e-9 * one.residual.max())


def test_no_scores_writes_no_per_sample_arrays_and_saves_the_pass(planted, write_npy, tmp_path):
    path = write_npy(planted)
    out = str(tmp_path / "r.zarr")
    res = rankfold.decompose(path, RANK, route="features", out=out, scores=False)
    assert [p["name"] for p in res.attrs["passes"]] == ["feature Gram"]
    assert res.scores is None and res.residual is None and res.flagged is None
    assert not {"scores", "residual", "residual_fraction", "flagged"} & set(zarr.open_group(out).array_keys())


def test_row_writer_writes_whole_chunks_only(tmp_path):
    # Blocks of uneven length (as Parquet row groups give) still reach the store in whole chunks.
    n, k = 1000, 2
    arr = zarr.create_array(str(tmp_path / "s.zarr"), shape=(n, k), chunks=(128, k), dtype="float64")
    writes = []

    class Recording:
        shape = arr.shape

        def __setitem__(self, key, value):
            writes.append((key.start, key.stop))
            arr[key] = value

    writer = RowWriter({"s": Recording()}, 128)
    data = np.arange(n * k, dtype=float).reshape(n, k)
    start = 0
    for size in (7, 300, 1, 129, 255, 200, 108):
        writer.write(start, s=data[start:start + size])
        start += size
    writer.close()
    assert start == n
    for a, b in writes:
        assert a % 128 == 0 and (b % 128 == 0 or b == n), (a, b)
    np.testing.assert_array_equal(arr[:], data)
    with pytest.raises(ValueError, match="in order"):
        RowWriter({"s": Recording()}, 128).write(5, s=data[:3])


@pytest.mark.parametrize("df", [1, 4, 50])
def test_flag_rule_false_alarm_rate_is_the_normal_tail(df):
    # reference: Wilson and Hilferty (1931) -- the cube root of a chi-square variable is close to
    # normal, so 3.5 robust standard deviations leave about the normal tail P(Z > 3.5) = 2.3e-4
    # (scipy.stats.norm.sf) whatever the degrees of freedom.
    from scipy.stats import norm

    rng = np.random.default_rng(df)
    residual = rng.chisquare(df, 400_000)
    rule = flag_rule(residual, 3.5)
    rate = rule.flagged / residual.size
    assert norm.sf(3.5) / 3 < rate < norm.sf(3.5) * 3, rate
    residual[:20] = residual.max() * 10  # planted outliers are all flagged
    assert np.all(residual[:20] > flag_rule(residual, 3.5).cutoff)


def test_flag_rule_with_no_spread_flags_nothing():
    rule = flag_rule(np.zeros(100), 3.5)
    assert rule.cutoff == float("inf") and rule.flagged == 0


def test_planner_counts_the_scores(tmp_path):
    from test_planner import SPEED, npy_request  # the planner tests' request model

    with_scores = make_plan(npy_request(1_000_000, 200, 2 << 30, scores=True), SPEED)
    without = make_plan(npy_request(1_000_000, 200, 2 << 30, scores=False), SPEED)
    assert with_scores.route == without.route == "features"
    assert with_scores.estimate.passes == without.estimate.passes + 1
    # a tall table under a small ceiling: the sketch keeps Xc Q on scratch disk, read back once
    req = npy_request(50_000_000, 100_000, 4 << 30, scores=True, route="sketch")
    plan = make_plan(req, SPEED)
    assert plan.estimate.scratch_bytes == TallProduct.bytes_needed(50_000_000, 20)
    assert any("scratch disk" in line for line in plan.lines())
    with pytest.raises(rankfold.MemoryLimitError, match="scratch disk"):
        make_plan(npy_request(50_000_000, 100_000, 4 << 30, scores=True, route="sketch", scratch_free=1 << 20), SPEED)
    # a product small enough for memory stays there serially; on a cluster writing a store the
    # workers fill it on scratch disk (routes/sketch.py), and the plan says so
    small = dict(scores=True, route="sketch")
    assert make_plan(npy_request(1_000_000, 5_000, 4 << 30, **small), SPEED).estimate.scratch_bytes == 0
    clustered = make_plan(npy_request(1_000_000, 5_000, 4 << 30, clustered=True, **small), SPEED)
    assert clustered.estimate.scratch_bytes == TallProduct.bytes_needed(1_000_000, 20)
    held = make_plan(npy_request(1_000_000, 5_000, 4 << 30, clustered=True, outputs_held=True, **small), SPEED)
    assert held.estimate.scratch_bytes == 0  # no store: every row comes to the client anyway


def test_chunks_hold_whole_components(planted, write_npy, tmp_path):
    path = write_npy(planted)
    out = str(tmp_path / "r.zarr")
    rankfold.decompose(path, RANK, out=out)
    group = zarr.open_group(out, mode="r")
    assert group["scores"].chunks == (chunk_rows(planted.shape[0], RANK), RANK)


def test_fleet_demo_late_faults_come_out_on_top(tmp_path):
    # The demo's claim, on a small fleet: the machines given a late fault lead the ranking by
    # flagged records (rankfold.demo.summary.machine_residuals).
    from rankfold.demo.fleet import write_fleet
    from rankfold.demo.summary import machine_residuals

    truth = write_fleet(tmp_path / "fleet", n_machines=12, records_per_machine=1500, n_channels=60,
                        n_drifting=2, row_group_rows=2000, seed=7)
    # Rank 3, the planted modes: in a fleet this small a fault is a large enough share of the
    # variance that spare components (the demo keeps 6 of a 40-machine fleet) would absorb it.
    res = rankfold.decompose(str(tmp_path / "fleet"), 3, standardize=True, columns=list(truth.channel_patterns),
                             id_column="record_id", out=str(tmp_path / "r.zarr"))
    ranked = machine_residuals(res, truth)
    assert {name for name, _, _ in ranked[:2]} == set(truth.drifting_machines)
    assert ranked[1][1] > 5 * max(ranked[2][1], 1)

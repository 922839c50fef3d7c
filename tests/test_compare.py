"""Subset comparison and comparison of two stored results (rankfold.compare).

Outside references, named beside each check: scipy.linalg.subspace_angles for principal
angles; numpy's LAPACK (eigvalsh, norm) for covariance eigenvalues and spectral norms;
scikit-learn's bundled iris and digits data for published variance fractions; the
binomial law of a Bernoulli draw (common practice) for subset sizes.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import numpy as np
import pytest
import scipy.linalg
import scipy.stats

import rankfold
from rankfold.compare.metrics import component_angles, outside_norm, outside_norm_streamed
from rankfold.compare.settings import Setting, parse_settings
from rankfold.compare.subset import draw_subset, materialize, parse_fraction, smallest_fraction
from rankfold.errors import DataError, OutputError, UsageError
from rankfold.sources import open_source


def _parquet(tmp_path, x, name="table", names=None):
    import pyarrow as pa
    import pyarrow.parquet as pq

    names = names or [f"px{j:02d}" for j in range(x.shape[1])]
    path = str(tmp_path / f"{name}.parquet")
    pq.write_table(pa.table({n: x[:, j] for j, n in enumerate(names)}), path, row_group_size=200)
    return path


def _saved(folder) -> dict:
    """The comparison in a report folder's comparison.json (the report module wraps it with its
    format marker and figure names; without that module it is written as is)."""
    saved = json.loads((folder / "comparison.json").read_text())
    return saved["comparison"] if "rankfold_report" in saved else saved


def _assert_saved(folder, comparison):
    assert _saved(folder) == comparison


# ------------------------------------------------------------------ the subset draw


def test_subset_is_reproducible_for_a_seed_and_differs_for_another(write_npy):
    x = np.random.default_rng(0).normal(size=(5000, 12))
    src = open_source(write_npy(x))
    a = draw_subset(src, 0.05, 0.5, seed=11)
    b = draw_subset(src, 0.05, 0.5, seed=11)
    c = draw_subset(src, 0.05, 0.5, seed=12)
    assert np.array_equal(a.rows, b.rows) and np.array_equal(a.features, b.features)
    assert not np.array_equal(a.rows, c.rows)
    assert not np.array_equal(a.features, c.features)
    assert a.features.size == 6 and np.all(np.diff(a.rows) > 0)
    # The drawn rows lie only in the chosen units: the draw reads a fraction of the table.
    starts = np.array([a.units.bounds[i][0] for i in a.chosen_units])
    stops = np.array([a.units.bounds[i][1] for i in a.chosen_units])
    unit_of = np.searchsorted(starts, a.rows, side="right") - 1
    assert np.all(a.rows < stops[unit_of])
    assert a.unit_probability < 1 and len(a.chosen_units) < len(a.units)


def test_subset_size_is_binomial_given_the_chosen_units(write_npy):
    # Common practice: a Bernoulli(q) draw over N rows keeps Binomial(N, q) of them.
    # Given the units chosen in stage 1, the subset size is Binomial(rows in them, q);
    # pooled over independent seeds the counts add up to Binomial(total rows, q).
    src = open_source(write_npy(np.zeros((20000, 2))))
    kept = trials = 0
    draws = [draw_subset(src, 0.05, seed=s) for s in range(200)]
    for d in draws:
        kept += d.rows.size
        trials += d.rows_in_chosen_units
    q = draws[0].row_probability
    assert abs(draws[0].unit_probability * q - 0.05) < 1e-12
    assert scipy.stats.binomtest(kept, trials, q).pvalue > 1e-4
    # And unconditionally every row is kept with probability 0.05: mean size n p.
    sizes = np.array([d.rows.size for d in draws])
    b, s = draws[0].unit_probability, 20000 / len(draws[0].units)
    # Two-stage variance (law of total variance): units x [b s q(1-q) + s^2 q^2 b(1-b)].
    var = len(draws[0].units) * (b * s * q * (1 - q) + s * s * q * q * b * (1 - b))
    assert abs(sizes.mean() - 20000 * 0.05) < 4 * np.sqrt(var / len(sizes))


def test_subset_size_follows_binomial_mean_and_variance_when_every_unit_is_read(write_zarr):
    # Few storage chunks (4 units of 500 rows) -> every unit is read and each row is an
    # independent Bernoulli(p): size ~ Binomial(n, p), mean n p, variance n p (1 - p)
    # (common practice).
    n, p = 2000, 0.1
    src = open_source(write_zarr(np.zeros((n, 3)), chunks=(500, 3)))
    sizes = np.array([draw_subset(src, p, seed=s).rows.size for s in range(400)])
    assert draw_subset(src, p, seed=0).unit_probability == 1.0
    mean, var = n * p, n * p * (1 - p)
    assert abs(sizes.mean() - mean) < 4 * np.sqrt(var / sizes.size)
    # The sample variance of 400 draws has a relative spread of about sqrt(2/399) = 7%.
    assert 0.7 < sizes.var(ddof=1) / var < 1.3


@pytest.mark.parametrize("fmt", ["npy-rows", "zarr-columns", "parquet-file"])
def test_materialized_subset_equals_numpy_selection(write_table, fmt, tmp_path):
    x = np.random.default_rng(1).normal(size=(400, 30))
    path, samples_as = write_table(x, fmt)
    src = open_source(path, samples_as=samples_as)
    draw = draw_subset(src, 0.3, 0.4, seed=5)
    expected = x[draw.rows][:, draw.features]  # reference: numpy fancy indexing
    in_memory = materialize(src, draw, 10**8, str(tmp_path / "s1"))
    assert np.array_equal(in_memory.read("samples", 0, in_memory.n_samples), expected)
    # A ceiling a quarter of which the subset exceeds: written to scratch .npy, in small reads.
    on_disk = materialize(src, draw, 40_000, str(tmp_path / "s2"))
    assert on_disk.path.endswith(os.path.join("s2", "subset.npy"))
    assert np.array_equal(np.load(on_disk.path), expected)
    assert list(on_disk.feature_names) == [src.feature_names[j] for j in draw.features]


# ------------------------------------------------------------------ settings and fractions


def test_settings_syntax():
    got = parse_settings("subspace:p=5,q=3; krylov:q=1;one-pass;subspace:q=3,p=5")
    assert got == [Setting("subspace", 5, 3), Setting("krylov", 10, 1), Setting("one-pass", 10, 0)]
    assert got[0].label == "subspace p=5 q=3" and got[0].passes == 5 and got[2].passes == 1


def test_settings_given_as_objects_or_dicts(tmp_path, iris):
    from rankfold.compare.settings import as_settings

    got = as_settings([Setting("krylov", 1, 2), {"kind": "subspace", "oversample": 1, "power_iterations": 3}])
    assert got == [Setting("krylov", 1, 2), Setting("subspace", 1, 3)]
    c = rankfold.compare_subset(_parquet(tmp_path, iris, "iris"), 2, subset=1.0, settings=got)
    assert [s["label"] for s in c["settings"]] == ["krylov p=1 q=2", "subspace p=1 q=3"]
    with pytest.raises(UsageError, match="settings is empty"):
        as_settings([])


@pytest.mark.parametrize("text, named", [
    ("lanczos:q=2", "'lanczos'"), ("subspace:r=2", "'r=2'"), ("subspace:q=x", "'x'"),
    ("subspace:p=-1", "'-1'"), ("one-pass:q=1", "one-pass"), (" ; ", "no setting")])
def test_settings_refused_with_the_piece_named(text, named):
    with pytest.raises(UsageError, match="settings") as err:
        parse_settings(text)
    assert named in str(err.value)


@pytest.mark.parametrize("value, expected", [("5%", 0.05), ("0.25", 0.25), (1, 1.0), (0.5, 0.5), ("100%", 1.0)])
def test_fraction_parsing(value, expected):
    assert parse_fraction("subset", value) == pytest.approx(expected)


@pytest.mark.parametrize("value", [0, 1.5, "0%", "120%", "abc", -0.1, float("nan"), True, None])
def test_fraction_out_of_range_names_parameter_and_value(value):
    with pytest.raises(UsageError, match=r"subset must be a fraction in \(0, 1\]") as err:
        parse_fraction("subset", value)
    assert repr(value) in str(err.value)


# ------------------------------------------------------------------ metrics


def test_angles_equal_scipy_subspace_angles_for_one_dimensional_subspaces():
    rng = np.random.default_rng(3)
    a, _ = np.linalg.qr(rng.normal(size=(20, 5)))
    b, _ = np.linalg.qr(a + 0.3 * rng.normal(size=(20, 5)))
    b[:, 2] *= -1  # the sign of an axis does not count
    ours = component_angles(a, b)
    # Reference: scipy.linalg.subspace_angles (radians) on each pair of 1-D subspaces.
    theirs = [np.degrees(scipy.linalg.subspace_angles(a[:, [i]], b[:, [i]])[0]) for i in range(5)]
    np.testing.assert_allclose(ours, theirs, atol=1e-6)
    assert component_angles(a, a).max() < 1e-5  # clipped, not NaN, at cosine 1


@pytest.mark.parametrize("n, m", [(200, 30), (40, 300)])
def test_outside_norm_equals_dense_lapack(n, m):
    rng = np.random.default_rng(4)
    y = rng.normal(size=(n, m)) * np.linspace(3, 0.1, m)
    y -= y.mean(axis=0)
    basis, _ = np.linalg.qr(rng.normal(size=(m, 4)))
    c = y.T @ y / (n - 1)
    # Reference: numpy's LAPACK spectral norm of (I - L L^T) C, formed densely.
    expected = np.linalg.norm(c - basis @ (basis.T @ c), 2)
    assert outside_norm(y, basis) == pytest.approx(expected, rel=1e-9)
    assert outside_norm_streamed(lambda v: c @ v, basis, m) == pytest.approx(expected, rel=1e-6)
    # With the exact leading eigenvectors it is the (k+1)-th eigenvalue (numpy eigh).
    w, v = np.linalg.eigh(c)
    assert outside_norm(y, v[:, ::-1][:, :4]) == pytest.approx(w[::-1][4], rel=1e-9)


# ------------------------------------------------------------------ reference data


def test_iris_exact_and_krylov_agree_within_one_degree(tmp_path, iris):
    path = _parquet(tmp_path, iris, "iris")
    c = rankfold.compare_subset(path, 2, subset=1.0, settings="krylov:p=1,q=2;subspace:p=1,q=2",
                                target_angle=1.0)
    assert c["subset"]["samples"] == 150 and c["kind"] == "subset"
    # Widely published covariance eigenvalues of iris (ddof=1), recalled from memory:
    # 4.228, 0.2427 (variance fractions 92.46%, 5.31%).
    np.testing.assert_allclose(c["reference"]["variance"], [4.228, 0.2427], rtol=2e-3)
    np.testing.assert_allclose(c["reference"]["variance_fraction"], [0.9246, 0.0531], atol=5e-4)
    krylov = c["settings"][0]
    assert krylov["meets_target"] and max(krylov["angle_degrees"]) < 1.0
    assert c["recommended"] is not None
    np.testing.assert_allclose(krylov["variance"], c["reference"]["variance"], rtol=1e-6)


def test_digits_exact_and_randomized_agree_with_published_fractions(tmp_path, digits):
    path = _parquet(tmp_path, digits, "digits")
    c = rankfold.compare_subset(path, 3, subset=1.0, settings="subspace:p=10,q=2;krylov:p=10,q=2")
    # Reference: numpy's LAPACK eigenvalues of the sample covariance of the whole table.
    cov = np.cov(digits, rowvar=False)
    w = np.linalg.eigvalsh(cov)[::-1]
    np.testing.assert_allclose(c["reference"]["variance"], w[:3], rtol=1e-9)
    # scikit-learn's digits: first three components explain about 14.9%, 13.6%, 11.8%
    # of the variance (recalled from memory), for the exact and both randomized runs.
    for fractions in [c["reference"]["variance_fraction"]] + [s["variance_fraction"] for s in c["settings"]]:
        np.testing.assert_allclose(np.array(fractions) * 100, [14.9, 13.6, 11.8], atol=0.5)
    for s in c["settings"]:
        assert max(s["angle_degrees"]) < 5 and max(s["eigenvalue_relative_error"]) < 1e-2
        assert min(s["score_correlation"]) > 0.99
        # The error left outside is at least the 4th eigenvalue (it equals it for the exact
        # components), and the a posteriori estimate bounds it (Halko et al. 2011, sec. 4.3).
        assert w[3] * (1 - 1e-9) <= s["true_error"] <= s["error_bound"]
    krylov = c["settings"][1]
    assert max(krylov["angle_degrees"]) < 1.0 and krylov["true_error"] == pytest.approx(w[3], rel=1e-2)
    est = c["full_table_estimate"]
    # The subset is the whole table here, so the planner's passes for the full run must be
    # the passes the recommended setting made (both count reads of the table).
    chosen = next(s for s in c["settings"] if s["label"] == c["recommended"])
    assert est["route"] == "sketch" and est["passes"] == chosen["passes"] and est["peak_memory"] > 0


def test_digits_subset_matches_numpy_on_the_same_rows(tmp_path, digits):
    path = _parquet(tmp_path, digits, "digits")
    c = rankfold.compare_subset(path, 3, subset="30%", settings="krylov:q=2", seed=9)
    draw = draw_subset(open_source(path), 0.3, None, seed=9)
    assert c["subset"] == {"samples": draw.rows.size, "features": 64, "fraction": 0.3, "seed": 9}
    # Reference: numpy LAPACK eigenvalues of the covariance of exactly the drawn rows.
    w = np.linalg.eigvalsh(np.cov(digits[draw.rows], rowvar=False))[::-1]
    np.testing.assert_allclose(c["reference"]["variance"], w[:3], rtol=1e-9)
    assert max(c["settings"][0]["angle_degrees"]) < 5


def test_subset_written_to_scratch_gives_the_same_figures(tmp_path, digits):
    path = _parquet(tmp_path, digits, "digits")
    kw = dict(subset=0.5, settings="subspace:q=2", seed=2)
    in_memory = rankfold.compare_subset(path, 3, **kw)
    out = tmp_path / "report"
    on_disk = rankfold.compare_subset(path, 3, memory_limit=1_000_000, out=str(out), **kw)
    assert on_disk["reference"]["label"] != in_memory["reference"]["label"]  # another exact route
    np.testing.assert_allclose(on_disk["reference"]["variance"], in_memory["reference"]["variance"], rtol=1e-9)
    a, b = on_disk["settings"][0], in_memory["settings"][0]
    np.testing.assert_allclose(a["angle_degrees"], b["angle_degrees"], atol=1e-4)
    assert a["true_error"] == pytest.approx(b["true_error"], rel=1e-6)
    assert sorted(os.listdir(out)) == sorted(set(os.listdir(out)) - {"scratch"})
    _assert_saved(out, on_disk)
    assert not [p for p in os.listdir(tmp_path) if p.startswith(".report")]


# ------------------------------------------------------------------ two stored results


def test_compare_results_of_two_seeds(tmp_path, digits):
    path = _parquet(tmp_path, digits, "digits")
    a = rankfold.decompose(path, 3, route="sketch", seed=1, out=str(tmp_path / "a.zarr"))
    b = rankfold.decompose(path, 3, route="sketch", seed=2, out=str(tmp_path / "b.zarr"))
    c = rankfold.compare_results(a.path, b.path, out=str(tmp_path / "ab"))
    assert c["kind"] == "results" and c["subset"] is None and len(c["settings"]) == 1
    s = c["settings"][0]
    # Both are within a few degrees of the exact axes, so of each other.
    assert max(s["angle_degrees"]) < 8 and 0 < min(s["angle_degrees"])
    # Reference: the relative differences of the stored variances, by numpy.
    np.testing.assert_allclose(s["eigenvalue_relative_error"], np.abs(b.variance - a.variance) / a.variance)
    assert s["error_bound"] == pytest.approx(b.attrs["error_bound"]["spectral_norm"])
    assert s["passes"] == len(b.attrs["passes"]) >= 3  # q = 2 power iterations and a last product
    _assert_saved(tmp_path / "ab", c)


def test_compare_results_of_different_ranks_compares_the_leading_components(tmp_path, digits):
    path = _parquet(tmp_path, digits, "digits")
    a = rankfold.decompose(path, 3, out=str(tmp_path / "a.zarr"))
    b = rankfold.decompose(path, 5, route="features", out=str(tmp_path / "b.zarr"))
    c = rankfold.compare_results(a.path, b.path)
    assert "first 3 components" in c["title"] and len(c["settings"][0]["angle_degrees"]) == 3
    assert max(c["settings"][0]["angle_degrees"]) < 1e-4  # two exact routes
    # Scores are correlated only when both stores hold them (the memory route does, the
    # features route does not until every route writes scores); when present they agree.
    corr = c["settings"][0]["score_correlation"]
    assert corr is None or min(corr) > 0.999999


def test_compare_results_refuses_different_feature_sets(tmp_path, digits):
    names = [f"px{j:02d}" for j in range(64)]
    first = _parquet(tmp_path, digits, "one", names)
    second = _parquet(tmp_path, digits, "two", names[:-1] + ["pixel_extra"])
    a = rankfold.decompose(first, 2, out=str(tmp_path / "a.zarr"))
    b = rankfold.decompose(second, 2, out=str(tmp_path / "b.zarr"))
    with pytest.raises(DataError, match="different feature sets") as err:
        rankfold.compare_results(a.path, b.path, out=str(tmp_path / "r"))
    assert "'px63'" in str(err.value) and "'pixel_extra'" in str(err.value)
    assert not (tmp_path / "r").exists()


def test_compare_results_aligns_reordered_features(tmp_path, digits):
    names = [f"px{j:02d}" for j in range(64)]
    perm = np.random.default_rng(0).permutation(64)
    a = rankfold.decompose(_parquet(tmp_path, digits, "one", names), 3, out=str(tmp_path / "a.zarr"))
    b = rankfold.decompose(_parquet(tmp_path, digits[:, perm], "two", [names[j] for j in perm]), 3,
                           out=str(tmp_path / "b.zarr"))
    c = rankfold.compare_results(a.path, b.path)
    assert max(c["settings"][0]["angle_degrees"]) < 1e-4


# ------------------------------------------------------------------ bad input


def test_subset_too_small_for_the_rank_names_the_smallest_that_fits(tmp_path, digits):
    path = _parquet(tmp_path, digits, "digits")
    with pytest.raises(UsageError, match="too small for rank 5") as err:
        rankfold.compare_subset(path, 5, subset="0.5%", settings="subspace:p=10,q=1", out=str(tmp_path / "r"))
    want = smallest_fraction(1797, 15)
    assert f"smallest subset that fits is {100 * want:.3g}%" in str(err.value)
    assert not (tmp_path / "r").exists()
    c = rankfold.compare_subset(path, 5, subset=want, settings="subspace:p=10,q=1")
    assert c["subset"]["samples"] >= 15


def test_feature_subset_too_small_for_rank_plus_oversampling(tmp_path, digits):
    path = _parquet(tmp_path, digits, "digits")
    with pytest.raises(UsageError, match="feature subset keeps 6 of 64 features") as err:
        rankfold.compare_subset(path, 3, subset=0.5, feature_subset="10%", settings="krylov:p=10")
    assert "--feature-subset 20.4%" in str(err.value)
    c = rankfold.compare_subset(path, 3, subset=0.5, feature_subset="20.4%", settings="krylov:p=10")
    assert c["subset"]["features"] == 13


def test_existing_or_unwritable_report_folder_is_refused(tmp_path, digits):
    path = _parquet(tmp_path, digits, "digits")
    (tmp_path / "taken").mkdir()
    (tmp_path / "taken" / "notes.txt").write_text("mine")
    with pytest.raises(OutputError, match="taken: folder exists and is not empty"):
        rankfold.compare_subset(path, 2, out=str(tmp_path / "taken"))
    # --overwrite replaces only a rankfold report, never a folder of other files
    with pytest.raises(OutputError, match="is not a rankfold report"):
        rankfold.compare_subset(path, 2, out=str(tmp_path / "taken"), overwrite=True)
    assert (tmp_path / "taken" / "notes.txt").read_text() == "mine"
    with pytest.raises(OutputError, match="does not exist"):
        rankfold.compare_subset(path, 2, out=str(tmp_path / "no" / "such" / "r"))


def test_failure_during_the_run_leaves_no_report_folder(tmp_path, digits):
    path = _parquet(tmp_path, digits, "digits")
    # One-pass cannot fill missing values on samples stored as rows: refused by decompose
    # after the exact run and the first setting, in the middle of the comparison.
    with pytest.raises(UsageError, match="one-pass"):
        rankfold.compare_subset(path, 2, subset=0.5, missing="fill-mean", settings="subspace:q=1;one-pass",
                                out=str(tmp_path / "r"))
    assert sorted(os.listdir(tmp_path)) == ["digits.parquet"]


def test_argument_validation_names_parameter():
    with pytest.raises(UsageError, match="target_angle must be a number of degrees in \\(0, 90\\]; got 0"):
        rankfold.compare_subset("unused", 2, target_angle=0)
    with pytest.raises(UsageError, match="feature_subset must be a fraction"):
        rankfold.compare_subset("unused", 2, feature_subset="200%")
    with pytest.raises(UsageError, match="missing must be one of refuse, fill-mean; got 'drop'"):
        rankfold.compare_subset("unused", 2, missing="drop")


# ------------------------------------------------------------------ command line (real subprocesses)


def _cli(*args):
    return subprocess.run([sys.executable, "-m", "rankfold", *map(str, args)], capture_output=True, text=True,
                          timeout=600, env=os.environ.copy())


def test_cli_compare_success_and_failures(tmp_path, digits):
    path = _parquet(tmp_path, digits, "digits")
    out = tmp_path / "report"
    proc = _cli("compare", path, "--rank", 3, "--subset", "40%", "--settings", "subspace:q=0;krylov:q=2",
                "--target-angle", 2, "--out", out)
    assert proc.returncode == 0, proc.stderr
    assert "recommended: krylov p=10 q=2" in proc.stdout
    assert "subspace p=10 q=0" in proc.stdout and str(out) in proc.stdout
    saved = _saved(out)
    assert saved["recommended"] == "krylov p=10 q=2" and saved["target_angle_degrees"] == 2.0
    # The report page and its figures come with the numbers, and the printed path is the page.
    assert f"report: {out / 'index.html'}" in proc.stdout
    assert (out / "figures" / "angles.png").read_bytes().startswith(b"\x89PNG")

    proc = _cli("compare", path, "--rank", 3, "--subset", "0.1%", "--out", tmp_path / "small")
    assert proc.returncode == 2
    assert "too small for rank 3" in proc.stderr and "smallest subset that fits" in proc.stderr
    assert "Traceback" not in proc.stderr and not (tmp_path / "small").exists()

    proc = _cli("compare", path, "--rank", 3, "--settings", "lanczos", "--out", tmp_path / "bad")
    assert proc.returncode == 2 and "unknown method 'lanczos'" in proc.stderr

    proc = _cli("compare", path, "--rank", 3, "--out", out)  # exists
    assert proc.returncode == 5 and f"{out}: folder exists and is not empty" in proc.stderr
    assert "--overwrite" in proc.stderr
    proc = _cli("compare", path, "--rank", 3, "--settings", "krylov:p=10,q=1", "--out", out, "--overwrite")
    assert proc.returncode == 0, proc.stderr
    # the new report replaced the old one whole: only the one setting asked for this time
    assert [e["label"] for e in _saved(out)["settings"]] == ["krylov p=10 q=1"]
    assert not [n for n in os.listdir(tmp_path) if n.startswith(".")]  # no partial or replaced folder left


def test_cli_compare_two_results(tmp_path, digits):
    path = _parquet(tmp_path, digits, "digits")
    for seed in (1, 2):
        rankfold.decompose(path, 2, route="sketch", seed=seed, out=str(tmp_path / f"s{seed}.zarr"))
    proc = _cli("compare", tmp_path / "s1.zarr", tmp_path / "s2.zarr", "--out", tmp_path / "r")
    assert proc.returncode == 0, proc.stderr
    assert "s1.zarr against s2.zarr" in proc.stdout
    proc = _cli("compare", tmp_path / "s1.zarr", path, "--out", tmp_path / "r2")
    assert proc.returncode == 2 and "not a rankfold result" in proc.stderr
    proc = _cli("compare", tmp_path / "s1.zarr", tmp_path / "s2.zarr", "--rank", 2, "--out", tmp_path / "r3")
    assert proc.returncode == 2 and "apply to a subset comparison" in proc.stderr

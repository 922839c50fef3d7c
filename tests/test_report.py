"""Reports: the folder, the page's embedded figures, the numbers behind them, labels, refusals, the CLI,
a comparison, and the page opened in headless Chromium.

Results are real stores written by ``rankfold.decompose`` from Parquet files in ``tmp_path``.
"""

from __future__ import annotations

import base64
import dataclasses
import io
import json
import os
import re
import shutil
import subprocess
import sys

import numpy as np
import pytest

import rankfold
from rankfold.errors import OutputError, SourceError, UsageError
from rankfold.reporting import default_report_folder, write_comparison_report, write_result_report

from _table_files import write_parquet

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # the PNG specification's fixed first eight bytes
IMG = re.compile(r'<img src="data:image/png;base64,([A-Za-z0-9+/=]+)" alt="[^"]*" data-file="([^"]+)"')
N, M, RANK = 400, 10, 4


def _table(seed: int = 7) -> np.ndarray:
    rng = np.random.default_rng(seed)
    spectrum = np.sqrt(50.0 * 0.6 ** np.arange(M))
    return (rng.standard_normal((N, M)) * spectrum) @ np.linalg.qr(rng.standard_normal((M, M)))[0] + 3.0


@pytest.fixture
def source(tmp_path):
    """A Parquet file: ten numeric features, a 3-value 'site' column and a 400-value 'code' column."""
    x = _table()
    cols = {f"f{j}": x[:, j] for j in range(M)}
    cols["site"] = np.array(["north", "south", "east"])[np.arange(N) % 3]
    cols["code"] = np.array([f"s{i:04d}" for i in range(N)])
    return write_parquet(tmp_path / "table.parquet", cols, row_group_size=64), x


@pytest.fixture
def result(source, tmp_path):
    path, _x = source
    return rankfold.decompose(path, RANK, route="memory", exclude=["site", "code"], out=str(tmp_path / "r.zarr"))


def _images(html: str) -> list[tuple[bytes, str]]:
    return [(base64.b64decode(data), name) for data, name in IMG.findall(html)]


def _decode_png(png: bytes) -> np.ndarray:
    import matplotlib.image

    assert png[:8] == PNG_SIGNATURE
    pixels = matplotlib.image.imread(io.BytesIO(png), format="png")
    assert pixels.ndim == 3 and pixels.shape[0] > 100 and pixels.shape[1] > 100
    return pixels


# ---------------------------------------------------------------- the result report


def test_report_folder_has_page_figures_and_numbers(result, tmp_path):
    index = write_result_report(result, tmp_path / "rep", label_column="site")
    folder = tmp_path / "rep"
    assert index == str(folder / "index.html")
    assert sorted(os.listdir(folder)) == ["figures", "index.html", "report.json"]
    assert sorted(os.listdir(folder / "figures")) == ["loadings.png", "residual.png", "scores.png", "scree.png"]
    html = (folder / "index.html").read_text()
    assert "<script" not in html and "http://" not in html and "https://" not in html  # no network
    # every <img> is a data: URI; all of them match the pattern above
    assert html.count("<img ") == len(_images(html)) == 4
    for png, name in _images(html):
        assert png == (folder / name).read_bytes()
        pixels = _decode_png(png)
        assert pixels[..., :3].std() > 0.05  # something is drawn, not a blank canvas
    assert "No residual distribution" not in html and "No scatter" not in html
    assert not list(tmp_path.glob(".rep.partial-*"))


def test_report_numbers_match_the_result(result, source, tmp_path):
    _path, x = source
    write_result_report(result, tmp_path / "rep", top_loadings=4)
    numbers = json.loads((tmp_path / "rep" / "report.json").read_text())
    comps = numbers["components"]
    np.testing.assert_allclose([c["variance_fraction"] for c in comps], result.variance_fraction, rtol=1e-15)
    # reference: numpy.cumsum of the stored fractions
    np.testing.assert_allclose([c["cumulative_fraction"] for c in comps], np.cumsum(result.variance_fraction),
                               rtol=1e-15)
    # reference: LAPACK eigenvalues of numpy.cov of the table itself (syevd via numpy.linalg.eigvalsh)
    cov = np.cov(x, rowvar=False)
    eig = np.linalg.eigvalsh(cov)[::-1][:RANK]
    np.testing.assert_allclose([c["variance"] for c in comps], eig, rtol=1e-10)
    np.testing.assert_allclose([c["variance_fraction"] for c in comps], eig / np.trace(cov), rtol=1e-10)
    # largest loadings: by |value|, decreasing, with the feature names (reference: numpy.argsort)
    for panel in numbers["top_loadings"]:
        column = result.loadings[:, panel["component"] - 1]
        order = np.argsort(-np.abs(column))[:4]
        assert panel["features"] == [f"f{j}" for j in order]
        np.testing.assert_allclose(panel["loadings"], column[order])
    scatter = numbers["scatter"]
    assert scatter["n_points"] == N and not scatter["sampled"]
    np.testing.assert_allclose(scatter["x"], result.scores[:, 0], rtol=1e-6)
    np.testing.assert_allclose(scatter["y"], result.scores[:, 1], rtol=1e-6)
    assert numbers["run"]["route"] == "memory" and numbers["table"]["n_samples"] == N


class _LazyScores:
    """Stands in for a lazily read zarr array and records what is read; reading everything fails."""

    def __init__(self, array):
        self.array, self.shape, self.reads = array, array.shape, []

    def get_orthogonal_selection(self, selection):
        self.reads.append(selection)
        return self.array[selection[0]][:, selection[1]]

    def __getitem__(self, key):
        raise AssertionError(f"the report read scores[{key!r}] instead of only the sampled rows")

    def __array__(self, *args, **kwargs):
        raise AssertionError("the report converted all the scores to an array")


def test_scatter_sample_is_seeded_capped_and_reads_only_its_rows(result, tmp_path):
    def drawn(seed, name, scores=None):
        r = result if scores is None else dataclasses.replace(result, scores=scores)
        write_result_report(r, tmp_path / name, max_points=150, seed=seed)
        return json.loads((tmp_path / name / "report.json").read_text())["scatter"]

    a, b, c = drawn(3, "a"), drawn(3, "b"), drawn(4, "c")
    assert a["rows"] == b["rows"] and a["x"] == b["x"]
    assert a["rows"] != c["rows"]
    rows = np.asarray(a["rows"])
    assert rows.size == a["n_points"] == 150 and a["sampled"] and a["n_samples"] == N
    assert np.all(np.diff(rows) > 0) and rows[0] >= 0 and rows[-1] < N  # sorted, distinct, in range
    np.testing.assert_allclose(a["x"], result.scores[rows, 0], rtol=1e-6)

    lazy = _LazyScores(np.asarray(result.scores))
    d = drawn(3, "d", lazy)
    assert d["rows"] == a["rows"]
    assert len(lazy.reads) == 1 and np.array_equal(lazy.reads[0][0], rows)


def test_scatter_samples_a_real_zarr_store(result, tmp_path):
    import zarr

    scores = zarr.open_array(os.path.join(result.path, "scores"), mode="r")
    write_result_report(dataclasses.replace(result, scores=scores), tmp_path / "z", max_points=50, seed=1)
    scatter = json.loads((tmp_path / "z" / "report.json").read_text())["scatter"]
    rows = np.asarray(scatter["rows"])
    np.testing.assert_allclose(scatter["y"], result.scores[rows, 1], rtol=1e-6)


def test_result_without_scores_leaves_the_scatter_out_with_a_reason(source, tmp_path):
    path, _x = source
    r = rankfold.decompose(path, RANK, route="features", exclude=["site", "code"], scores=False,
                           out=str(tmp_path / "f.zarr"))
    assert r.scores is None and r.residual is None
    write_result_report(rankfold.open_result(r.path), tmp_path / "rep")
    html = (tmp_path / "rep" / "index.html").read_text()
    assert "No scatter: this result holds no scores" in html and "No residual distribution" in html
    assert sorted(os.listdir(tmp_path / "rep" / "figures")) == ["loadings.png", "scree.png"]
    numbers = json.loads((tmp_path / "rep" / "report.json").read_text())
    assert numbers["scatter"] is None and numbers["residual"] is None


def test_residual_histogram_of_a_stored_result(result, tmp_path):
    stored = rankfold.open_result(result.path)  # residuals read lazily from the store
    assert stored.residual is not None and not isinstance(stored.residual, np.ndarray)
    write_result_report(stored, tmp_path / "rep")
    numbers = json.loads((tmp_path / "rep" / "report.json").read_text())["residual"]
    residual = np.asarray(result.residual[:])
    # reference: numpy.histogram of all residuals over the same edges
    np.testing.assert_array_equal(numbers["counts"], np.histogram(residual, bins=np.asarray(numbers["edges"]))[0])
    assert sum(numbers["counts"]) == N == numbers["n_finite"]
    flag = result.attrs["residual_flag"]
    assert numbers["flagged"] == flag["flagged"] == int(np.count_nonzero(result.flagged[:]))
    assert numbers["cutoff"] == pytest.approx(flag["cutoff"]) or not np.isfinite(flag["cutoff"])
    _decode_png((tmp_path / "rep" / "figures" / "residual.png").read_bytes())


def test_residual_histogram_with_outliers_draws_the_cutoff(result, source, tmp_path):
    _path, x = source
    # residual computed here with numpy: squared distance of each centered sample to its projection
    centered = x - x.mean(axis=0)
    v = result.loadings
    residual = ((centered - centered @ v @ v.T) ** 2).sum(axis=1)
    np.testing.assert_allclose(residual, result.residual[:], rtol=1e-8, atol=1e-10)
    residual[:3] *= 400.0  # three clear outliers
    # robust flag, common practice: median + 3 * 1.4826 * MAD (here on the residuals themselves; the
    # store's rule works on their cube roots, and the report only draws the stored cutoff)
    median = np.median(residual)
    mad = np.median(np.abs(residual - median))
    cutoff = median + 3 * 1.4826 * mad
    flagged = residual > cutoff
    attrs = dict(result.attrs, residual_flag={"median": median, "mad": mad, "threshold": 3.0, "cutoff": cutoff,
                                              "flagged": int(flagged.sum()), "rule": "median + 3 x 1.4826 x MAD"})
    write_result_report(dataclasses.replace(result, residual=residual, flagged=flagged, attrs=attrs),
                        tmp_path / "rep")
    numbers = json.loads((tmp_path / "rep" / "report.json").read_text())["residual"]
    assert sum(numbers["counts"]) == N == numbers["n_finite"]
    assert numbers["edges"][0] == pytest.approx(residual.min()) and numbers["edges"][-1] == pytest.approx(residual.max())
    assert numbers["log_x"]  # the outliers put the range over two decades
    assert numbers["flagged"] == int(flagged.sum()) >= 3
    assert numbers["cutoff"] == pytest.approx(cutoff) and numbers["threshold"] == 3.0
    html = (tmp_path / "rep" / "index.html").read_text()
    assert "residual.png" in html and f"{int(flagged.sum())} sample(s) lie above the flag cutoff" in html
    _decode_png((tmp_path / "rep" / "figures" / "residual.png").read_bytes())


# ---------------------------------------------------------------- labels


def test_label_column_colours_the_sampled_rows(result, tmp_path):
    write_result_report(result, tmp_path / "rep", label_column="site", max_points=90, seed=5)
    scatter = json.loads((tmp_path / "rep" / "report.json").read_text())["scatter"]
    expected = np.array(["north", "south", "east"])[np.asarray(scatter["rows"]) % 3]
    assert scatter["labels"] == expected.tolist()
    assert "Colours follow column &#x27;site&#x27;" in (tmp_path / "rep" / "index.html").read_text()


def test_labels_given_directly(result, tmp_path):
    labels = np.where(np.arange(N) < 100, "first hundred", "rest")
    write_result_report(result, tmp_path / "rep", labels=labels)
    scatter = json.loads((tmp_path / "rep" / "report.json").read_text())["scatter"]
    assert scatter["labels"].count("first hundred") == 100
    with pytest.raises(UsageError, match="labels has 5 entries; the result has 400 samples"):
        write_result_report(result, tmp_path / "bad", labels=labels[:5])
    assert not (tmp_path / "bad").exists()


def test_missing_label_column_is_refused_with_available_names(result, tmp_path):
    with pytest.raises(UsageError) as err:
        write_result_report(result, tmp_path / "rep", label_column="sitee")
    msg = str(err.value)
    assert "'sitee' is not in" in msg and "table.parquet" in msg and "'f0'" in msg
    assert not (tmp_path / "rep").exists()


def test_label_column_with_too_many_values_is_refused(result, tmp_path):
    with pytest.raises(UsageError, match=r"'code' has 400 distinct values.*at most 12.*choose a column"):
        write_result_report(result, tmp_path / "rep", label_column="code")
    assert not (tmp_path / "rep").exists()


def test_label_column_needs_a_parquet_source(tmp_path):
    path = str(tmp_path / "t.npy")
    np.save(path, _table())
    r = rankfold.decompose(path, 2, route="memory", out=str(tmp_path / "n.zarr"))
    with pytest.raises(UsageError, match="read from Parquet sources.*labels="):
        write_result_report(r, tmp_path / "rep", label_column="site")


def test_bad_parameters_name_themselves(result, tmp_path):
    with pytest.raises(UsageError, match="max_points must be an integer >= 1, not 0"):
        write_result_report(result, tmp_path / "rep", max_points=0)
    with pytest.raises(UsageError, match="label_column or labels, not both"):
        write_result_report(result, tmp_path / "rep", label_column="site", labels=["a"] * N)


# ---------------------------------------------------------------- the output folder


def test_existing_folder_is_refused_unless_overwrite_and_only_a_report_is_replaced(result, tmp_path):
    folder = tmp_path / "rep"
    folder.mkdir()  # an empty folder is fine
    write_result_report(result, folder)
    with pytest.raises(OutputError, match="exists and is not empty.*--overwrite"):
        write_result_report(result, folder)
    before = (folder / "report.json").stat().st_mtime_ns
    write_result_report(result, folder, overwrite=True, max_points=10)
    assert json.loads((folder / "report.json").read_text())["scatter"]["n_points"] == 10
    assert (folder / "report.json").stat().st_mtime_ns >= before
    data = tmp_path / "data"
    data.mkdir()
    (data / "precious.csv").write_text("1,2\n")
    with pytest.raises(OutputError, match="is not a rankfold report, so --overwrite will not replace it"):
        write_result_report(result, data, overwrite=True)
    assert (data / "precious.csv").read_text() == "1,2\n"
    assert sorted(os.listdir(tmp_path)) == ["data", "r.zarr", "rep", "table.parquet"]


def test_unwritable_folder_is_refused_by_name(result, tmp_path):
    # /proc refuses new entries even to root (a chmod-ed folder would not stop root)
    with pytest.raises(OutputError, match=r"/proc/rankfold-report.*cannot write the report"):
        write_result_report(result, "/proc/rankfold-report")
    with pytest.raises(OutputError, match="does not exist; create it first"):
        write_result_report(result, tmp_path / "no" / "such" / "rep")
    if os.geteuid() != 0:
        locked = tmp_path / "locked"
        locked.mkdir(mode=0o500)
        with pytest.raises(OutputError, match=f"{locked} is not writable"):
            write_result_report(result, locked / "rep")


def test_default_report_folder_sits_beside_the_result():
    assert default_report_folder("runs/sensors-pca.zarr") == "runs/sensors-pca.report"
    assert default_report_folder("runs/sensors-pca.zarr/") == "runs/sensors-pca.report"
    assert default_report_folder("runs/pca") == "runs/pca.report"


# ---------------------------------------------------------------- the command line


def _cli(*args, cwd):
    env = dict(os.environ)
    src = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "src")
    env["PYTHONPATH"] = src + os.pathsep + env.get("PYTHONPATH", "")
    proc = subprocess.run([sys.executable, "-m", "rankfold", *args], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=300)
    return proc.returncode, proc.stdout, proc.stderr


def test_cli_report_writes_beside_the_result_and_refuses_a_second_time(result, tmp_path):
    rc, out, err = _cli("report", "r.zarr", "--label-column", "site", cwd=tmp_path)
    assert rc == 0, err
    assert out.strip() == str(tmp_path / "r.report" / "index.html")
    assert (tmp_path / "r.report" / "figures" / "scores.png").is_file()
    rc, out, err = _cli("report", "r.zarr", cwd=tmp_path)
    assert rc == 5 and "r.report: folder exists and is not empty" in err and "Traceback" not in err
    rc, out, err = _cli("report", "r.zarr", "--overwrite", "--label-column", "nope", cwd=tmp_path)
    assert rc == 2 and "label column 'nope' is not in" in err and "Traceback" not in err
    rc, out, err = _cli("report", "table.parquet", "--out", "x", cwd=tmp_path)
    assert rc == 5 and "no such result folder" in err
    assert not (tmp_path / "x").exists()


# ---------------------------------------------------------------- a comparison


@pytest.fixture
def comparison(source, tmp_path):
    """A comparison dict as the compare command produces it, from real decompositions of the table:
    the exact memory route as reference, and the randomized route at three power-iteration counts."""
    import scipy.linalg

    path, x = source
    cov = np.cov(x, rowvar=False)
    exact = rankfold.decompose(path, RANK, route="memory", exclude=["site", "code"])
    settings = []
    for q in (0, 1, 3):
        r = rankfold.decompose(path, RANK, route="sketch", power_iterations=q, oversample=2, seed=1,
                               exclude=["site", "code"])
        # angle per component against the exact axis (reference: scipy.linalg.subspace_angles)
        angles = [float(np.degrees(scipy.linalg.subspace_angles(exact.loadings[:, [j]], r.loadings[:, [j]])[0]))
                  for j in range(RANK)]
        rel = (r.variance - exact.variance) / exact.variance
        # true error: spectral norm of the covariance outside the returned axes (numpy.linalg.norm, ord=2)
        outside = np.eye(M) - r.loadings @ r.loadings.T
        settings.append({
            "label": f"subspace q={q}", "params": {"power_iterations": q, "oversample": 2},
            "variance": r.variance.tolist(), "variance_fraction": r.variance_fraction.tolist(),
            "eigenvalue_relative_error": rel.tolist(), "angle_degrees": angles,
            "score_correlation": None, "seconds": float(r.attrs["seconds"]), "passes": len(r.attrs["passes"]),
            "error_bound": float(r.attrs["error_bound"]["spectral_norm"]), "true_error": float(np.linalg.norm(outside @ cov @ outside, 2)),
            "meets_target": bool(max(angles) < 1.0)})
    recommended = next((s["label"] for s in settings if s["meets_target"]), None)
    return {
        "kind": "subset", "title": "Randomized against exact on a 40% subset", "source": path,
        "subset": {"samples": N, "features": M, "fraction": 0.4, "seed": 0},
        "reference": {"label": "exact (memory)", "variance": exact.variance.tolist(),
                      "variance_fraction": exact.variance_fraction.tolist(),
                      "seconds": float(exact.attrs["seconds"]), "passes": len(exact.attrs["passes"])},
        "settings": settings, "target_angle_degrees": 1.0, "recommended": recommended,
        "full_table_estimate": {"route": "sketch", "seconds": 5400.0, "peak_memory": 2 * 1024**3, "passes": 4},
    }


def test_comparison_report(comparison, result, tmp_path):
    assert comparison["recommended"] == "subspace q=3"  # the first setting with every angle under 1 degree
    index = write_comparison_report(comparison, tmp_path / "cmp", result_a=result)
    folder = tmp_path / "cmp"
    assert sorted(os.listdir(folder / "figures")) == ["angles.png", "scree.png", "variance_error.png"]
    html = (folder / "index.html").read_text()
    assert index == str(folder / "index.html")
    images = _images(html)
    assert len(images) == html.count("<img ") == 3
    for png, name in images:
        assert png == (folder / name).read_bytes()
        _decode_png(png)
    stored = json.loads((folder / "comparison.json").read_text())
    assert stored["comparison"] == json.loads(json.dumps(comparison))  # the numbers round-trip unchanged
    chosen = re.findall(r'<tr class="chosen"><td>([^<]*)</td>', html)
    assert chosen == ["subspace q=3 (recommended)"]
    assert "about 90 min in 4 pass(es)" in html and "2.1 GB of memory" in html
    assert "40.00% of the samples, seed 0" in html


def test_comparison_with_a_wrong_shape_is_refused(comparison, tmp_path):
    comparison["settings"][1]["angle_degrees"] = comparison["settings"][1]["angle_degrees"][:2]
    with pytest.raises(UsageError, match=r"setting 1 \(subspace q=1\) has 2 angle_degrees value\(s\); the reference has 4"):
        write_comparison_report(comparison, tmp_path / "cmp")
    comparison["settings"][1]["angle_degrees"] += [0.1, 0.1]
    comparison["recommended"] = "nonexistent"
    with pytest.raises(UsageError, match="recommended setting 'nonexistent' is not among the settings"):
        write_comparison_report(comparison, tmp_path / "cmp")
    assert not (tmp_path / "cmp").exists()


# ---------------------------------------------------------------- headless Chromium

CHROMIUM_NAMES = ("chromium", "chromium-browser", "chromium-headless-shell", "headless_shell",
                  "chrome-headless-shell", "google-chrome", "google-chrome-stable", "chrome")

# Appended to a copy of the page for the check only (the report itself carries no script): once the page
# has loaded, write how many images there are and how many decoded to a non-zero size.
_CHECK = """<pre id="image-check"></pre><script>
window.addEventListener("load", function () {
  var imgs = Array.from(document.images);
  var ok = imgs.filter(function (i) { return i.complete && i.naturalWidth > 0; }).length;
  document.getElementById("image-check").textContent = "images " + imgs.length + " loaded " + ok;
});
</script></body>"""


def _chromium_counts(binary: str, page) -> tuple[int, int]:
    proc = subprocess.run([binary, "--headless", "--no-sandbox", "--disable-gpu", "--virtual-time-budget=10000",
                           "--dump-dom", page.as_uri()], capture_output=True, text=True, timeout=120)
    found = re.search(r"images (\d+) loaded (\d+)", proc.stdout)
    assert found, f"Chromium printed no check line (exit {proc.returncode}); stderr tail: {proc.stderr[-500:]}"
    return int(found.group(1)), int(found.group(2))


def test_page_opens_in_headless_chromium_with_every_figure(result, comparison, tmp_path):
    binary = next((shutil.which(n) for n in CHROMIUM_NAMES if shutil.which(n)), None)
    if binary is None:
        pytest.skip("no Chromium on this machine")
    write_result_report(result, tmp_path / "rep", label_column="site")
    write_comparison_report(comparison, tmp_path / "cmp")
    for folder, expected in (("rep", 4), ("cmp", 3)):
        html = (tmp_path / folder / "index.html").read_text()
        page = tmp_path / f"{folder}-check.html"
        page.write_text(html.replace("</body>", _CHECK))
        assert _chromium_counts(binary, page) == (expected, expected)
    # the check can fail: a page with one corrupt image reports it as not loaded
    broken = tmp_path / "broken-check.html"
    broken.write_text(html.replace("</body>", '<img src="data:image/png;base64,iVBORw0KGgoAAAA=">' + _CHECK))
    assert _chromium_counts(binary, broken) == (expected + 1, expected)


# ---------------------------------------------------------------- the demo


def test_demo_writes_a_report_per_scenario_coloured_by_the_planted_groups(tmp_path):
    from rankfold.demo import read_panel_truth, run_demo

    lines = run_demo(tmp_path, scale=0.01)
    pages = [line.split()[1] for line in lines if line.strip().startswith("report ")]
    assert pages == [str(tmp_path / "panel-result.report" / "index.html"),
                     str(tmp_path / "fleet-result.report" / "index.html")]
    assert all(os.path.isfile(p) for p in pages)
    panel = json.loads((tmp_path / "panel-result.report" / "report.json").read_text())
    assert (panel["scatter"] is None) == (rankfold.open_result(str(tmp_path / "panel-result.zarr")).scores is None)
    if panel["scatter"] is not None:  # the panel's route keeps scores: colours are the founder groups
        truth = read_panel_truth(tmp_path / "panel.zarr")
        groups = set(panel["scatter"]["labels"])
        assert {f"founder {c}" for c in "ABCDE"[: truth.n_founders]} <= groups
        assert groups <= {f"founder {c}" for c in "ABCDE"} | {"cross of two founders"}
    fleet = json.loads((tmp_path / "fleet-result.report" / "report.json").read_text())
    assert (fleet["scatter"] is None) == (rankfold.open_result(str(tmp_path / "fleet-result.zarr")).scores is None)
    if fleet["scatter"] is not None:
        assert set(fleet["scatter"]["labels"]) <= {"steady machine", "faulty machine, before its fault",
                                                   "after fault onset"}


def test_comparison_of_two_stored_results(comparison, result, tmp_path):
    two = dict(comparison, kind="results", title="Two stored results", subset=None, full_table_estimate=None,
               settings=comparison["settings"][2:], recommended=None)
    two["settings"][0]["meets_target"] = True
    write_comparison_report(two, tmp_path / "cmp", result_a=result, result_b=result)
    html = (tmp_path / "cmp" / "index.html").read_text()
    assert "result B" in html and "subset" not in html.split("</header>")[0].split("<dl")[1]
    assert "No setting kept every component within 1 degrees" in html and 'class="chosen"' not in html
    assert "The full table" not in html
    assert json.loads((tmp_path / "cmp" / "comparison.json").read_text())["comparison"]["kind"] == "results"


def test_label_column_across_a_folder_of_parquet_files(write_parquet_folder, tmp_path):
    x = _table()
    groups = np.array(["g0", "g1", "g2", "g3"])[(np.arange(N) // 7) % 4]
    folder = write_parquet_folder(x, files=3, row_group_size=30, ids=groups, id_column="grp")
    r = rankfold.decompose(folder, 3, route="memory", exclude=["grp"], out=str(tmp_path / "d.zarr"))
    write_result_report(r, tmp_path / "rep", label_column="grp", max_points=120, seed=9)
    scatter = json.loads((tmp_path / "rep" / "report.json").read_text())["scatter"]
    assert scatter["labels"] == groups[np.asarray(scatter["rows"])].tolist()

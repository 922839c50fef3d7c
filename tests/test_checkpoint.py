"""Checkpoints in one process: states round-trip, a run stopped in any pass resumes to the same bits.

A crash is simulated by a progress callback that raises after block ``k`` of
pass ``p`` (the checkpoint of that block is already on disk, as it would be
before a SIGKILL at that moment); the real-process kills are in
``test_resume.py``.  The reference for "the same result" is the same call run
without interruption: the promise is bit-for-bit equality (``np.array_equal``),
not closeness.
"""

from __future__ import annotations

import io
import json
import os

import numpy as np
import pytest

import rankfold
from rankfold.checkpoint import Checkpointer, checkpoint_folder
from rankfold.cli import main
from rankfold.errors import CheckpointError, UsageError
from rankfold.folds import (ColumnMoments, ColumnScores, CovarianceProduct, FeatureGram, FeatureProjection,
                            GramProduct, SampleGram, StreamingSketch)

from _ceilings import ceiling_for
from _table_files import write_zarr

ARRAYS = ("loadings", "variance", "variance_fraction", "center", "scale", "scores", "residual",
          "residual_fraction", "flagged")


# ------------------------------------------------------------------ every state round-trips


def _states(rng):
    m, n = 6, 9
    basis = rng.standard_normal((m, 4))
    center, scale = rng.standard_normal(m), rng.random(m) + 0.5
    sample_basis = rng.standard_normal((n, 3))
    return [
        (FeatureGram(m), "samples"),
        (ColumnMoments(m), "samples"),
        (CovarianceProduct(basis, center, scale), "samples"),
        (StreamingSketch(basis), "samples"),
        (SampleGram(n, m, True), "features"),
        (GramProduct(sample_basis, m, False), "features"),
        (FeatureProjection(sample_basis, center, scale), "features"),
        (ColumnScores(basis, center, scale, n), "features"),
    ]


@pytest.mark.parametrize("which", range(8))
def test_every_state_round_trips_and_continues_to_the_same_bits(which):
    """Serialize mid-fold, rebuild, fold the rest: identical to folding without the detour.

    Covers integer counters (FeatureGram.count, ColumnMoments.count), booleans
    (standardize, seen) and the bases and centers the product states carry.
    """
    rng = np.random.default_rng(which)
    table = rng.standard_normal((9, 6)) * 3 + 100
    table[2, 1] = np.nan if which in (1, 2) else table[2, 1]  # states that skip missing values
    state, axis = _states(np.random.default_rng(100))[which]
    twin, _ = _states(np.random.default_rng(100))[which]
    data = table if axis == "samples" else np.ascontiguousarray(table.T)
    halves = [(0, data[:4]), (4, data[4:])]
    for s in (state, twin):
        s.update(halves[0][1].copy(), halves[0][0])
    back = type(twin).from_bytes(twin.to_bytes())
    streamed = io.BytesIO()
    twin.write_to(streamed)  # what checkpoints write, straight into the file
    again = type(twin).from_bytes(streamed.getvalue())
    for name in state._fields:
        assert np.array_equal(np.asarray(getattr(again, name)), np.asarray(getattr(back, name))), name
    for name in state._fields:
        a, b = getattr(state, name), getattr(back, name)
        assert type(a) is type(b), (name, type(a), type(b))  # an int counter stays an int, not a float
        assert np.asarray(a).dtype == np.asarray(b).dtype, name
        assert np.array_equal(np.asarray(a), np.asarray(b)), name
    state.update(halves[1][1].copy(), halves[1][0])
    back.update(halves[1][1].copy(), halves[1][0])
    for name in state._fields:
        assert np.array_equal(np.asarray(getattr(state, name)), np.asarray(getattr(back, name)),
                              equal_nan=True), name


# ------------------------------------------------------------------ tables and runs


@pytest.fixture(scope="module")
def tables(tmp_path_factory):
    base = tmp_path_factory.mktemp("tables")
    rng = np.random.default_rng(20261202)
    rows = rng.standard_normal((3000, 12)) @ rng.standard_normal((12, 12)) + 5
    rows[rng.random(rows.shape) < 0.002] = np.nan
    cols = rng.standard_normal((400, 60)) + np.linspace(0, 3, 60)  # 400 features x 60 samples
    clean = rng.standard_normal((3000, 20)) @ rng.standard_normal((20, 20)) + 50
    return {"rows": write_zarr(base / "rows.zarr", rows, (100, 12)),
            "clean": write_zarr(base / "clean.zarr", clean, (100, 20)),
            "cols": write_zarr(base / "cols.zarr", cols, (10, 60))}


# name -> (table, decompose keywords, block size in samples or features): the memory limit is
# set from the block size (_ceilings.ceiling_for), so every pass has several blocks.
CONFIGS = {
    "features": ("rows", dict(route="features", missing="fill-mean"), 150),
    "samples": ("cols", dict(route="samples", samples_as="columns"), 20),
    "sketch-rows": ("rows", dict(route="sketch", missing="fill-mean", power_iterations=1, oversample=3), 150),
    "fused-rows": ("clean", dict(route="sketch", power_iterations=2, oversample=3), 150),
    "krylov-cols": ("cols", dict(route="sketch", sketch="krylov", standardize=True, samples_as="columns",
                                 power_iterations=1, oversample=2), 20),
    "sketch-cols": ("cols", dict(route="sketch", samples_as="columns", power_iterations=1), 20),
    "one-pass-cols": ("cols", dict(route="sketch", sketch="one-pass", samples_as="columns"), 20),
}


@pytest.fixture(scope="module")
def options(tables):
    """name -> (table path, decompose keywords with the memory limit)."""
    out = {}
    for name, (table, kw, units) in CONFIGS.items():
        out[name] = (tables[table], {**kw, "memory_limit": ceiling_for(tables[table], units, **kw)})
    return out


class Crash(Exception):
    """Stands in for the process dying."""


def crash_at(pass_name: str, block: int):
    """A progress callback that "dies" after ``block`` of the pass named ``pass_name``.

    Passes restored whole from a checkpoint report no progress, so passes are
    told apart by name (distinct within every configuration here).
    """
    def progress(event):
        if event["pass"] == pass_name and event["block"] == block:
            raise Crash(f"{pass_name} block {block}")
    return progress


def assert_same_result(a, b):
    for name in ARRAYS:
        x, y = getattr(a, name), getattr(b, name)
        assert (x is None) == (y is None), name
        if x is not None:
            assert np.array_equal(x[:], y[:]), name
    assert a.attrs["route"] == b.attrs["route"]
    assert [p["blocks"] for p in a.attrs["passes"]] == [p["blocks"] for p in b.attrs["passes"]]


@pytest.fixture(scope="module")
def references(options, tmp_path_factory):
    """Each configuration run once, uninterrupted, with no checkpoint at all."""
    base = tmp_path_factory.mktemp("reference")
    return {name: rankfold.decompose(path, 3, out=base / f"{name}.zarr", **kw)
            for name, (path, kw) in options.items()}


@pytest.mark.parametrize("name", list(CONFIGS))
def test_a_run_stopped_in_any_pass_resumes_to_the_same_bits(name, options, references, tmp_path):
    path, kw = options[name]
    n_passes = len(references[name].attrs["passes"])
    blocks = [p["blocks"] for p in references[name].attrs["passes"]]
    names = [p["name"] for p in references[name].attrs["passes"]]
    assert len(set(names)) == n_passes and min(blocks) >= 3
    out = tmp_path / "r.zarr"
    rng = np.random.default_rng(len(name))
    for p in range(1, n_passes + 1):
        block = int(rng.integers(1, blocks[p - 1]))  # never the last block: that is a pass boundary
        messages = []
        with pytest.raises(Crash):
            rankfold.decompose(path, 3, out=out, checkpoint_every=0, progress=crash_at(names[p - 1], block),
                               on_resume=messages.append, **kw)
        assert not os.path.exists(out)
        manifest = json.load(open(os.path.join(checkpoint_folder(out), "manifest.json")))
        saved = [e["name"] for e in manifest["passes"]]
        if p > 1 and names[p - 2] in saved:  # the earlier passes came from the checkpoint, not from reading
            assert messages and f"of {n_passes}" in messages[0]
        if names[p - 1] in saved:
            current = manifest["passes"][p - 1]
            assert (current["blocks_done"], current["complete"]) == (block, False)
        else:
            # A pass that sends rows outside its state (the scores pass, the randomized route's
            # captured product) is read again whole: the checkpoint keeps the passes before it.
            assert saved == names[:len(saved)] and len(saved) < p
    messages, events = [], []
    res = rankfold.decompose(path, 3, out=out, checkpoint_every=0, on_resume=messages.append,
                             progress=events.append, **kw)
    # Restored passes report nothing; the live ones are numbered by the route's own count
    # (what the progress bar shows as "pass i of n").
    assert [e["pass_index"] for e in events] == [names.index(e["pass"]) + 1 for e in events]
    last = references[name].attrs["passes"][-1]["name"]
    if last in saved:
        assert messages == [f"resuming from the checkpoint in {checkpoint_folder(out)}: pass {n_passes} of "
                            f"{n_passes} ({last}), block {block + 1:,} of {blocks[-1]:,}"]
    assert_same_result(res, references[name])
    assert not os.path.exists(checkpoint_folder(out))  # removed once the result is complete
    parent = os.path.dirname(os.path.abspath(out))
    assert sorted(os.listdir(parent)) == ["r.zarr"]  # nor a partial store or scratch folder
    # The resumed pass read only the blocks after the checkpoint; the record adds them up.
    assert res.attrs["passes"][-1]["bytes_read"] == references[name].attrs["passes"][-1]["bytes_read"]


def test_with_a_long_interval_only_pass_boundaries_are_saved(options, references, tmp_path):
    path, kw = options["sketch-cols"]
    out = tmp_path / "r.zarr"
    with pytest.raises(Crash):
        rankfold.decompose(path, 3, out=out, checkpoint_every=1e9, progress=crash_at("Rayleigh-Ritz", 2), **kw)
    manifest = json.load(open(os.path.join(checkpoint_folder(out), "manifest.json")))
    # Pass 1 saved at its end; nothing of pass 2 (the interval never came round).
    blocks = references["sketch-cols"].attrs["passes"][0]["blocks"]
    assert [(p["complete"], p["blocks_done"]) for p in manifest["passes"]] == [(True, blocks)]
    messages = []
    res = rankfold.decompose(path, 3, out=out, on_resume=messages.append, **kw)
    assert "1 of 3 passes done; starting pass 2 of 3" in messages[0]
    assert_same_result(res, references["sketch-cols"])


def test_the_memory_route_has_no_passes_to_save(tables, tmp_path):
    out = tmp_path / "r.zarr"
    res = rankfold.decompose(tables["rows"], 3, out=out, route="memory", missing="fill-mean", checkpoint_every=0)
    assert res.route == "memory"
    assert sorted(os.listdir(tmp_path)) == ["r.zarr"]


# ------------------------------------------------------------------ refusals


def _stopped(options, out):
    path, kw = options["features"]
    with pytest.raises(Crash):
        rankfold.decompose(path, 3, out=out, checkpoint_every=0, progress=crash_at("column means", 5), **kw)


def test_changed_parameters_are_refused_with_what_changed(options, tmp_path):
    out = tmp_path / "r.zarr"
    _stopped(options, out)
    path, kw = options["features"]
    with pytest.raises(CheckpointError) as err:
        rankfold.decompose(path, 4, out=out, **{**kw, "standardize": True})
    msg = str(err.value)
    assert checkpoint_folder(out) in msg
    assert "rank 3 -> 4" in msg and "standardize false -> true" in msg and "--restart" in msg
    assert err.value.exit_code == 6
    # A changed memory limit would cut other blocks: refused too.
    with pytest.raises(CheckpointError, match=f"memory_limit {kw['memory_limit']} -> {kw['memory_limit'] + 1}"):
        rankfold.decompose(path, 3, out=out, **{**kw, "memory_limit": kw["memory_limit"] + 1})
    assert os.path.isdir(checkpoint_folder(out))  # a refusal keeps the checkpoint


def test_a_changed_source_is_refused_and_restart_discards(tables, tmp_path):
    rng = np.random.default_rng(5)
    rows = rng.standard_normal((3000, 12)) + 5
    path = write_zarr(tmp_path / "t.zarr", rows, (100, 12))
    out = tmp_path / "r.zarr"
    kw = dict(route="features", scores=False)
    kw["memory_limit"] = ceiling_for(path, 150, **kw)
    with pytest.raises(Crash):
        rankfold.decompose(path, 3, out=out, checkpoint_every=0, progress=crash_at("feature Gram", 7), **kw)
    import zarr

    rows[0, 0] += 1.0
    zarr.open_array(path, mode="r+")[0, 0] = rows[0, 0]  # one chunk rewritten in place
    with pytest.raises(CheckpointError, match="source's files changed"):
        rankfold.decompose(path, 3, out=out, **kw)
    messages = []
    res = rankfold.decompose(path, 3, out=out, restart=True, on_resume=messages.append, **kw)
    assert messages == []  # started over
    reference = np.linalg.eigh(np.cov(rows, rowvar=False))[0][::-1][:3]  # LAPACK via numpy
    np.testing.assert_allclose(res.variance, reference, rtol=1e-10)
    assert not os.path.exists(checkpoint_folder(out))


def test_the_cli_refuses_with_exit_code_6_and_resumes_with_a_message(options, references, tmp_path, capsys):
    out = tmp_path / "r.zarr"
    _stopped(options, out)
    path, kw = options["features"]
    blocks = references["features"].attrs["passes"][0]["blocks"]
    argv = ["decompose", path, "--out", str(out), "--route", "features", "--missing", "fill-mean",
            "--memory-limit", str(kw["memory_limit"]), "--checkpoint-every", "0"]
    assert main(argv + ["--rank", "2"]) == 6
    err = capsys.readouterr().err
    assert "rank 3 -> 2" in err and "Traceback" not in err
    assert main(argv + ["--rank", "3"]) == 0
    err = capsys.readouterr().err
    assert "resuming from the checkpoint" in err and f"pass 1 of 3 (column means), block 6 of {blocks}" in err
    assert not os.path.exists(checkpoint_folder(out))
    assert_same_result(rankfold.open_result(str(out)), references["features"])


def test_a_checkpoint_in_use_is_refused(tmp_path):
    out = str(tmp_path / "r.zarr")
    first = Checkpointer.open(out, {"rank": 1}, {"path": "x"})
    try:
        with pytest.raises(CheckpointError, match="another rankfold run"):
            Checkpointer.open(out, {"rank": 1}, {"path": "x"})
    finally:
        first.close()


def test_a_damaged_state_file_is_named(options, tmp_path):
    out = tmp_path / "r.zarr"
    _stopped(options, out)
    folder = checkpoint_folder(out)
    (state,) = [f for f in os.listdir(folder) if f.endswith(".state")]
    with open(os.path.join(folder, state), "r+b") as fh:
        fh.truncate(100)
    path, kw = options["features"]
    with pytest.raises(CheckpointError, match=state):
        rankfold.decompose(path, 3, out=out, **kw)


def test_checkpoint_interval_is_validated(tables, tmp_path):
    with pytest.raises(UsageError, match="checkpoint_every"):
        rankfold.decompose(tables["rows"], 3, out=tmp_path / "r.zarr", checkpoint_every=-1)
    assert os.listdir(tmp_path) == []

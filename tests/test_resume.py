"""Fault tests with real processes: SIGKILL, SIGINT and SIGTERM mid-pass, and a full disk.

Each test starts ``python -m rankfold decompose`` as a subprocess on Zarr
tables in ``tmp_path``, with a small ``--memory-limit`` (tens to hundreds of
blocks per pass) and ``--checkpoint-every 0`` (a checkpoint after every
block).  The moment of each kill is chosen by a seeded generator as a block
number of a given pass, and found by watching the checkpoint's manifest, so
the kill lands inside that pass whatever the machine's speed (no blind
sleeps).  After the kills, the same command is run again until it completes;
its arrays must equal those of an uninterrupted run bit for bit
(``np.array_equal``), and no checkpoint folder or partial store may remain.

Kills exercised (SIGKILL): features route with fill-mean, 2 passes, 2 kills;
sample-Gram route on samples stored as columns, 2 passes, 2 kills; randomized
subspace iteration on rows, 3 passes, 3 kills; on columns, 3 passes, 3 kills;
the in-memory route, 1 kill during its single load (it restarts).  11 in all.
Then SIGINT and SIGTERM (exit 130, message saying how to resume), and a file
system refusing writes (RLIMIT_FSIZE: EFBIG, as a full disk gives ENOSPC)
during the result write and during a checkpoint write.
"""

from __future__ import annotations

import json
import os
import resource
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

import rankfold
from rankfold.checkpoint import checkpoint_folder

from _table_files import write_zarr

pytestmark = pytest.mark.slow

ARRAYS = ("loadings", "variance", "variance_fraction", "center", "scale", "scores")
SEED = 20261202
POLL = 0.002  # seconds between looks at the manifest; a block takes several times longer


@pytest.fixture(scope="module")
def tables(tmp_path_factory):
    base = tmp_path_factory.mktemp("tables")
    rng = np.random.default_rng(SEED)
    rows = rng.standard_normal((24000, 40)) @ rng.standard_normal((40, 40)) + 10
    rows[rng.random(rows.shape) < 0.001] = np.nan
    cols = rng.standard_normal((2400, 300)) + np.linspace(0, 2, 300)  # 2,400 features x 300 samples
    return {"rows": write_zarr(base / "rows.zarr", rows, (500, 40)),
            "cols": write_zarr(base / "cols.zarr", cols, (20, 300))}


# name -> (table, CLI options, decompose keywords): the same run both ways.
CONFIGS = {
    "features": ("rows", ["--route", "features", "--missing", "fill-mean", "--memory-limit", "1.2MB"],
                 dict(route="features", missing="fill-mean", memory_limit="1.2MB")),
    "samples": ("cols", ["--route", "samples", "--samples-as", "columns", "--memory-limit", "3.5MB"],
                dict(route="samples", samples_as="columns", memory_limit="3.5MB")),
    "sketch-rows": ("rows", ["--route", "sketch", "--missing", "fill-mean", "--power-iterations", "1",
                             "--memory-limit", "1.2MB"],
                    dict(route="sketch", missing="fill-mean", power_iterations=1, memory_limit="1.2MB")),
    "sketch-cols": ("cols", ["--route", "sketch", "--samples-as", "columns", "--power-iterations", "1",
                             "--memory-limit", "1.5MB"],
                    dict(route="sketch", samples_as="columns", power_iterations=1, memory_limit="1.5MB")),
    "memory": ("rows", ["--route", "memory", "--missing", "fill-mean", "--memory-limit", "64MB"],
               dict(route="memory", missing="fill-mean", memory_limit="64MB")),
}


@pytest.fixture(scope="module")
def references(tables, tmp_path_factory):
    """Each configuration run once in this process, uninterrupted and without checkpoints."""
    base = tmp_path_factory.mktemp("reference")
    return {name: rankfold.decompose(tables[table], 3, out=base / f"{name}.zarr", **kw)
            for name, (table, _, kw) in CONFIGS.items()}


def command(tables, name, out) -> list[str]:
    table, options, _ = CONFIGS[name]
    return [sys.executable, "-m", "rankfold", "decompose", tables[table], "--rank", "3", "--out", str(out),
            "--checkpoint-every", "0", *options]


def read_manifest(out) -> dict | None:
    try:
        with open(os.path.join(checkpoint_folder(out), "manifest.json")) as fh:
            return json.load(fh)
    except (OSError, ValueError):
        return None  # not written yet (a manifest is replaced whole, never seen half-written)


def run_until(argv, out, reached, sig=signal.SIGKILL, delay=0.0, preexec_fn=None):
    """Start ``argv``; when ``reached(manifest)`` holds, wait ``delay`` s and send ``sig``.

    Returns (exit code, stderr).  Fails the test if the process ends first.
    """
    proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            preexec_fn=preexec_fn)
    try:
        while proc.poll() is None:
            manifest = read_manifest(out)
            if manifest is not None and reached(manifest):
                time.sleep(delay)
                proc.send_signal(sig)
                break
            time.sleep(POLL)
        _, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode != 0, f"the run finished before the moment chosen to stop it:\n{err}"
    return proc.returncode, err


def in_pass(ordinal: int, block: int):
    """Reached once pass ``ordinal`` has saved at least ``block`` blocks."""
    def reached(manifest):
        passes = manifest["passes"]
        return len(passes) >= ordinal and passes[ordinal - 1]["blocks_done"] >= block
    return reached


def assert_checkpoint_consistent(out) -> dict:
    """After any kill: the manifest parses and every state file it names is on disk."""
    manifest = read_manifest(out)
    assert manifest is not None
    folder = checkpoint_folder(out)
    for p in manifest["passes"]:
        if p["state"]:
            assert os.path.isfile(os.path.join(folder, p["state"])), p
    return manifest


def assert_complete_and_equal(out, reference) -> None:
    result = rankfold.open_result(str(out))
    for name in ARRAYS:
        a, b = getattr(result, name), getattr(reference, name)
        assert (a is None) == (b is None), name
        if a is not None:
            assert np.array_equal(a[:], b[:]), name
    assert not os.path.exists(checkpoint_folder(out))
    parent, base = os.path.split(os.path.abspath(out))
    assert [f for f in os.listdir(parent) if f.startswith(f".{base}")] == []


def finish(tables, name, out) -> str:
    proc = subprocess.run(command(tables, name, out), capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    return proc.stderr


@pytest.mark.parametrize("name", ["features", "samples", "sketch-rows", "sketch-cols"])
def test_sigkill_in_every_pass_then_resume_gives_the_same_bits(name, tables, references, tmp_path):
    reference = references[name]
    passes = reference.attrs["passes"]
    rng = np.random.default_rng([SEED, len(name)])
    out = tmp_path / "r.zarr"
    for ordinal, p in enumerate(passes, start=1):
        block = int(rng.integers(1, p["blocks"] - 1))
        code, err = run_until(command(tables, name, out), out, in_pass(ordinal, block),
                              delay=float(rng.uniform(0, 0.01)))
        assert code == -signal.SIGKILL, err
        manifest = assert_checkpoint_consistent(out)
        assert manifest["passes"][ordinal - 1]["blocks_done"] >= block
        assert not os.path.exists(out)  # no result, complete-looking or not
        if ordinal > 1:
            assert "resuming from the checkpoint" in err and f"of {len(passes)}" in err
    err = finish(tables, name, out)
    assert f"pass {len(passes)} of {len(passes)} ({passes[-1]['name']})" in err
    assert_complete_and_equal(out, reference)


def test_sigkill_during_the_in_memory_load_restarts(tables, references, tmp_path):
    out = tmp_path / "r.zarr"
    rng = np.random.default_rng([SEED, 1])
    code, err = run_until(command(tables, "memory", out), out, lambda m: m.get("resolved") is not None,
                          delay=float(rng.uniform(0, 0.05)))
    assert code == -signal.SIGKILL, err
    assert not os.path.exists(out)
    err = finish(tables, "memory", out)
    assert "resuming" not in err  # nothing to resume: one read, started over
    assert_complete_and_equal(out, references["memory"])


@pytest.mark.parametrize("sig,name,ordinal", [(signal.SIGINT, "features", 2), (signal.SIGTERM, "sketch-cols", 1)],
                         ids=["SIGINT", "SIGTERM"])
def test_sigint_and_sigterm_save_and_say_how_to_resume(sig, name, ordinal, tables, references, tmp_path):
    reference = references[name]
    passes = reference.attrs["passes"]
    out = tmp_path / "r.zarr"
    block = int(np.random.default_rng([SEED, int(sig)]).integers(1, passes[ordinal - 1]["blocks"] - 1))
    code, err = run_until(command(tables, name, out), out, in_pass(ordinal, block), sig=sig)
    assert code == 130, err
    assert f"stopped by {sig.name} in pass {ordinal} of {len(passes)} ({passes[ordinal - 1]['name']})" in err
    assert "Run the same command again to resume" in err and "--restart" in err
    assert "Traceback" not in err
    manifest = assert_checkpoint_consistent(out)
    saved = manifest["passes"][ordinal - 1]["blocks_done"]
    assert saved >= block and f"after block {saved:,} of" in err  # saved at the block it stopped after
    assert not os.path.exists(out)
    err = finish(tables, name, out)
    assert f"pass {ordinal} of {len(passes)} ({passes[ordinal - 1]['name']}), block {saved + 1:,}" in err
    assert_complete_and_equal(out, reference)


# ------------------------------------------------------------------ a file system that refuses writes

# RLIMIT_FSIZE makes every write past N bytes of one file fail with EFBIG, in a
# real file system, at whatever point the writer has reached; rankfold ignores
# SIGXFSZ so that the failure surfaces as an error, as ENOSPC would on a full disk.
LIMIT_AT_RESULT_WRITE = """
import resource, sys
import rankfold.api as api
write = api.write_result
def limited(*args, **kwargs):
    resource.setrlimit(resource.RLIMIT_FSIZE, ({n}, {n}))
    return write(*args, **kwargs)
api.write_result = limited
from rankfold.cli import main
sys.exit(main(sys.argv[1:]))
"""


def _limit_file_size(n):
    return lambda: resource.setrlimit(resource.RLIMIT_FSIZE, (n, n))


def assert_nothing_complete_looking(out):
    assert not os.path.exists(out)
    parent, base = os.path.split(os.path.abspath(out))
    assert [f for f in os.listdir(parent) if f.startswith(f".{base}.partial")] == []


def test_result_write_failing_part_way_leaves_no_store_and_resume_finishes(tables, references, tmp_path):
    out = tmp_path / "r.zarr"
    argv = command(tables, "features", out)
    limited = [sys.executable, "-c", LIMIT_AT_RESULT_WRITE.format(n=512), *argv[3:]]
    proc = subprocess.run(limited, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 5, proc.stderr
    assert f"{out}: cannot write the result (File too large)" in proc.stderr
    assert "Traceback" not in proc.stderr
    assert_nothing_complete_looking(out)
    # The passes were saved before the write: the rerun reads nothing and writes the same result.
    manifest = assert_checkpoint_consistent(out)
    assert all(p["complete"] for p in manifest["passes"]) and len(manifest["passes"]) == 2
    err = finish(tables, "features", out)
    assert "all 2 pass(es) done; finishing without reading the data again" in err
    assert_complete_and_equal(out, references["features"])


def test_whole_run_under_a_file_size_limit(tables, tmp_path):
    """The in-memory route's scores (24,000 x 3 float32, 288 KB) cannot be written past 64 KB."""
    out = tmp_path / "r.zarr"
    proc = subprocess.run(command(tables, "memory", out), capture_output=True, text=True, timeout=300,
                          preexec_fn=_limit_file_size(64 * 1024))
    assert proc.returncode == 5, proc.stderr
    assert "cannot write the result (File too large)" in proc.stderr and "Traceback" not in proc.stderr
    assert_nothing_complete_looking(out)
    assert os.listdir(tmp_path) == []  # nor an empty checkpoint


def test_checkpoint_write_failing_says_so(tables, tmp_path):
    """A state file (the 40 x 40 co-moment, ~13 KB) larger than the file system accepts."""
    out = tmp_path / "r.zarr"
    proc = subprocess.run(command(tables, "features", out), capture_output=True, text=True, timeout=300,
                          preexec_fn=_limit_file_size(8 * 1024))
    assert proc.returncode == 5, proc.stderr
    assert f"{checkpoint_folder(out)}: cannot save the checkpoint (File too large)" in proc.stderr
    assert "free some disk space" in proc.stderr and "Traceback" not in proc.stderr
    assert_nothing_complete_looking(out)

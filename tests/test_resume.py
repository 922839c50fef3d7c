"""Fault tests with real processes: SIGKILL, SIGINT and SIGTERM mid-pass, and a full disk.

Each test starts ``python -m rankfold decompose`` as a subprocess on Zarr
tables in ``tmp_path``, with a small ``--memory-limit`` (tens of blocks per
pass) and ``--checkpoint-every 0`` (a checkpoint after every block).  The
moment of each kill is drawn from a seeded generator: a block number of the
pass, found by watching the checkpoint's manifest (no blind sleeps), or, for
a pass that is never saved part-way (the scores pass, the randomized route's
last pass that keeps ``Xc Q``), a fraction of that pass's measured duration
after the pass before it was saved.  After the kills the same command is run
again until it completes; its arrays (loadings to flags) must equal those of
an uninterrupted run bit for bit (``np.array_equal``), and no checkpoint
folder, partial store or scratch folder may remain.

SIGKILLs: features route with fill-mean and scores, 3 passes, 3 kills;
sample-Gram route on samples stored as columns, 2 passes, 2 kills; randomized
subspace iteration on rows, 3 passes, 3 kills; on columns, 3 passes, 3 kills;
the in-memory route, 1 kill during its single load (it restarts): 12 in all.
Then SIGINT (in a pass saved block by block, and in the scores pass) and
SIGTERM: exit 130, a message saying how to resume, the same result after it.
A file system refusing writes (RLIMIT_FSIZE gives EFBIG where a full disk
gives ENOSPC) during the result write and during a checkpoint write: exit 5,
a clear message, no store that looks complete.
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

from _ceilings import ceiling_for
from _table_files import write_zarr

pytestmark = pytest.mark.slow

ARRAYS = ("loadings", "variance", "variance_fraction", "center", "scale", "scores", "residual",
          "residual_fraction", "flagged")
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


# name -> (table, decompose keywords, block size in samples or features, passes read again whole
# on resume).  The CLI gets the same options; the memory limit comes from the block size
# (_ceilings.ceiling_for).  Passes that send rows outside their fold state (the scores pass, the
# randomized route's captured product) are not saved part-way, so a kill there re-reads them.
CONFIGS = {
    "features": ("rows", dict(route="features", missing="fill-mean"), 600, {"scores"}),
    "samples": ("cols", dict(route="samples", samples_as="columns"), 60, set()),
    "sketch-rows": ("rows", dict(route="sketch", missing="fill-mean", power_iterations=1), 300, {"Rayleigh-Ritz"}),
    "sketch-cols": ("cols", dict(route="sketch", samples_as="columns", power_iterations=1), 60, set()),
    "memory": ("rows", dict(route="memory", missing="fill-mean", memory_limit=64_000_000), 0, {"load"}),
}


@pytest.fixture(scope="module")
def options(tables):
    """name -> (table path, decompose keywords with the memory limit)."""
    out = {}
    for name, (table, kw, units, _) in CONFIGS.items():
        limit = kw.get("memory_limit") or ceiling_for(tables[table], units, **kw)
        out[name] = (tables[table], {**kw, "memory_limit": limit})
    return out


@pytest.fixture(scope="module")
def references(options, tmp_path_factory):
    """Each configuration run once, uninterrupted, by the same command in a process of its own.

    A process of its own, like the runs it is compared with: BLAS may split work differently
    in a process whose thread settings other tests have touched, and the comparison is bitwise.
    """
    base = tmp_path_factory.mktemp("reference")
    found = {}
    for name in options:
        out = base / f"{name}.zarr"
        proc = subprocess.run(command(options, name, out), capture_output=True, text=True, timeout=300)
        assert proc.returncode == 0, proc.stderr
        found[name] = rankfold.open_result(str(out))
    return found


def command(options, name, out) -> list[str]:
    path, kw = options[name]
    argv = [sys.executable, "-m", "rankfold", "decompose", path, "--rank", "3", "--out", str(out),
            "--checkpoint-every", "0"]
    for key, value in kw.items():
        flag = "--" + key.replace("_", "-")
        argv += [flag] if value is True else [flag, str(value)]
    return argv


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


def finish(options, name, out) -> str:
    proc = subprocess.run(command(options, name, out), capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    return proc.stderr


def after_pass(ordinal: int):
    """Reached once pass ``ordinal`` is saved complete (0: once the run has settled its plan)."""
    def reached(manifest):
        if ordinal == 0:
            return manifest.get("resolved") is not None
        passes = manifest["passes"]
        return len(passes) >= ordinal and passes[ordinal - 1]["complete"]
    return reached


def moment_in(name: str, ordinal: int, reference, rng):
    """(condition, delay): a seeded random moment inside pass ``ordinal`` of configuration ``name``.

    A pass saved block by block is caught at a random block; a pass that is
    never saved part-way is caught a random fraction of its duration (as
    measured in the reference run) after the pass before it was saved.
    """
    passes = reference.attrs["passes"]
    p = passes[ordinal - 1]
    if p["name"] in CONFIGS[name][3]:
        return after_pass(ordinal - 1), float(rng.uniform(0.05, 0.6)) * p["seconds"]
    return in_pass(ordinal, int(rng.integers(1, p["blocks"] - 1))), float(rng.uniform(0, 0.01))


@pytest.mark.parametrize("name", ["features", "samples", "sketch-rows", "sketch-cols"])
def test_sigkill_in_every_pass_then_resume_gives_the_same_bits(name, options, references, tmp_path):
    reference = references[name]
    passes = reference.attrs["passes"]
    rng = np.random.default_rng([SEED, len(name)])
    out = tmp_path / "r.zarr"
    for ordinal, p in enumerate(passes, start=1):
        reached, delay = moment_in(name, ordinal, reference, rng)
        code, err = run_until(command(options, name, out), out, reached, delay=delay)
        assert code == -signal.SIGKILL, err
        manifest = assert_checkpoint_consistent(out)
        assert all(e["complete"] for e in manifest["passes"][:ordinal - 1])  # earlier passes kept
        assert not os.path.exists(out)  # no result, complete-looking or not
        if ordinal > 1:
            assert "resuming from the checkpoint" in err and f"of {len(passes)}" in err
    err = finish(options, name, out)
    assert "resuming from the checkpoint" in err
    assert_complete_and_equal(out, reference)


def test_sigkill_during_the_in_memory_load_restarts(options, references, tmp_path):
    out = tmp_path / "r.zarr"
    rng = np.random.default_rng([SEED, 1])
    code, err = run_until(command(options, "memory", out), out, after_pass(0),
                          delay=float(rng.uniform(0, 0.5)) * references["memory"].attrs["passes"][0]["seconds"])
    assert code == -signal.SIGKILL, err
    assert not os.path.exists(out)
    err = finish(options, "memory", out)
    assert "resuming" not in err  # nothing to resume: one read, started over
    assert_complete_and_equal(out, references["memory"])


@pytest.mark.parametrize("sig,name,ordinal", [(signal.SIGINT, "features", 2), (signal.SIGTERM, "sketch-cols", 1),
                                              (signal.SIGINT, "features", 3)],
                         ids=["SIGINT", "SIGTERM", "SIGINT-in-scores-pass"])
def test_sigint_and_sigterm_save_and_say_how_to_resume(sig, name, ordinal, options, references, tmp_path):
    reference = references[name]
    passes = reference.attrs["passes"]
    out = tmp_path / "r.zarr"
    reached, delay = moment_in(name, ordinal, reference, np.random.default_rng([SEED, int(sig), ordinal]))
    code, err = run_until(command(options, name, out), out, reached, sig=sig, delay=delay)
    assert code == 130, err
    assert f"stopped by {sig.name} in pass {ordinal}" in err and f"({passes[ordinal - 1]['name']})" in err
    assert "Run the same command again to resume" in err and "--restart" in err
    assert "Traceback" not in err
    manifest = assert_checkpoint_consistent(out)
    assert not os.path.exists(out)
    if passes[ordinal - 1]["name"] in CONFIGS[name][3]:
        assert f"{ordinal - 1} earlier pass(es) are saved" in err
        assert len(manifest["passes"]) == ordinal - 1 and all(p["complete"] for p in manifest["passes"])
        resumed = f"{ordinal - 1} of {len(passes)} passes done; starting pass {ordinal} of {len(passes)}"
    else:
        saved = manifest["passes"][ordinal - 1]["blocks_done"]
        assert f"after block {saved:,} of" in err  # saved at the block it stopped after
        resumed = f"pass {ordinal} of {len(passes)} ({passes[ordinal - 1]['name']}), block {saved + 1:,}"
    err = finish(options, name, out)
    assert resumed in err
    assert_complete_and_equal(out, reference)


# ------------------------------------------------------------------ a file system that refuses writes

# RLIMIT_FSIZE makes every write past N bytes of one file fail with EFBIG, in a
# real file system, at whatever point the writer has reached; rankfold ignores
# SIGXFSZ so that the failure surfaces as an error, as ENOSPC would on a full disk.
LIMIT_AT_RESULT_WRITE = """
import resource, sys
from rankfold.result import ResultWriter
add = ResultWriter.add
def limited(self, *args, **kwargs):  # the arrays written after the passes, loadings first
    resource.setrlimit(resource.RLIMIT_FSIZE, ({n}, {n}))
    return add(self, *args, **kwargs)
ResultWriter.add = limited
from rankfold.cli import main
sys.exit(main(sys.argv[1:]))
"""


def _limit_file_size(n):
    return lambda: resource.setrlimit(resource.RLIMIT_FSIZE, (n, n))


def assert_nothing_complete_looking(out):
    assert not os.path.exists(out)
    parent, base = os.path.split(os.path.abspath(out))
    assert [f for f in os.listdir(parent) if f.startswith((f".{base}.partial", f".{base}.scratch"))] == []


def test_result_write_failing_part_way_leaves_no_store_and_resume_finishes(options, references, tmp_path):
    out = tmp_path / "r.zarr"
    argv = command(options, "features", out)
    limited = [sys.executable, "-c", LIMIT_AT_RESULT_WRITE.format(n=512), *argv[3:]]
    proc = subprocess.run(limited, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 5, proc.stderr
    assert f"{out}: cannot write the result (File too large)" in proc.stderr
    assert "Traceback" not in proc.stderr
    assert_nothing_complete_looking(out)
    # The route's passes were saved before the write; the scores pass, which writes rows as
    # it reads, is read again.  The rerun writes the same result.
    manifest = assert_checkpoint_consistent(out)
    assert [p["complete"] for p in manifest["passes"]] == [True, True]
    err = finish(options, "features", out)
    assert "2 of 3 passes done; starting pass 3 of 3" in err
    assert_complete_and_equal(out, references["features"])


def test_whole_run_under_a_file_size_limit(options, tmp_path):
    """The in-memory route's scores (24,000 x 3 float32, 288 KB) cannot be written past 64 KB."""
    out = tmp_path / "r.zarr"
    proc = subprocess.run(command(options, "memory", out), capture_output=True, text=True, timeout=300,
                          preexec_fn=_limit_file_size(64 * 1024))
    assert proc.returncode == 5, proc.stderr
    assert "cannot write the result (File too large)" in proc.stderr and "Traceback" not in proc.stderr
    assert_nothing_complete_looking(out)
    # nor an empty checkpoint; only the run log (docs/long-runs.md), which ends with the error
    assert os.listdir(tmp_path) == ["r.zarr.log"]
    with open(tmp_path / "r.zarr.log") as fh:
        assert "File too large" in fh.read().strip().splitlines()[-1]


def test_checkpoint_write_failing_says_so(options, tmp_path):
    """A state file (the 40 x 40 co-moment, ~13 KB) larger than the file system accepts."""
    out = tmp_path / "r.zarr"
    proc = subprocess.run(command(options, "features", out), capture_output=True, text=True, timeout=300,
                          preexec_fn=_limit_file_size(8 * 1024))
    assert proc.returncode == 5, proc.stderr
    assert f"{checkpoint_folder(out)}: cannot save the checkpoint (File too large)" in proc.stderr
    assert "free some disk space" in proc.stderr and "Traceback" not in proc.stderr
    assert_nothing_complete_looking(out)

"""Progress: the events a run gives, the views built on them (rankfold.progress), and the
command line's bars, status lines, --quiet and run log, on real files and real processes.

References: byte counts are numpy's ``nbytes`` of the table written; block counts and pass
names are the ones the result store records (``attrs["passes"]``); the remaining-time rule
(elapsed * (1 - f) / f for a share f done at a steady rate) is common practice for progress
displays.
"""

from __future__ import annotations

import fcntl
import io
import os
import pty
import re
import select
import struct
import subprocess
import sys
import termios

import numpy as np
import pytest

import rankfold
from _table_files import result_left_behind, write_parquet_matrix
from rankfold.cli import main
from rankfold.errors import UsageError
from rankfold.progress import (LogLinesView, PassProgress, RunLog, RunMonitor, RunProgress, TerminalView,
                               command_monitor, describe_failure, duration, progress_interval, run_log_path)


class FakeClock:
    """Monotonic seconds that move only when a test says so."""

    def __init__(self, start: float = 1000.0):
        self.now = start

    def __call__(self) -> float:
        return self.now


@pytest.fixture
def table(tmp_path):
    x = np.random.default_rng(11).standard_normal((600, 12))
    path = write_parquet_matrix(tmp_path / "t.parquet", x, row_group_size=50)
    return path, x


def limit(path, route):
    """A ceiling that makes ``route`` read the 600 x 12 table in several blocks."""
    from conftest import limit_for_blocks

    return "250KB" if route == "sketch" else limit_for_blocks(path, route, 4, rank=2, stored=True)


def _record(views):
    return RunMonitor(views)


# --------------------------------------------------------------------------- events
@pytest.mark.parametrize("route, missing", [("features", "refuse"), ("features", "fill-mean"), ("samples", "refuse"),
                                            ("sketch", "refuse"), ("memory", "refuse")])
def test_monitor_sees_every_pass_the_store_records(tmp_path, table, route, missing):
    path, x = table
    events = []
    stream = io.StringIO()
    monitor = RunMonitor([LogLinesView(stream, interval=0)])
    out = tmp_path / "r.zarr"

    def progress(event):
        events.append(dict(event))
        monitor(event)

    result = rankfold.decompose(path, 2, route=route, missing=missing, out=out, memory_limit=limit(path, route),
                                progress=progress, on_plan=monitor.on_plan)
    monitor.finished(["done"])
    recorded = result.attrs["passes"]
    passes = len(recorded)  # the plan promised exactly the passes the route ran (scores included)
    assert passes == monitor.run.planned_passes >= 1
    assert [p.name for p in monitor.run.passes] == [r["name"] for r in recorded]
    assert [p.blocks for p in monitor.run.passes] == [r["blocks"] for r in recorded]
    assert [p.index for p in monitor.run.passes] == list(range(1, passes + 1))
    # Every pass reads the whole table once: numpy's nbytes of the table written (float64).
    assert all(p.bytes == x.nbytes for p in monitor.run.passes)
    assert monitor.run.bytes_read == passes * x.nbytes == monitor.run.planned_bytes
    assert monitor.run.fraction() == 1.0
    # Blocks arrive in order, one event each, ending at the last block of each pass.
    for name in {e["pass"] for e in events}:
        blocks = [e["block"] for e in events if e["pass"] == name]
        assert blocks[-1] == next(r["blocks"] for r in recorded if r["name"] == name)
    text = stream.getvalue()
    for i, r in enumerate(recorded, start=1):
        assert f"pass {i}/{passes} {r['name']}: {r['blocks']:,} block" in text
    if route != "memory":
        assert re.search(r"block \d+ of [\d,]+ \(\d+%\)", text), text  # status lines at interval 0


def test_remaining_time_from_the_rate_and_from_the_plan():
    run = RunProgress(started=100.0, planned_passes=2, planned_bytes=1000, estimated_seconds=50.0)
    # Before any data the plan's estimate counts down.
    assert run.remaining(110.0) == pytest.approx(40.0)
    run.passes.append(PassProgress(1, "a", blocks=4, block=1, bytes=250, seconds=10.0))
    # A quarter read in 10 s at a steady rate: 30 s left (10 * 0.75 / 0.25).
    assert run.fraction() == pytest.approx(0.25)
    assert run.remaining(110.0) == pytest.approx(30.0)
    assert run.pass_label(run.passes[0]) == "pass 1/2 a"
    run.passes.append(PassProgress(3, "extra", blocks=1))
    assert run.pass_label(run.passes[1]) == "pass 3 extra"  # more passes than planned: no "/2"


def test_durations():
    assert duration(0) == "0:00"
    assert duration(65) == "1:05"
    assert duration(3725) == "1:02:05"


def test_status_lines_respect_the_interval():
    clock = FakeClock()
    stream = io.StringIO()
    monitor = RunMonitor([LogLinesView(stream, interval=30, clock=clock, wall=lambda: 0.0)], clock=clock)
    for block in range(1, 11):
        clock.now += 10  # ten blocks, 10 s apart: lines at 30, 60 and 90 s, not at the last block
        monitor({"pass": "feature Gram", "block": block, "blocks": 10, "bytes": block * 100,
                 "seconds": block * 10.0})
    lines = stream.getvalue().splitlines()
    status = [line for line in lines if "elapsed" in line]
    assert len(status) == 3, lines
    assert "block 3 of 10 (30%)" in status[0] and "0:30 elapsed" in status[0]
    assert lines[-1] == "rankfold: pass 1 feature Gram: 10 blocks, 1.0 KB in 100.0 s (10 B/s)"


def test_terminal_view_draws_bars_with_rate_elapsed_and_end(table):
    path, x = table
    stream = io.StringIO()
    monitor = RunMonitor([TerminalView(stream, mininterval=0)])
    rankfold.decompose(path, 2, route="samples", memory_limit=limit(path, "samples"), progress=monitor,
                       on_plan=monitor.on_plan)
    monitor.finished([])
    text = stream.getvalue()
    assert "overall:" in text and "B/s" in text  # bytes against the plan, with tqdm's rate
    assert re.search(r"pass 1/2 sample Gram: +\d+%\|", text), text  # the pass bar
    assert "block/s" in text and "ends about" in text
    assert re.search(r"\[\d\d:\d\d<\d\d:\d\d", text)  # elapsed<remaining
    assert "pass 2/2 loadings:" in text


def test_run_log_holds_plan_passes_and_summary(tmp_path, table):
    path, _ = table
    out = tmp_path / "r.zarr"
    log = run_log_path(out)
    assert log == str(out) + ".log" and not log.startswith(str(out) + os.sep)
    monitor = RunMonitor([RunLog(log, "rankfold decompose t.parquet")])
    with monitor:
        rankfold.decompose(path, 2, route="features", missing="fill-mean", out=out, progress=monitor,
                           on_plan=monitor.on_plan)
        monitor.finished(["summary line"])
    text = open(log).read()
    assert "run started: rankfold decompose t.parquet" in text
    assert "plan     features route" in text
    assert re.search(r"pass 1/\d column means:", text) and re.search(r"pass 2/\d feature Gram:", text), text
    assert "summary line" in text and text.rstrip().splitlines()[-1].endswith(tuple("0123456789"))
    assert "run finished in" in text
    # A second run appends, set apart by a blank line.
    with RunMonitor([RunLog(log)]) as again:
        again.on_plan(rankfold.plan(path, 1))
        again.finished([])
    assert open(log).read().count("run started") == 2


def test_run_log_ends_with_the_error_that_stopped_the_run(tmp_path):
    x = np.random.default_rng(3).standard_normal((2000, 3))
    x[1500, 2] = np.nan
    path = write_parquet_matrix(tmp_path / "late.parquet", x, ["a", "b", "c"], row_group_size=100)
    out = tmp_path / "r.zarr"
    monitor = command_monitor(str(out), io.StringIO(), quiet=True)
    with pytest.raises(rankfold.DataError):
        with monitor:
            rankfold.decompose(path, 1, route="features", memory_limit="200KB", out=out, progress=monitor,
                               on_plan=monitor.on_plan)
    last = open(run_log_path(out)).read().rstrip().splitlines()[-1]
    assert "run stopped after" in last and "error:" in last and "sample 1,500" in last and "'c'" in last
    assert result_left_behind(out) == []


def test_failure_names():
    assert describe_failure(UsageError("rank must be")) == "error: rank must be"
    assert describe_failure(KeyboardInterrupt()) == "interrupted"
    assert describe_failure(ZeroDivisionError("x")).startswith("internal error (ZeroDivisionError")


@pytest.mark.parametrize("text, value", [(None, 30.0), ("", 30.0), ("0", 0.0), ("2.5", 2.5)])
def test_interval_from_the_environment(text, value):
    env = {} if text is None else {"RANKFOLD_PROGRESS_SECONDS": text}
    assert progress_interval(env) == value


@pytest.mark.parametrize("text", ["soon", "-1", "nan", "inf"])
def test_bad_interval_is_a_usage_error(text):
    with pytest.raises(UsageError, match="RANKFOLD_PROGRESS_SECONDS"):
        progress_interval({"RANKFOLD_PROGRESS_SECONDS": text})


def test_command_monitor_picks_views(tmp_path):
    class Tty(io.StringIO):
        def isatty(self):
            return True

    kinds = lambda m: [type(v).__name__ for v in m.views]  # noqa: E731
    assert kinds(command_monitor(str(tmp_path / "o.zarr"), Tty(), interval=1)) == ["TerminalView", "RunLog"]
    assert kinds(command_monitor(str(tmp_path / "o.zarr"), io.StringIO(), interval=1)) == ["LogLinesView", "RunLog"]
    assert kinds(command_monitor(str(tmp_path / "o.zarr"), Tty(), quiet=True)) == ["RunLog"]
    assert kinds(command_monitor(None, io.StringIO(), quiet=True)) == []


# --------------------------------------------------------------------------- the command line
def _env(**extra):
    env = dict(os.environ)
    env.update(extra)
    return env


def test_cli_off_a_terminal_prints_status_and_pass_lines(tmp_path, table):
    path, x = table
    out = tmp_path / "r.zarr"
    proc = subprocess.run([sys.executable, "-m", "rankfold", "decompose", path, "--rank", "2", "--out", str(out),
                           "--route", "samples", "--memory-limit", str(limit(path, "samples"))],
                          capture_output=True, text=True, env=_env(RANKFOLD_PROGRESS_SECONDS="0"), timeout=300)
    assert proc.returncode == 0, proc.stderr
    err = proc.stderr
    assert "\r" not in err and "\x1b" not in err  # plain lines for a log or a pipe, no bars
    assert "plan     samples route" in err
    assert re.search(r"rankfold: pass 1/2 sample Gram: block \d+ of \d+ \(\d+%\), .* read at .*/s; "
                     r"overall \d+%, \d+:\d\d elapsed, about \d+:\d\d left \(ends about [\d:]+\)", err), err
    assert re.search(r"rankfold: pass 2/2 loadings: \d+ blocks, 57\.6 KB in", err), err  # x.nbytes = 57,600
    assert "component" in proc.stdout  # the result's summary goes to stdout
    log = open(run_log_path(out)).read()
    assert "pass 1/2 sample Gram" in log and "run finished" in log and "component" in log


def test_cli_quiet_prints_nothing_but_still_logs(tmp_path, table):
    path, _ = table
    out = tmp_path / "r.zarr"
    proc = subprocess.run([sys.executable, "-m", "rankfold", "decompose", path, "--rank", "2", "--out", str(out),
                           "--quiet"], capture_output=True, text=True, env=_env(RANKFOLD_PROGRESS_SECONDS="0"),
                          timeout=300)
    assert proc.returncode == 0 and proc.stdout == "" and proc.stderr == ""
    assert "run finished" in open(run_log_path(out)).read()


def test_cli_failure_before_the_plan_leaves_no_log(capsys, tmp_path, table):
    path, _ = table
    out = tmp_path / "r.zarr"
    assert main(["decompose", path, "--rank", "99", "--out", str(out)]) == 2
    assert not os.path.exists(run_log_path(out))


def _run_on_a_terminal(argv, env, columns=120):
    """Run ``python -m rankfold argv`` with stderr on a pseudo-terminal; return (code, stdout, screen)."""
    leader, follower = pty.openpty()
    fcntl.ioctl(follower, termios.TIOCSWINSZ, struct.pack("HHHH", 40, columns, 0, 0))
    proc = subprocess.Popen([sys.executable, "-m", "rankfold", *argv], stdin=subprocess.DEVNULL,
                            stdout=subprocess.PIPE, stderr=follower, env=env)
    os.close(follower)
    screen = b""
    while True:
        ready, _, _ = select.select([leader], [], [], 0.2)
        if ready:
            try:
                chunk = os.read(leader, 65536)
            except OSError:  # the child closed the terminal
                break
            if not chunk:
                break
            screen += chunk
        elif proc.poll() is not None:
            break
    stdout = proc.stdout.read().decode()
    code = proc.wait(timeout=60)
    os.close(leader)
    return code, stdout, screen.decode(errors="replace")


@pytest.mark.slow
def test_cli_on_a_terminal_draws_bars(tmp_path):
    x = np.random.default_rng(5).standard_normal((60000, 8))
    path = write_parquet_matrix(tmp_path / "t.parquet", x, row_group_size=2000)
    out = tmp_path / "r.zarr"
    code, stdout, screen = _run_on_a_terminal(
        ["decompose", path, "--rank", "2", "--out", str(out), "--route", "sketch", "--oversample", "4",
         "--memory-limit", "8MB"],
        _env())
    assert code == 0, screen
    assert "overall:" in screen and "B/s" in screen
    planned = int(re.search(r"passes +(\d+) passes over the data", screen).group(1))
    assert re.search(rf"pass [1-{planned}]/{planned} [a-zA-Z -]+: +\d+%\|", screen), screen[-2000:]
    assert "ends about" in screen
    # One line per finished pass, numbered 1..planned, each reading the whole table (x.nbytes = 3.84 MB).
    done = re.findall(rf"pass (\d+)/{planned} ([a-zA-Z -]+): \d+ blocks, 3\.8 MB in", screen)
    assert [int(i) for i, _ in done] == list(range(1, planned + 1)), done
    assert done[-1][1] == "Rayleigh-Ritz" and all("power iteration" in name for _, name in done[:-1])
    assert "component" in stdout


def test_a_log_that_cannot_be_written_does_not_stop_the_run(tmp_path, table):
    """/dev/full accepts the open and fails every write with ENOSPC (Linux), like a full disk."""
    if not os.path.exists("/dev/full"):
        pytest.skip("no /dev/full on this system")
    path, x = table
    stream = io.StringIO()
    with RunMonitor([RunLog("/dev/full"), LogLinesView(stream, interval=0)]) as monitor:
        result = rankfold.decompose(path, 2, route="features", scores=False, progress=monitor,
                                    on_plan=monitor.on_plan)
        monitor.finished([])
    assert result.loadings.shape == (12, 2)
    assert "pass 1/1 feature Gram" in stream.getvalue()  # the other views went on

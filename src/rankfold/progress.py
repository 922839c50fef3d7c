"""Progress of a run: live bars, periodic lines and the run log.

Nothing here prints on its own: every view writes to the stream or file it is
given, and the command line decides which views a run gets
(:func:`command_monitor`).

:class:`RunMonitor` is both the ``progress`` callback and the ``on_plan`` hook
of :func:`rankfold.decompose`.  It turns the per-block events of
:func:`rankfold.routes.common.run_pass` (a dict with ``pass``, ``block``,
``blocks``, ``bytes``, ``seconds``; ``pass_index`` when the caller knows it)
into pass starts, block updates and pass ends, keeps the run's totals against
the plan (passes, bytes, estimated seconds), and hands them to its views:

:class:`TerminalView`
    tqdm bars on a terminal: overall (bytes against the plan's bytes, rate,
    elapsed, remaining, the clock time it should end) and the current pass
    (blocks, rate).  tqdm is a well-kept progress library; drawing our own
    bars would repeat its handling of terminal widths and redraws.
:class:`LogLinesView`
    plain lines for a log or a pipe: one at most every ``interval`` seconds
    (checked after each block) and one per finished pass.
:class:`RunLog`
    the run log file beside the result: plan, one line per pass, the final
    summary or the error that stopped the run.
"""

from __future__ import annotations

import datetime
import os
import time
from dataclasses import dataclass, field

from rankfold.errors import RankfoldError, UsageError
from rankfold.memory import format_bytes

DEFAULT_INTERVAL = 30.0
INTERVAL_VARIABLE = "RANKFOLD_PROGRESS_SECONDS"
LOG_SUFFIX = ".log"


# --------------------------------------------------------------------------- state
@dataclass
class PassProgress:
    """One pass as seen so far: ``block`` of ``blocks`` done, ``bytes`` read in ``seconds``."""

    index: int
    name: str
    blocks: int
    block: int = 0
    bytes: int = 0
    seconds: float = 0.0

    @property
    def done(self) -> bool:
        return self.block >= self.blocks

    @property
    def rate(self) -> float:
        """Bytes read per second in this pass (0 before the first block)."""
        return self.bytes / self.seconds if self.seconds > 0 else 0.0


@dataclass
class RunProgress:
    """The whole run against its plan.

    ``planned_passes``, ``planned_bytes`` and ``estimated_seconds`` come from
    the :class:`~rankfold.planner.Plan` (None without one).
    """

    started: float
    planned_passes: int | None = None
    planned_bytes: int | None = None
    estimated_seconds: float | None = None
    route: str | None = None
    passes: list[PassProgress] = field(default_factory=list)
    finished_bytes: int = 0  # bytes of the passes already finished

    @property
    def current(self) -> PassProgress | None:
        return self.passes[-1] if self.passes else None

    @property
    def bytes_read(self) -> int:
        cur = self.current
        return self.finished_bytes + (cur.bytes if cur is not None and not cur.done else 0)

    def fraction(self) -> float | None:
        """Share of the planned bytes read so far (0..1), or None without a plan."""
        if not self.planned_bytes:
            return None
        return min(1.0, self.bytes_read / self.planned_bytes)

    def remaining(self, now: float) -> float | None:
        """Seconds left: measured from the rate so far once data flows, else the plan's estimate."""
        elapsed = now - self.started
        fraction = self.fraction()
        if fraction is not None and fraction > 0:
            return elapsed * (1 - fraction) / fraction
        if self.estimated_seconds is not None:
            return max(0.0, self.estimated_seconds - elapsed)
        return None

    def pass_label(self, p: PassProgress) -> str:
        """``"pass 2/4 feature Gram"`` (``"pass 5"`` when more passes ran than planned)."""
        planned = self.planned_passes
        of = f"/{planned}" if planned and p.index <= planned else ""
        return f"pass {p.index}{of} {p.name}"


# --------------------------------------------------------------------------- wording
def duration(seconds: float) -> str:
    """``3725`` -> ``"1:02:05"``; ``65`` -> ``"1:05"``."""
    seconds = int(round(max(0.0, seconds)))
    h, rest = divmod(seconds, 3600)
    m, s = divmod(rest, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


def clock_after(seconds: float, wall: float) -> str:
    """Local clock time ``seconds`` after the wall time ``wall`` (``"04:12"``, with the date if not today)."""
    end = datetime.datetime.fromtimestamp(wall + seconds)
    today = datetime.datetime.fromtimestamp(wall).date()
    return end.strftime("%H:%M") if end.date() == today else end.strftime("%Y-%m-%d %H:%M")


def rate_text(bytes_per_s: float) -> str:
    return f"{format_bytes(bytes_per_s)}/s"


def pass_line(run: RunProgress, p: PassProgress) -> str:
    """One finished pass: ``"pass 1/2 sample Gram: 12 blocks, 48.0 MB in 1.2 s (40.0 MB/s)"``."""
    return (f"{run.pass_label(p)}: {p.blocks:,} block{'s' if p.blocks != 1 else ''}, "
            f"{format_bytes(p.bytes)} in {p.seconds:.1f} s ({rate_text(p.rate)})")


def status_line(run: RunProgress, now: float, wall: float) -> str:
    """Where the run is: the current pass, its rate, the overall share, elapsed and remaining time."""
    p = run.current
    parts = []
    if p is not None:
        share = f" ({100 * p.block / p.blocks:.0f}%)" if p.blocks else ""
        parts.append(f"{run.pass_label(p)}: block {p.block:,} of {p.blocks:,}{share}, "
                     f"{format_bytes(p.bytes)} read at {rate_text(p.rate)}")
    fraction = run.fraction()
    overall = f"overall {100 * fraction:.0f}%, " if fraction is not None else ""
    text = f"{overall}{duration(now - run.started)} elapsed"
    left = run.remaining(now)
    if left is not None:
        text += f", about {duration(left)} left (ends about {clock_after(left, wall)})"
    parts.append(text)
    return "; ".join(parts)


def describe_failure(exc: BaseException) -> str:
    """The words the command line uses for an exception that stopped a run."""
    if isinstance(exc, RankfoldError):
        return f"error: {exc}"
    if isinstance(exc, KeyboardInterrupt):
        return "interrupted"
    return f"internal error ({type(exc).__name__}: {exc})"


# --------------------------------------------------------------------------- views
class View:
    """What a view is told; every method is optional."""

    def plan(self, run: RunProgress, lines: list[str]) -> None: ...

    def pass_started(self, run: RunProgress, p: PassProgress) -> None: ...

    def block(self, run: RunProgress, p: PassProgress) -> None: ...

    def pass_finished(self, run: RunProgress, p: PassProgress) -> None: ...

    def finished(self, run: RunProgress, lines: list[str]) -> None: ...

    def failed(self, run: RunProgress, message: str) -> None: ...

    def close(self) -> None: ...


class TerminalView(View):
    """tqdm bars on ``stream`` (a terminal): overall and the current pass.

    The overall bar counts bytes against the plan's bytes, so tqdm's own rate
    and remaining time are bytes per second and time to the planned end; its
    postfix names the pass and the clock time the run should end.  Finished
    passes stay on screen as one line each; the pass bar is removed.
    """

    def __init__(self, stream, *, clock=time.monotonic, wall=time.time, mininterval: float = 0.5):
        self.stream = stream
        self.clock = clock
        self.wall = wall
        self.mininterval = mininterval
        self.overall = None
        self.bar = None

    def _tqdm(self, **kwargs):
        from tqdm import tqdm

        # A terminal that reports no width (some pseudo-terminals) would get no bar at all.
        try:
            sized = os.get_terminal_size(self.stream.fileno()).columns > 0
        except (AttributeError, OSError, ValueError):
            sized = False
        width = {"dynamic_ncols": True} if sized else {"ncols": 100}
        return tqdm(file=self.stream, mininterval=self.mininterval, **width, **kwargs)

    def plan(self, run, lines):
        for line in lines:
            self._write(line)

    def _write(self, line: str) -> None:
        from tqdm import tqdm

        tqdm.write(line, file=self.stream)

    def _ensure_overall(self, run: RunProgress) -> None:
        if self.overall is None:
            total = run.planned_bytes or None
            self.overall = self._tqdm(total=total, desc="overall", unit="B", unit_scale=True,
                                      unit_divisor=1000, position=0, leave=True)

    def pass_started(self, run, p):
        self._ensure_overall(run)
        self.bar = self._tqdm(total=p.blocks, desc=run.pass_label(p), unit="block", position=1,
                              leave=False, initial=max(0, p.block - 1))
        self._postfix(run)

    def _postfix(self, run: RunProgress) -> None:
        left = run.remaining(self.clock())
        p = run.current
        parts = []
        if p is not None:
            parts.append(f"pass {p.index}/{run.planned_passes}" if run.planned_passes else f"pass {p.index}")
        if left is not None:
            parts.append(f"ends about {clock_after(left, self.wall())}")
        self.overall.set_postfix_str(", ".join(parts), refresh=False)
        if self.bar is not None and p is not None:
            self.bar.set_postfix_str(rate_text(p.rate), refresh=False)

    def block(self, run, p):
        self._postfix(run)
        if self.bar is not None:
            self.bar.update(p.block - self.bar.n)
        self.overall.update(run.bytes_read - self.overall.n)

    def pass_finished(self, run, p):
        if self.bar is not None:
            self.bar.close()
            self.bar = None
        self.overall.update(run.bytes_read - self.overall.n)
        self._write(pass_line(run, p))

    def finished(self, run, lines):
        self.close()

    def failed(self, run, message):
        self.close()

    def close(self):
        for bar in (self.bar, self.overall):
            if bar is not None:
                bar.close()
        self.bar = self.overall = None


class LogLinesView(View):
    """Plain lines on ``stream``: the plan, a status line at most every ``interval`` seconds
    (checked after each block), and one line per finished pass."""

    def __init__(self, stream, interval: float = DEFAULT_INTERVAL, *, clock=time.monotonic, wall=time.time,
                 prefix: str = "rankfold: "):
        self.stream = stream
        self.interval = float(interval)
        self.clock = clock
        self.wall = wall
        self.prefix = prefix
        self.last = None

    def _write(self, text: str) -> None:
        self.stream.write(f"{self.prefix}{text}\n")
        self.stream.flush()

    def plan(self, run, lines):
        for line in lines:
            self.stream.write(f"{line}\n")
        self.stream.flush()
        self.last = self.clock()

    def block(self, run, p):
        now = self.clock()
        if self.last is None:
            self.last = run.started
        if now - self.last >= self.interval and not p.done:
            self.last = now
            self._write(status_line(run, now, self.wall()))

    def pass_finished(self, run, p):
        self._write(pass_line(run, p))


class RunLog(View):
    """The run log at ``path``: appended to, one timestamped line per event, flushed at once.

    Appending keeps the history of a rerun or a resumed run in one file.
    """

    def __init__(self, path: str, command: str | None = None, *, clock=time.monotonic):
        self.path = path
        self.command = command
        self.clock = clock
        self.fh = None

    def _line(self, text: str) -> None:
        if self.fh is None:
            return
        stamp = datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d %H:%M:%SZ")
        try:
            self.fh.write(f"{stamp} {text}".rstrip() + "\n")
            self.fh.flush()
        except OSError:
            # A full disk must not stop a night's run for the sake of its log: stop logging
            # (the result write will report a full disk plainly if it is still full then).
            self.close()

    def plan(self, run, lines):
        try:
            self.fh = open(self.path, "a", encoding="utf-8")
        except OSError:
            # The log is a convenience: an unwritable folder is reported when the result is written.
            self.fh = None
            return
        if self.fh.tell() > 0:  # a rerun or a resumed run: set it apart from the one before
            self.fh.write("\n")
        self._line("run started" + (f": {self.command}" if self.command else ""))
        for line in lines:
            self._line(f"  {line}")

    def pass_finished(self, run, p):
        self._line(pass_line(run, p))

    def finished(self, run, lines):
        for line in lines:
            self._line(f"  {line}")
        self._line(f"run finished in {duration(self.clock() - run.started)}")

    def failed(self, run, message):
        self._line(f"run stopped after {duration(self.clock() - run.started)}: {message}")

    def close(self):
        if self.fh is not None:
            fh, self.fh = self.fh, None
            try:
                fh.close()
            except OSError:
                pass


# --------------------------------------------------------------------------- the monitor
class RunMonitor:
    """The ``progress`` callback and ``on_plan`` hook of :func:`rankfold.decompose`.

    Parameters
    ----------
    views : list of View
        Told of the plan, every pass start, block and end, and the outcome.
    clock : callable
        Monotonic seconds (injected by tests).

    Use it as a context manager around the run: an exception leaving the block
    is reported to the views (the run log then ends with the error) and
    re-raised.
    """

    def __init__(self, views: list[View], *, clock=time.monotonic):
        self.views = list(views)
        self.clock = clock
        self.run = RunProgress(started=clock())
        self._closed = False

    def _tell(self, method: str, *args) -> None:
        for view in self.views:
            getattr(view, method)(self.run, *args)

    def on_plan(self, plan) -> None:
        """Record the plan's passes, bytes and time; show and log its account."""
        e = plan.estimate
        self.run = RunProgress(started=self.clock(), planned_passes=int(e.passes),
                               planned_bytes=int(e.bytes_read), estimated_seconds=float(e.seconds),
                               route=plan.route)
        self._tell("plan", plan.lines())

    def __call__(self, event: dict) -> None:
        run = self.run
        cur = run.current
        index = event.get("pass_index")
        # A pass starts with the first event, after a finished pass, or when the caller says so.
        if cur is None or cur.done or (index is not None and index != cur.index):
            if cur is not None and not cur.done:
                run.finished_bytes += cur.bytes  # left unfinished: count what it read
            cur = PassProgress(index if index is not None else len(run.passes) + 1, str(event["pass"]),
                               int(event["blocks"]), block=int(event["block"]) - 1)
            run.passes.append(cur)
            self._tell("pass_started", cur)
        cur.block, cur.bytes, cur.seconds = int(event["block"]), int(event["bytes"]), float(event["seconds"])
        if cur.done:
            run.finished_bytes += cur.bytes
        self._tell("block", cur)
        if cur.done:
            self._tell("pass_finished", cur)

    def finished(self, lines: list[str]) -> None:
        """The run is complete; ``lines`` summarise the result."""
        self._tell("finished", list(lines))
        self.close()

    def failed(self, message: str) -> None:
        self._tell("failed", message)
        self.close()

    def close(self) -> None:
        if not self._closed:
            self._closed = True
            for view in self.views:
                view.close()

    def __enter__(self) -> "RunMonitor":
        return self

    def __exit__(self, exc_type, exc, tb) -> bool:
        if exc is not None and not self._closed:
            self.failed(describe_failure(exc))
        self.close()
        return False


def run_log_path(out: str) -> str:
    """The run log beside the result store ``out``: ``RESULT.zarr`` -> ``RESULT.zarr.log``.

    A sibling file, never inside the store, so the store stays exactly what
    :func:`rankfold.result.write_result` wrote.
    """
    return os.path.abspath(os.fspath(out)).rstrip(os.sep) + LOG_SUFFIX


def progress_interval(environ=os.environ) -> float:
    """Seconds between status lines off a terminal: ``$RANKFOLD_PROGRESS_SECONDS`` or 30."""
    text = environ.get(INTERVAL_VARIABLE)
    if text is None or text == "":
        return DEFAULT_INTERVAL
    try:
        value = float(text)
    except ValueError:
        value = -1.0
    if not value >= 0 or value == float("inf"):
        raise UsageError(f"{INTERVAL_VARIABLE} must be a number of seconds (0 or more); got {text!r}")
    return value


def command_monitor(out: str | None, stream, *, quiet: bool = False, command: str | None = None,
                    interval: float | None = None) -> RunMonitor:
    """The views the command line gives a ``decompose`` run.

    Bars when ``stream`` is a terminal, status lines otherwise, nothing with
    ``quiet``; a run log beside ``out`` in every case.
    """
    views: list[View] = []
    if not quiet:
        isatty = getattr(stream, "isatty", None)
        if isatty is not None and isatty():
            views.append(TerminalView(stream))
        else:
            views.append(LogLinesView(stream, progress_interval() if interval is None else interval))
    if out is not None:
        views.append(RunLog(run_log_path(out), command))
    return RunMonitor(views)

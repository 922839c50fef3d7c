"""Stopping cleanly on SIGINT and SIGTERM: a flag that passes check after each block.

A signal handler may run between any two bytecodes, in the middle of a fold
update or a checkpoint write; doing real work there would leave a state half
updated.  So the first SIGINT or SIGTERM only records itself, and
:func:`rankfold.routes.common.run_pass` looks at the record after each block:
it saves a checkpoint at that clean point and raises
:class:`~rankfold.errors.Interrupted`.  A second signal of either kind stops
at once (``KeyboardInterrupt``): the last checkpoint written is then the
resume point, as after SIGKILL.
"""

from __future__ import annotations

import contextlib
import signal
import threading
from collections.abc import Iterator

SIGNALS = (signal.SIGINT, signal.SIGTERM)

_requested: list[int] = []


def requested() -> str | None:
    """Name of the signal that asked to stop (``"SIGINT"``), or None."""
    return signal.Signals(_requested[0]).name if _requested else None


def request(signum: int = signal.SIGINT) -> None:
    """Ask running passes to stop after their current block (what the handler does)."""
    if not _requested:
        _requested.append(int(signum))


def clear() -> None:
    """Forget a request (at the start and end of a run)."""
    _requested.clear()


def _handler(signum, frame) -> None:
    if _requested:
        raise KeyboardInterrupt  # second signal: stop now, keep the last checkpoint
    request(signum)


@contextlib.contextmanager
def stop_on_signals() -> Iterator[None]:
    """Within the block, SIGINT and SIGTERM request a clean stop instead of killing.

    Handlers can only be installed from the main thread; elsewhere (a worker
    thread, a notebook kernel's executor) the block runs with the signals as
    they were.  The previous handlers are restored on exit.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    clear()
    previous = {}
    try:
        for sig in SIGNALS:
            previous[sig] = signal.signal(sig, _handler)
        yield
    finally:
        for sig, old in previous.items():
            signal.signal(sig, old)
        clear()

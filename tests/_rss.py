"""Peak resident memory of the current process, for the child processes of the memory tests.

Method (Linux): the kernel's high-water mark ``VmHWM`` after resetting it by writing ``5`` to
``/proc/self/clear_refs`` (Linux >= 4.0), together with ``VmRSS`` sampled every few
milliseconds on a thread in case the reset is not allowed; the peak is the larger of the two.
Used by ``test_memory_ceiling.py`` and ``test_planner.py``, whose driver scripts put this
folder on ``sys.path`` (:data:`PRELUDE`).
"""

from __future__ import annotations

import os
import threading
import time

# Lines a driver script starts with so that it can ``import _rss`` from a temporary folder.
PRELUDE = f"import sys\nsys.path.insert(0, {os.path.dirname(os.path.abspath(__file__))!r})\n"


def vm(key: str) -> int:
    """A ``/proc/self/status`` memory figure (``VmRSS``, ``VmHWM``) in bytes."""
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(key + ":"):
                return int(line.split()[1]) * 1024
    raise KeyError(key)


def reset_hwm() -> bool:
    """Reset the high-water mark to the current resident set; False where the kernel refuses."""
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
    except OSError:
        return False
    return vm("VmHWM") <= vm("VmRSS") + 2**20


class PeakMeter:
    """``with PeakMeter() as meter: work()``; then ``meter.peak`` (bytes), ``hwm``, ``sampled``, ``samples``."""

    def __init__(self, interval: float = 0.002):
        self.interval = interval

    def __enter__(self) -> "PeakMeter":
        self.hwm_reset = reset_hwm()
        self._sampled = [vm("VmRSS")]
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._sample, daemon=True)
        self._thread.start()
        return self

    def _sample(self) -> None:
        while not self._stop.is_set():
            self._sampled.append(vm("VmRSS"))
            time.sleep(self.interval)

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._thread.join()
        self.hwm = vm("VmHWM") if self.hwm_reset else None
        self.sampled = max(self._sampled)
        self.samples = len(self._sampled)
        self.peak = max(self.sampled, self.hwm or 0)

"""Memory sizes: parsing, the default ceiling, and the block budget.

The ceiling bounds what rankfold allocates for data and state: blocks in
flight, read-ahead, decoder buffers, fold states and the final eigenproblem.
The interpreter and imported libraries (about 150 MB with numpy, scipy, zarr
and pyarrow) are not part of it.
"""

from __future__ import annotations

import ctypes
import re
import sys

from rankfold.errors import MemoryLimitError, UsageError

_UNITS = {"": 1, "b": 1, "k": 10**3, "kb": 10**3, "m": 10**6, "mb": 10**6, "g": 10**9, "gb": 10**9,
          "t": 10**12, "tb": 10**12, "kib": 2**10, "mib": 2**20, "gib": 2**30, "tib": 2**40}

# Share of the currently available memory taken when no ceiling is given:
# the rest is headroom for the interpreter, the page cache and other programs.
DEFAULT_SHARE = 0.6


def parse_memory(text: str | int | float | None) -> int | None:
    """Bytes from ``"512MB"``, ``"2GiB"``, ``"1.5g"`` or a plain number of bytes.

    Decimal units (KB, MB, GB) are powers of 1000 and binary units (KiB, MiB,
    GiB) powers of 1024, as the SI and IEC standards define them.
    """
    if text is None:
        return None
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        value = int(text)
    else:
        m = re.fullmatch(r"\s*([0-9]*\.?[0-9]+)\s*([a-zA-Z]*)\s*", str(text))
        if not m or m.group(2).lower() not in _UNITS:
            raise UsageError(
                f"memory limit {text!r} is not a size; write a number with a unit, "
                "for example 512MB, 2GB or 1.5GiB")
        value = int(float(m.group(1)) * _UNITS[m.group(2).lower()])
    if value <= 0:
        raise UsageError(f"memory limit must be positive, got {text!r}")
    return value


def default_memory_limit() -> int:
    """60% of the memory available now, as reported by psutil."""
    import psutil

    return int(psutil.virtual_memory().available * DEFAULT_SHARE)


def format_bytes(n: float) -> str:
    """``1234567`` -> ``"1.2 MB"`` (decimal units)."""
    for unit in ("B", "KB", "MB", "GB", "TB"):
        if abs(n) < 1000 or unit == "TB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000
    return f"{n:.1f} TB"


def block_budget(limit: int, fixed: int, unit_bytes: int, what: str) -> int:
    """Bytes left for blocks in flight once ``fixed`` bytes of state are set aside.

    ``unit_bytes`` is the least block memory the source can work with
    (:meth:`rankfold.sources.base.Source.min_block_bytes`).

    Raises
    ------
    MemoryLimitError
        If not even the smallest block fits beside the state.
    """
    budget = limit - fixed
    if budget < unit_bytes:
        need = fixed + unit_bytes
        raise MemoryLimitError(
            f"memory limit {format_bytes(limit)} is too small for {what}: the state needs "
            f"{format_bytes(fixed)} and one block at least {format_bytes(unit_bytes)}; "
            f"give at least --memory-limit {format_bytes(need * 1.1)}")
    return budget


_MMAP_THRESHOLD_SET = False


def return_freed_memory_promptly() -> None:
    """Make glibc map large allocations directly, so that freeing them unmaps them.

    glibc raises its mmap threshold each time a large mapped buffer is freed
    (up to 32 MB), after which block-sized buffers come from the heap and stay
    resident after they are freed; a pass then looks one or two blocks above
    the ceiling, and the memory stays taken after the run.  Fixing the
    threshold at 1 MiB (which also turns the dynamic adjustment off) keeps the
    resident set close to what is actually in use.  It is process-wide but
    only affects allocations of 1 MiB and more; other C libraries are a no-op.
    """
    global _MMAP_THRESHOLD_SET
    if _MMAP_THRESHOLD_SET or not sys.platform.startswith("linux"):
        return
    try:
        libc = ctypes.CDLL("libc.so.6")
        m_mmap_threshold = -3  # from <malloc.h>
        libc.mallopt(m_mmap_threshold, 1 << 20)
    except (OSError, AttributeError):
        pass
    _MMAP_THRESHOLD_SET = True


def trim_heap() -> None:
    """Hand freed heap pages back to the system (glibc ``malloc_trim``); a no-op elsewhere.

    Blocks are mapped directly (see :func:`return_freed_memory_promptly`), but
    the many sub-megabyte temporaries of a pass (slabs, thin products, the
    per-sample rows waiting for a whole chunk) come from the heap, and freed
    heap pages stay resident until trimmed.  Measured on the Parquet case of
    tests/test_memory_ceiling.py: about 6 MB kept from one run to the next.
    """
    if not sys.platform.startswith("linux"):
        return
    try:
        ctypes.CDLL("libc.so.6").malloc_trim(0)
    except (OSError, AttributeError):
        pass

"""Memory sizes: parsing, the default ceiling, and the block budget.

The ceiling bounds what rankfold allocates for data and state: blocks in
flight, read-ahead, decoder buffers, fold states and the final eigenproblem.
The interpreter and imported libraries (about 150 MB with numpy, scipy, zarr
and pyarrow) are not part of it.
"""

from __future__ import annotations

import re

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

    Raises
    ------
    MemoryLimitError
        If not even one unit (one sample or one feature) fits beside the state.
    """
    budget = limit - fixed
    if budget < unit_bytes:
        need = fixed + unit_bytes
        raise MemoryLimitError(
            f"memory limit {format_bytes(limit)} is too small for {what}: the state needs "
            f"{format_bytes(fixed)} and one block at least {format_bytes(unit_bytes)}; "
            f"give at least --memory-limit {format_bytes(need * 1.1)}")
    return budget

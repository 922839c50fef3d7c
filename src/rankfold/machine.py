"""This machine's read and GEMM speed, measured once by a short probe and cached.

The planner turns passes, bytes and flops into seconds with these two rates.
The probe (about a second) writes a small zstd Zarr array to a temporary
folder and reads it back through rankfold's own Zarr source (decode and
float64 conversion, the usual bottleneck), then times a float64 block Gram
product ``B.T @ B``.  The result is cached as JSON in
``$RANKFOLD_CACHE_DIR`` (default ``~/.cache/rankfold``), one file per host
and core count; delete it to measure again.
"""

from __future__ import annotations

import json
import os
import platform
import shutil
import tempfile
import time
from dataclasses import asdict, dataclass

import numpy as np


@dataclass(frozen=True)
class MachineSpeed:
    """Sustained rates used to estimate wall time.

    Attributes
    ----------
    read_bytes_per_s : float
        Stored bytes decoded into float64 blocks per second (warm page cache).
    gemm_flops_per_s : float
        Float64 flops per second of a block Gram product on all cores.
    cores : int
    measured : str
        Where the figures come from (cache path and date, or "given").
    """

    read_bytes_per_s: float
    gemm_flops_per_s: float
    cores: int
    measured: str = "given"


def cache_folder() -> str:
    """rankfold's folder for what it keeps on this machine: ``$RANKFOLD_CACHE_DIR`` or ``~/.cache/rankfold``."""
    return os.environ.get("RANKFOLD_CACHE_DIR") or os.path.join(os.path.expanduser("~"), ".cache", "rankfold")


def cache_path() -> str:
    """Where the probe's result is kept."""
    return os.path.join(cache_folder(), f"machine-{platform.node() or 'host'}-{os.cpu_count() or 1}cores.json")


def machine_speed(probe: bool = True) -> MachineSpeed:
    """Cached speeds, measuring them first if there is no cache (and ``probe``)."""
    path = cache_path()
    try:
        with open(path) as fh:
            data = json.load(fh)
        return MachineSpeed(**data)
    except (OSError, ValueError, TypeError):
        pass
    if not probe:
        return MachineSpeed(3e8, 2e10, os.cpu_count() or 1, "defaults (no probe run)")
    speed = measure()
    try:
        os.makedirs(os.path.dirname(path), exist_ok=True)
        tmp = f"{path}.{os.getpid()}.tmp"
        with open(tmp, "w") as fh:
            json.dump(asdict(speed), fh, indent=1)
        os.replace(tmp, path)
    except OSError:
        pass  # an unwritable cache only means probing again next time
    return speed


def measure() -> MachineSpeed:
    """Run the probe: decode a 32 MB zstd Zarr array, time a float64 block Gram."""
    import zarr

    from rankfold.sources.zarr_array import ZarrSource

    rng = np.random.default_rng(0)
    rows, cols = 16384, 512
    block = (rng.standard_normal((rows, 32)) @ rng.standard_normal((32, cols))).astype(np.float32)
    folder = tempfile.mkdtemp(prefix="rankfold-probe-")
    try:
        path = os.path.join(folder, "probe.zarr")
        arr = zarr.create_array(path, shape=block.shape, chunks=(2048, cols), dtype=block.dtype)
        arr[...] = block
        source = ZarrSource(path)
        out = np.empty((rows, cols))
        times = []
        for _ in range(3):
            t0 = time.perf_counter()
            source.read("samples", 0, rows, out=out)
            times.append(time.perf_counter() - t0)
        source.close()
        read = block.nbytes / float(np.median(times))
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    b = out[:8192]
    times = []
    for _ in range(3):
        t0 = time.perf_counter()
        b.T @ b
        times.append(time.perf_counter() - t0)
    gemm = 2.0 * b.shape[0] * cols * cols / float(np.median(times))
    stamp = time.strftime("%Y-%m-%d %H:%M", time.localtime())
    return MachineSpeed(read, gemm, os.cpu_count() or 1, f"probe {stamp}, cached in {cache_path()}")

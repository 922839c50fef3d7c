#!/usr/bin/env python
"""Tall-table benchmark: rankfold's feature-Gram route against the obvious alternatives.

Builds (once, cached under ``bench/.cache/``) an ``n x m`` float32 table with a few
strong latent factors, unit noise and large column means, stored as a Zarr v3 array
(zstd, the zarr default) and as a Parquet file, then runs every contender in its own
subprocess and prints one table: median wall time, ratios to the plain numpy loop and
to dask.array measured in the same run, peak RSS, passes, bytes read and throughput.

Usage::

    .venv/bin/python bench/bench_tall.py                              # 1,000,000 x 512, 3 repeats
    .venv/bin/python bench/bench_tall.py --rows 100000 --repeat 1     # smoke run, < 1 minute

See bench/README.md for what each contender does and how to read the output.
"""

from __future__ import annotations

import argparse
import datetime
import json
import os
import platform
import resource
import shutil
import statistics
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
CACHE = os.path.join(HERE, ".cache")
RESULTS = os.path.join(HERE, "results")
MARK = "BENCH-RESULT "

# name -> (label, what it is); run order within one repeat.
CONTENDERS = {
    "read-zarr-slicing": ("zarr slicing, read only", "zarr arr[a:b] per block, float32, no arithmetic"),
    "read-rankfold-zarr": ("rankfold Zarr read only", "ZarrSource.read per block (float64), no arithmetic"),
    "read-rankfold-parquet": ("rankfold Parquet read only", "ParquetSource.read per block (float64), no arithmetic"),
    "rankfold-zarr": ("rankfold features, Zarr", "decompose(route='features', memory_limit)"),
    "rankfold-parquet": ("rankfold features, Parquet", "decompose(route='features', memory_limit)"),
    "numpy-loop": ("numpy loop (zarr slicing)", "read, center, B.T @ B, Chan merge per block"),
    "dask": ("dask.array", "from_zarr -> float64 -> X - mean -> Xc.T @ Xc, one compute"),
    "dask-mean-first": ("dask.array, mean first", "compute the mean, then (X - mu).T @ (X - mu)"),
    "numpy-inmem": ("numpy in memory", "load all, center, X.T @ X, eigh"),
}
DEFAULT_CONTENDERS = list(CONTENDERS)
LOOP = "numpy-loop"
DASK = "dask"
REFERENCE = "numpy-inmem"


# ---------------------------------------------------------------------------
# data: generated in row-group pieces, never the whole table in memory
# ---------------------------------------------------------------------------

def data_params(args) -> dict:
    return {
        "rows": args.rows, "cols": args.cols, "seed": args.seed, "dtype": "float32",
        "zarr_chunk_rows": args.chunk_rows, "parquet_row_group_rows": args.row_group_rows,
        "factors": [40.0, 25.0, 15.0, 8.0, 4.0],  # standard deviations of the planted scores
        "noise_sd": 1.0,
        "column_means": "10**uniform(3, 6), a fresh draw per column",
        "zarr_codec": "zarr v3 default (zstd level 0)",
        "parquet_compression": "snappy (pyarrow default), pyarrow default encodings",
        "format": 1,
    }


def data_dir(args) -> str:
    return os.path.join(CACHE, f"tall-{args.rows}x{args.cols}-s{args.seed}"
                               f"-c{args.chunk_rows}-rg{args.row_group_rows}")


def ensure_data(args) -> dict:
    """Paths of the cached stores, generating them first when absent or incomplete."""
    import numpy as np

    d = data_dir(args)
    params = data_params(args)
    meta_path = os.path.join(d, "params.json")
    zpath, ppath = os.path.join(d, "table.zarr"), os.path.join(d, "table.parquet")
    if os.path.exists(meta_path):
        with open(meta_path) as fh:
            meta = json.load(fh)
        if meta.get("params") == params:
            log(f"data: cached {d}")
            return meta
    if os.path.exists(d):
        shutil.rmtree(d)
    os.makedirs(d)
    import pyarrow as pa
    import pyarrow.parquet as pq
    import zarr

    n, m = args.rows, args.cols
    rng = np.random.default_rng([args.seed, 0])
    strengths = np.array(params["factors"])
    k = len(strengths)
    axes, _ = np.linalg.qr(rng.standard_normal((m, k)))  # orthonormal planted loadings (m, k)
    mix = (axes * strengths).T                              # (k, m)
    means = 10.0 ** rng.uniform(3, 6, size=m)
    names = [f"f{j:03d}" for j in range(m)]
    arr = zarr.create_array(store=zpath, shape=(n, m), chunks=(min(args.chunk_rows, n), m),
                            dtype="float32", zarr_format=3, dimension_names=("sample", "feature"))
    schema = pa.schema([(name, pa.float32()) for name in names])
    t0 = time.perf_counter()
    piece = args.row_group_rows
    with pq.ParquetWriter(ppath, schema, compression="snappy") as writer:
        for i, a in enumerate(range(0, n, piece)):
            b = min(n, a + piece)
            prng = np.random.default_rng([args.seed, 1, i])
            block = prng.standard_normal((b - a, k)) @ mix
            block += prng.standard_normal((b - a, m), dtype=np.float32) * params["noise_sd"]
            block += means
            x = block.astype(np.float32)
            del block
            arr[a:b] = x
            cols = np.ascontiguousarray(x.T)
            writer.write_table(pa.Table.from_arrays([pa.array(c) for c in cols], schema=schema),
                               row_group_size=piece)
            del x, cols
            log(f"data: wrote rows {a:,}-{b:,} of {n:,} ({time.perf_counter() - t0:.0f} s)", end="\r")
    log("")
    meta = {"params": params, "zarr": zpath, "parquet": ppath,
            "zarr_bytes": tree_bytes(zpath), "parquet_bytes": tree_bytes(ppath),
            "planted_variances": (strengths ** 2 + params["noise_sd"] ** 2).tolist(),
            "seconds_to_generate": round(time.perf_counter() - t0, 1)}
    with open(meta_path + ".tmp", "w") as fh:
        json.dump(meta, fh, indent=1)
    os.replace(meta_path + ".tmp", meta_path)  # written last: marks the cache complete
    log(f"data: generated {d} in {meta['seconds_to_generate']} s")
    return meta


def tree_bytes(path: str) -> int:
    if os.path.isfile(path):
        return os.path.getsize(path)
    return sum(os.path.getsize(os.path.join(r, f)) for r, _d, fs in os.walk(path) for f in fs)


def warm_cache(paths) -> tuple[int, float]:
    """Read every file once so that all contenders start on a warm page cache."""
    total, t0 = 0, time.perf_counter()
    for p in paths:
        files = [p] if os.path.isfile(p) else [os.path.join(r, f) for r, _d, fs in os.walk(p) for f in fs]
        for f in files:
            with open(f, "rb", buffering=0) as fh:
                while chunk := fh.read(1 << 24):
                    total += len(chunk)
    return total, time.perf_counter() - t0


# ---------------------------------------------------------------------------
# child side: one contender, one run, its own process
# ---------------------------------------------------------------------------

def maxrss() -> int:
    """ru_maxrss in bytes (Linux reports KiB).

    Caution: Linux carries ru_maxrss across fork and exec, so a child starts with
    its parent's high-water mark; the parent here stays small (data generation
    runs in a child of its own) so that the value is the child's own.
    """
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def proc_status(field: str) -> int:
    """``VmRSS`` or ``VmHWM`` (peak RSS of this process image, reset at exec) in bytes."""
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(field + ":"):
                return int(line.split()[1]) * 1024
    return 0


def rchar() -> int:
    """Bytes this process has read through read()/pread() so far (page cache hits included)."""
    with open("/proc/self/io") as fh:
        for line in fh:
            if line.startswith("rchar:"):
                return int(line.split()[1])
    return 0


def cpu_jiffies() -> tuple[int, int]:
    """(busy, total) clock ticks of all CPUs since boot, from /proc/stat."""
    with open("/proc/stat") as fh:
        v = [int(x) for x in fh.readline().split()[1:]]
    idle = v[3] + (v[4] if len(v) > 4 else 0)  # idle + iowait
    total = sum(v[:8])  # guest time is already inside user
    return total - idle, total


def own_cpu_seconds() -> float:
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def wait_for_quiet(limit: float, threshold: float = 0.15) -> float:
    """Wait (up to ``limit`` s) until the machine is nearly idle; return the busy share last seen.

    Other programs sharing the two cores (test suites, other benchmarks) change every
    timing here by more than the effects being measured.
    """
    deadline = time.monotonic() + limit
    while True:
        b0, t0 = cpu_jiffies()
        time.sleep(0.5)
        b1, t1 = cpu_jiffies()
        share = (b1 - b0) / max(1, t1 - t0)
        if share <= threshold or time.monotonic() >= deadline:
            return share
        time.sleep(1.5)


def cpu_probe() -> float:
    """GFLOP/s of one 1536^3 float64 GEMM now: the shared machine's speed varies a lot."""
    import numpy as np

    a = np.ones((1536, 1536))
    a @ a
    t0 = time.perf_counter()
    a @ a
    return 2 * 1536 ** 3 / (time.perf_counter() - t0) / 1e9


def rankfold_partition(path: str, memory_limit: str, rank: int):
    """The sample blocks rankfold's feature route cuts ``path`` into (same arithmetic as routes/features.py)."""
    from rankfold import open_source
    from rankfold.memory import block_budget, parse_memory
    from rankfold.routes import features

    src = open_source(path)
    fixed = features.fixed_bytes(src.n_samples, src.n_features, rank) + src.fixed_read_bytes("samples")
    budget = block_budget(parse_memory(memory_limit), fixed, src.bytes_per_unit("samples"), "bench")
    return src, src.partition("samples", budget)


def top_eigenvalues(comoment, count: int, rank: int) -> list:
    import numpy as np

    values = np.linalg.eigvalsh(comoment / (count - 1))
    return values[::-1][:rank].tolist()


def child_imports(name: str):
    """Import what the contender needs before the baseline RSS is taken."""
    import numpy  # noqa: F401
    import scipy.linalg  # noqa: F401
    import zarr  # noqa: F401

    if name.startswith(("rankfold", "read-rankfold")) or name in ("numpy-loop", "read-zarr-slicing", "gemm"):
        import rankfold  # noqa: F401
        import rankfold.routes.features  # noqa: F401
        import rankfold.sources.readahead  # noqa: F401
    if name.startswith("rankfold"):
        try:  # decompose() plans with a cached machine probe: make sure it is cached, untimed
            from rankfold.machine import machine_speed
        except ImportError:
            pass
        else:
            machine_speed()
    if "parquet" in name:
        import pyarrow.parquet  # noqa: F401
    if name.startswith("dask"):
        import dask.array  # noqa: F401


def run_contender(name: str, meta: dict, args) -> dict:
    import numpy as np

    zpath, ppath = meta["zarr"], meta["parquet"]
    rank, limit = args.rank, args.memory_limit

    if name in ("rankfold-zarr", "rankfold-parquet"):
        import rankfold

        path = zpath if name.endswith("zarr") else ppath
        res = rankfold.decompose(path, rank, route="features", memory_limit=limit)
        passes = res.attrs["passes"]
        return {"eigenvalues": res.variance.tolist(), "passes": len(passes),
                "decoded_bytes": sum(p["bytes_read"] for p in passes),
                "blocks": passes[0]["blocks"], "block_rows": passes[0]["largest_block"],
                "pass_seconds": [p["seconds"] for p in passes]}

    if name in ("read-rankfold-zarr", "read-rankfold-parquet"):
        from rankfold.sources.readahead import iter_blocks

        path = zpath if name.endswith("zarr") else ppath
        src, part = rankfold_partition(path, limit, rank)
        itemsize = src.storage_dtype.itemsize
        decoded = 0
        # The route's own reader (read-ahead thread, its buffers), with nothing done to the blocks.
        for _i, _start, block in iter_blocks(src, part):
            decoded += block.size * itemsize
            del block
        src.close()
        return {"passes": 1, "decoded_bytes": decoded, "blocks": len(part), "block_rows": part.largest}

    if name in ("read-zarr-slicing", "numpy-loop"):
        import zarr

        src, part = rankfold_partition(zpath, limit, rank)
        src.close()
        arr = zarr.open_array(zpath, mode="r")
        n, m = arr.shape
        decoded = 0
        if name == "read-zarr-slicing":
            for a, b in part.bounds:
                x = arr[a:b]
                decoded += x.nbytes
                del x
            return {"passes": 1, "decoded_bytes": decoded, "blocks": len(part), "block_rows": part.largest}
        count, mean, comoment = 0, np.zeros(m), np.zeros((m, m))
        for a, b in part.bounds:
            x = arr[a:b]
            decoded += x.nbytes
            block = x.astype(np.float64)
            del x
            rows = b - a
            mean_b = block.mean(axis=0)
            block -= mean_b
            gram = block.T @ block
            del block
            if count == 0:
                count, mean, comoment = rows, mean_b, gram
                continue
            total = count + rows  # Chan, Golub & LeVeque pairwise update
            delta = mean_b - mean
            mean = mean + delta * (rows / total)
            comoment += gram
            comoment += np.outer(delta, delta * (count * rows / total))
            count = total
        return {"eigenvalues": top_eigenvalues(comoment, count, rank), "passes": 1,
                "decoded_bytes": decoded, "blocks": len(part), "block_rows": part.largest}

    if name in ("dask", "dask-mean-first"):
        import dask
        import dask.array as da

        x = da.from_zarr(zpath).astype(np.float64)
        n = x.shape[0]
        if name == "dask":
            xc = x - x.mean(axis=0)
            gram = (xc.T @ xc).compute()
            passes = 1
        else:
            mu = x.mean(axis=0).compute()
            xc = x - mu
            gram = (xc.T @ xc).compute()
            passes = 2
        return {"eigenvalues": top_eigenvalues(gram, n, rank), "passes": passes,
                "decoded_bytes": passes * int(np.prod(x.shape)) * 4, "blocks": x.numblocks[0],
                "block_rows": x.chunks[0][0], "scheduler": str(dask.config.get("scheduler", "threads"))}

    if name == "numpy-inmem":
        import zarr

        x = zarr.open_array(zpath, mode="r")[:]
        decoded = x.nbytes
        x = x.astype(np.float64)  # the float32 copy is freed here
        mean = x.mean(axis=0)
        x -= mean
        gram = x.T @ x
        n = x.shape[0]
        del x
        return {"eigenvalues": top_eigenvalues(gram, n, rank), "passes": 1, "decoded_bytes": decoded,
                "blocks": 1, "block_rows": n}

    raise SystemExit(f"unknown contender {name!r}")


def run_gemm(meta: dict, args) -> dict:
    """B.T @ B four ways on a float64 block of the size rankfold folds, variants interleaved."""
    import numpy as np
    import scipy.linalg.blas as blas
    from threadpoolctl import threadpool_info

    src, part = rankfold_partition(meta["zarr"], args.memory_limit, args.rank)
    src.close()
    rows, m = part.largest, args.cols
    b = np.random.default_rng(0).standard_normal((rows, m))
    c = b.copy()
    bt = b.T  # Fortran-ordered (m, rows) view: what the Fortran BLAS wrappers take without a copy
    variants = {
        "numpy B.T @ B": lambda: b.T @ b,
        "numpy B.T @ C (C a copy of B: gemm)": lambda: b.T @ c,
        "scipy dgemm(B.T, B.T, trans_b=1)": lambda: blas.dgemm(1.0, bt, bt, trans_b=1),
        "scipy dsyrk(B.T) (upper triangle)": lambda: blas.dsyrk(1.0, bt),
    }
    times = {k: [] for k in variants}
    ref = b.T @ c
    errors = {}
    for k, f in variants.items():
        out = f()
        errors[k] = float(np.abs(np.triu(out) - np.triu(ref)).max() / np.abs(ref).max())
    for _ in range(max(3, 2 * args.repeat)):
        for k, f in variants.items():
            time.sleep(0.2)  # let the other BLAS library's spinning threads go idle
            t0 = time.perf_counter()
            f()
            times[k].append(time.perf_counter() - t0)
    libs = [f"{i['internal_api']} {i['version']} ({os.path.basename(i['filepath'])}, "
            f"{i['num_threads']} threads, {i.get('architecture')})" for i in threadpool_info()]
    return {"rows": rows, "cols": m, "times": times, "errors": errors, "blas": libs}


def child_main(args) -> None:
    if args.child == "generate":
        ensure_data(args)
        return
    with open(os.path.join(args.data, "params.json")) as fh:
        meta = json.load(fh)
    child_imports(args.child)
    probe = cpu_probe()
    if args.child == "gemm":
        busy0, own0, t0 = cpu_jiffies()[0], own_cpu_seconds(), time.perf_counter()
        out = run_gemm(meta, args)
        wall = time.perf_counter() - t0
        others = max(0.0, (cpu_jiffies()[0] - busy0) / os.sysconf("SC_CLK_TCK") - (own_cpu_seconds() - own0))
        out["others_cpu_share"] = others / (wall * (os.cpu_count() or 1))
        print(MARK + json.dumps(out), flush=True)
        return
    base_peak, base_now, base_hwm, r0 = maxrss(), proc_status("VmRSS"), proc_status("VmHWM"), rchar()
    busy0, _ = cpu_jiffies()
    own0 = own_cpu_seconds()
    t0 = time.perf_counter()
    out = run_contender(args.child, meta, args)
    out["wall"] = time.perf_counter() - t0
    busy1, _ = cpu_jiffies()
    own = own_cpu_seconds() - own0
    others = max(0.0, (busy1 - busy0) / os.sysconf("SC_CLK_TCK") - own)
    out.update(own_cpu=own, others_cpu_share=others / (out["wall"] * (os.cpu_count() or 1)))
    if "rankfold" in sys.modules:
        out["rankfold_file"] = sys.modules["rankfold"].__file__
    out.update(peak_rss=maxrss(), hwm=proc_status("VmHWM"), base_rss=base_now, base_peak_rss=base_peak,
               base_hwm=base_hwm, file_bytes_read=rchar() - r0, cpu_gflops=probe)
    print(MARK + json.dumps(out), flush=True)


# ---------------------------------------------------------------------------
# parent side: run children, collect, print
# ---------------------------------------------------------------------------

def log(msg: str, end: str = "\n") -> None:
    print(msg, end=end, file=sys.stderr, flush=True)


def common_args(args) -> list[str]:
    return ["--rows", str(args.rows), "--cols", str(args.cols), "--rank", str(args.rank),
            "--memory-limit", args.memory_limit, "--repeat", str(args.repeat), "--seed", str(args.seed),
            "--chunk-rows", str(args.chunk_rows), "--row-group-rows", str(args.row_group_rows)]


def spawn(child: str, args, data: str, env: dict | None = None) -> dict:
    cmd = [sys.executable, os.path.abspath(__file__), "--child", child, "--data", data] + common_args(args)
    proc = subprocess.run(cmd, stdout=subprocess.PIPE, text=True,
                          env=None if env is None else {**os.environ, **env})
    for line in proc.stdout.splitlines():
        if line.startswith(MARK):
            return json.loads(line[len(MARK):])
    return {"error": f"exit code {proc.returncode}", "stdout": proc.stdout[-2000:]}


def fmt_bytes(n) -> str:
    return "-" if n is None else f"{n / 1e9:.2f} GB" if n >= 1e9 else f"{n / 1e6:.0f} MB"


def summarize(name: str, runs: list[dict], meta: dict, store_bytes: int, max_others: float = 1.0) -> dict:
    ok = [r for r in runs if "error" not in r]
    if not ok:
        return {"name": name, "error": runs[0]["error"] if runs else "not run"}
    # Runs during which other programs took the CPUs say little about the contender: use the
    # clean ones when there are any.
    clean = [r for r in ok if r.get("others_cpu_share", 0.0) <= max_others]
    n_all = len(ok)
    ok = clean or ok
    walls = [r["wall"] for r in ok]
    med = statistics.median(walls)
    first = ok[0]
    return {
        "name": name, "wall": med, "wall_min": min(walls), "wall_max": max(walls), "n": len(ok), "n_all": n_all,
        "clean": bool(clean),
        "peak_rss": max(r["peak_rss"] for r in ok), "hwm": max(r["hwm"] for r in ok),
        "base_rss": statistics.median(r["base_rss"] for r in ok),
        "delta_rss": max(r["peak_rss"] - r["base_rss"] for r in ok),
        "passes": first["passes"], "decoded_bytes": first["decoded_bytes"],
        "file_bytes_read": statistics.median(r["file_bytes_read"] for r in ok),
        "file_passes": statistics.median(r["file_bytes_read"] for r in ok) / store_bytes,
        "gbps": first["decoded_bytes"] / med / 1e9,
        "cpu_gflops": statistics.median(r["cpu_gflops"] for r in ok),
        "others": (max(r["others_cpu_share"] for r in ok) if all("others_cpu_share" in r for r in ok) else None),
        "n_clean": len(clean),
        "blocks": first.get("blocks"), "block_rows": first.get("block_rows"),
        "eigenvalues": first.get("eigenvalues"), "walls": walls,
        "pass_seconds": first.get("pass_seconds"),
    }


def make_snapshot() -> tuple[str, str]:
    """Extract src/ of the current commit under bench/.cache/ (git archive: read-only for git).

    Children then import rankfold from there (PYTHONPATH comes before the editable install's
    path), so commits or edits made while a long run is going on do not mix versions.
    """
    root = os.path.dirname(HERE)
    head = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=root, capture_output=True, text=True,
                          check=True).stdout.strip()
    dest = os.path.join(CACHE, f"src-{head}")
    if not os.path.exists(os.path.join(dest, "src", "rankfold", "__init__.py")):
        tmp = dest + f".tmp{os.getpid()}"
        os.makedirs(tmp, exist_ok=True)
        archive = subprocess.run(["git", "archive", "--format=tar", "HEAD", "src"], cwd=root,
                                 capture_output=True, check=True).stdout
        subprocess.run(["tar", "-x", "-C", tmp], input=archive, check=True)
        if os.path.exists(dest):
            shutil.rmtree(dest)
        os.replace(tmp, dest)
    return head, os.path.join(dest, "src")


def rankfold_version() -> str:
    """The commit the benchmarked rankfold comes from, and whether src/ differs from it."""
    if os.environ.get("BENCH_SNAPSHOT"):
        return f"snapshot of commit {os.environ['BENCH_SNAPSHOT']} (src/ extracted with git archive)"
    root = os.path.dirname(HERE)
    try:
        head = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=root, capture_output=True,
                              text=True, check=True).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--", "src"], cwd=root, capture_output=True,
                               text=True, check=True).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        return "unknown (not a git checkout)"
    return f"commit {head}" + (" with uncommitted changes under src/" if dirty else ", src/ clean")


def render(args, meta, summaries: dict, gemm: dict | None, warm, version: str | None = None) -> str:
    n, m = args.rows, args.cols
    L = []
    L.append(f"rankfold tall benchmark  {datetime.datetime.now().isoformat(timespec='seconds')}")
    L.append(f"command: {' '.join([os.path.relpath(sys.executable, os.getcwd())] + sys.argv)}")
    L.append(f"table: {n:,} x {m} float32 ({n * m * 4 / 1e9:.2f} GB decoded); Zarr {fmt_bytes(meta['zarr_bytes'])} "
             f"on disk (chunks {args.chunk_rows} x {m}, zstd), Parquet {fmt_bytes(meta['parquet_bytes'])} "
             f"(row groups {args.row_group_rows}, snappy); rank {args.rank}; memory_limit {args.memory_limit}")
    L.append(f"rankfold: {version or rankfold_version()}")
    L.append(f"machine: {os.cpu_count()} cores, {platform.machine()}, Python {platform.python_version()}; "
             f"page cache warm (warm-up read {fmt_bytes(warm[0])} in {warm[1]:.1f} s); "
             f"{args.repeat} repeat(s), contenders interleaved round-robin, each run in its own process")
    L.append("")
    loop, dask_ = summaries.get(LOOP), summaries.get(DASK)
    hdr = (f"{'contender':<28} {'median s':>8} {'min-max s':>11} {'x loop':>6} {'x dask':>6} "
           f"{'peak RSS':>9} {'VmHWM':>8} {'base':>7} {'peak-base':>9} {'passes':>6} {'decoded':>8} "
           f"{'file read':>9} {'GB/s':>5} {'blocks':>9} {'cpu GF/s':>8} {'others':>6} {'runs':>5}")
    L.append(hdr)
    L.append("-" * len(hdr))
    for name in CONTENDERS:
        s = summaries.get(name)
        if s is None:
            continue
        label = CONTENDERS[name][0]
        if "error" in s:
            L.append(f"{label:<28} FAILED: {s['error']}")
            continue
        rl = f"{s['wall'] / loop['wall']:.2f}" if loop and "error" not in loop else "-"
        rd = f"{s['wall'] / dask_['wall']:.2f}" if dask_ and "error" not in dask_ else "-"
        blocks = f"{s['blocks']}x{s['block_rows']}" if s["blocks"] else "-"
        others = "-" if s["others"] is None else f"{100 * s['others']:.0f}%"
        L.append(f"{label:<28} {s['wall']:8.2f} {s['wall_min']:5.1f}-{s['wall_max']:<5.1f} {rl:>6} {rd:>6} "
                 f"{fmt_bytes(s['peak_rss']):>9} {fmt_bytes(s['hwm']):>8} {fmt_bytes(s['base_rss']):>7} {fmt_bytes(s['delta_rss']):>9} "
                 f"{s['passes']:>6} {fmt_bytes(s['decoded_bytes']):>8} {fmt_bytes(s['file_bytes_read']):>9} "
                 f"{s['gbps']:5.2f} {blocks:>9} {s['cpu_gflops']:8.0f} {others:>6} "
                 f"{s['n']:>2}/{s['n_all']:<2}")
    L.append("")
    L.append("median s: median wall time of the repeats (imports excluded). x loop / x dask: median time over the")
    L.append("plain numpy loop's / dask.array's median. peak RSS: the child's ru_maxrss (largest over repeats);")
    L.append("VmHWM: the same peak from /proc/self/status (cannot be inherited from the parent); base: the child's")
    L.append("RSS after imports; peak-base: what the run itself added. decoded: float32 bytes delivered per run")
    L.append("(table size x passes). file read: bytes the process read from files (/proc/self/io rchar, page")
    L.append("cache included). GB/s: decoded / median s. cpu GF/s: a 1536^3 GEMM probe at the start of each child")
    L.append("(median): the shared VM's speed drifts, compare rows only where these are close. others: the")
    L.append("largest share of the machine's CPU time other programs took during a run of this contender")
    L.append("(from /proc/stat); above a few percent, that row's time is inflated by them. runs: runs used /")
    L.append(f"runs made: only runs where others took <= {100 * args.max_others:.0f}% are used when there are any.")

    # eigenvalue agreement
    ref = summaries.get(REFERENCE)
    L.append("")
    if ref and ref.get("eigenvalues"):
        import numpy as np

        r = np.array(ref["eigenvalues"])
        L.append(f"eigenvalues vs numpy in memory (top {len(r)}: {r[0]:.4g} ... {r[-1]:.4g}; "
                 f"planted {', '.join(f'{v:.4g}' for v in meta['planted_variances'])}):")
        for name in CONTENDERS:
            s = summaries.get(name)
            if name == REFERENCE or not s or not s.get("eigenvalues"):
                continue
            rel = float(np.max(np.abs(np.array(s["eigenvalues"]) - r) / np.abs(r)))
            verdict = "PASS" if rel <= 1e-8 else "FAIL"
            L.append(f"  {CONTENDERS[name][0]:<28} max relative difference {rel:.1e}  [{verdict} <= 1e-08]")

    # targets
    L.append("")
    L.append("targets (two-core machine):")

    def target(text, ok):
        L.append(f"  [{'PASS' if ok else 'MISS'}] {text}")

    def good(*names):
        return all(summaries.get(k) and "error" not in summaries[k] for k in names)

    for fmt_name in ("rankfold-zarr", "rankfold-parquet"):
        s = summaries.get(fmt_name)
        if not good(fmt_name):
            continue
        lab = CONTENDERS[fmt_name][0]
        if good(DASK):
            q = s["wall"] / summaries[DASK]["wall"]
            target(f"{lab}: {q:.2f}x dask.array's time (target <= 0.6)", q <= 0.6)
        if good(LOOP):
            q = s["wall"] / summaries[LOOP]["wall"]
            target(f"{lab}: {q:.2f}x the plain numpy loop's time (target <= 0.5)", q <= 0.5)
        target(f"{lab}: peak RSS {fmt_bytes(s['peak_rss'])} (target < 1 GB = 1e9 bytes; "
               f"{fmt_bytes(s['delta_rss'])} above the post-import baseline)", s["peak_rss"] < 1e9)
    if good("read-rankfold-zarr", "read-zarr-slicing"):
        a, b = summaries["read-rankfold-zarr"], summaries["read-zarr-slicing"]
        q = b["wall"] / a["wall"]
        target(f"rankfold Zarr reading {a['gbps']:.2f} GB/s = {q:.2f}x zarr's plain row slicing "
               f"({b['gbps']:.2f} GB/s) (target >= 3x)", q >= 3)
    if good("read-rankfold-parquet"):
        s = summaries["read-rankfold-parquet"]
        block = s["block_rows"] * m * 8
        held = s["delta_rss"] / block
        target(f"rankfold Parquet reading {s['gbps']:.2f} GB/s (target >= 0.5 GB/s)", s["gbps"] >= 0.5)
        target(f"rankfold Parquet reading held {fmt_bytes(s['delta_rss'])} above baseline = {held:.1f} "
               f"float64 blocks of {s['block_rows']:,} rows ({fmt_bytes(block)}) (target <= 2)", held <= 2)

    # GEMM vs SYRK
    if gemm and "error" not in gemm:
        L.append("")
        rows = gemm["rows"]
        flops = 2 * rows * m * m
        L.append(f"B.T @ B on one float64 block of {rows:,} x {m} ({rows * m * 8 / 1e6:.0f} MB), variants interleaved, "
                 f"{len(next(iter(gemm['times'].values())))} runs each (GFLOP/s counted as 2*rows*m^2 for all):")
        for k, ts in gemm["times"].items():
            med = statistics.median(ts)
            L.append(f"  {k:<38} median {med * 1e3:7.1f} ms  min {min(ts) * 1e3:7.1f} ms  "
                     f"{flops / med / 1e9:6.1f} GFLOP/s  rel. err {gemm['errors'][k]:.0e}")
        for lib in gemm["blas"]:
            L.append(f"  BLAS: {lib}")
        if "others_cpu_share" in gemm:
            L.append(f"  other programs took {100 * gemm['others_cpu_share']:.0f}% of the CPUs meanwhile")
    elif gemm:
        L.append(f"GEMM microbenchmark FAILED: {gemm['error']}")

    # where rankfold's time goes
    rf = summaries.get("rankfold-zarr")
    rd = summaries.get("read-rankfold-zarr")
    if good("rankfold-zarr", "read-rankfold-zarr") and gemm and "error" not in gemm:
        per_block = statistics.median(gemm["times"]["numpy B.T @ B"])
        est = per_block * n / gemm["rows"]
        L.append("")
        L.append(f"rankfold Zarr breakdown: whole run {rf['wall']:.1f} s; reading alone {rd['wall']:.1f} s; "
                 f"B.T @ B alone about {est:.1f} s ({n:,} rows at the block GEMM rate above); perfect overlap "
                 f"would take max = {max(rd['wall'], est):.1f} s, no overlap the sum = {rd['wall'] + est:.1f} s")
    L.append("")
    L.append("All times on a warm page cache. Uncached, this machine's disk reads ~33 MB/s, so each pass over the")
    L.append(f"Zarr store ({fmt_bytes(meta['zarr_bytes'])}) would cost ~{meta['zarr_bytes'] / 33e6:.0f} s and the "
             f"number of passes decides the time.")
    return "\n".join(L)


def rerender(args) -> None:
    """Print (and save beside it) the table of a saved run again, with the current selection rules."""
    with open(args.from_json) as fh:
        saved = json.load(fh)
    for k, v in saved["args"].items():
        if k not in ("from_json", "max_others"):
            setattr(args, k, v)
    meta, runs, discarded = saved["meta"], saved["runs"], saved.get("discarded", {})
    store_bytes = {n: meta["parquet_bytes"] if "parquet" in n else meta["zarr_bytes"] for n in CONTENDERS}
    summaries = {n: summarize(n, runs[n] + discarded.get(n, []), meta, store_bytes[n], args.max_others)
                 for n in runs}
    text = render(args, meta, summaries, saved.get("gemm"), saved.get("warm", (0, 0.0)),
                  saved.get("rankfold_version", "not recorded in this file"))
    print(text)
    out = os.path.splitext(args.from_json)[0] + ".rerendered.txt"
    with open(out, "w") as fh:
        fh.write(text + "\n")
    log(f"saved {os.path.relpath(out, os.getcwd())}")


def parent_main(args) -> None:
    # rankfold caches a machine probe; keep the benchmark's own, so runs do not depend on ~/.cache.
    os.environ.setdefault("RANKFOLD_CACHE_DIR", os.path.join(CACHE, "rankfold-machine"))
    if args.snapshot:
        head, snap = make_snapshot()
        os.environ["BENCH_SNAPSHOT"] = head
        os.environ["PYTHONPATH"] = snap + (os.pathsep + os.environ["PYTHONPATH"] if os.environ.get("PYTHONPATH") else "")
        log(f"rankfold: snapshot of commit {head} in {os.path.relpath(snap, os.getcwd())}")
    version_at_start = rankfold_version()
    names = args.contenders.split(",") if args.contenders else list(DEFAULT_CONTENDERS)
    unknown = [c for c in names if c not in CONTENDERS]
    if unknown:
        raise SystemExit(f"unknown contender(s) {', '.join(unknown)}; choose from {', '.join(CONTENDERS)}")
    data = data_dir(args)
    # Generate in a child: the parent must stay small, since Linux hands its ru_maxrss to every child.
    gen = subprocess.run([sys.executable, os.path.abspath(__file__), "--child", "generate"] + common_args(args))
    if gen.returncode:
        raise SystemExit(f"data generation failed (exit code {gen.returncode})")
    with open(os.path.join(data, "params.json")) as fh:
        meta = json.load(fh)
    if args.generate_only:
        return
    warm = warm_cache([meta["zarr"], meta["parquet"]])
    log(f"warm-up read {fmt_bytes(warm[0])} in {warm[1]:.1f} s")
    store_bytes = {name: meta["parquet_bytes"] if "parquet" in name else meta["zarr_bytes"] for name in CONTENDERS}
    runs: dict[str, list] = {name: [] for name in names}
    discarded: dict[str, list] = {}
    t_start = time.perf_counter()
    gemm = None
    if not args.no_gemm:
        if args.quiet_wait > 0:
            wait_for_quiet(args.quiet_wait)
        log("gemm vs syrk microbenchmark ...", end=" ")
        gemm = spawn("gemm", args, data)
        log("done" if "error" not in gemm else gemm["error"])
    for rep in range(args.repeat):
        for name in names:
            for attempt in range(1 + args.retries):
                time.sleep(args.pause)
                busy = wait_for_quiet(args.quiet_wait) if args.quiet_wait > 0 else 0.0
                log(f"[{rep + 1}/{args.repeat}] {name:<22}", end=" ")
                r = spawn(name, args, data)
                r["busy_before"] = busy
                if "error" in r:
                    log(f"FAILED ({r['error']})\n{r.get('stdout', '')}")
                    break
                log(f"{r['wall']:7.2f} s  peak RSS {fmt_bytes(r['peak_rss'])}  cpu probe {r['cpu_gflops']:.0f} GF/s"
                    f"  others {100 * r['others_cpu_share']:.0f}% of the CPUs")
                if r["others_cpu_share"] <= args.max_others or attempt == args.retries:
                    break
                discarded.setdefault(name, []).append(r)
                log("    (discarded: other programs were using the CPUs; running it again)")
            runs[name].append(r)
    log(f"all runs: {time.perf_counter() - t_start:.0f} s")
    summaries = {name: summarize(name, runs[name] + discarded.get(name, []), meta, store_bytes[name],
                                 args.max_others) for name in names}
    text = render(args, meta, summaries, gemm, warm, version_at_start)
    if discarded:
        text += ("\nruns discarded because other programs used more than "
                 f"{100 * args.max_others:.0f}% of the CPUs: "
                 + ", ".join(f"{k} {len(v)}" for k, v in discarded.items()))
    if rankfold_version() != version_at_start:
        text += f"\nWARNING: rankfold changed during the run (from {version_at_start}); results mix versions."
    print(text)
    if not args.no_save:
        os.makedirs(RESULTS, exist_ok=True)
        stamp = datetime.datetime.now().strftime("%Y-%m-%d-%H%M")
        base = os.path.join(RESULTS, f"tall-{stamp}-{args.rows}x{args.cols}")
        with open(base + ".txt", "w") as fh:
            fh.write(text + "\n")
        with open(base + ".json", "w") as fh:
            json.dump({"args": vars(args), "meta": meta, "runs": runs, "discarded": discarded, "gemm": gemm,
                       "warm": warm, "rankfold_version": version_at_start,
                       "rankfold_version_at_end": rankfold_version()},
                      fh, indent=1)
        log(f"saved {os.path.relpath(base, os.getcwd())}.txt (and .json with every run)")


def main(argv=None) -> None:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--rows", type=int, default=1_000_000, help="samples (default 1,000,000)")
    p.add_argument("--cols", type=int, default=512, help="features (default 512)")
    p.add_argument("--repeat", type=int, default=3, help="runs per contender; the median is reported (default 3)")
    p.add_argument("--rank", type=int, default=20, help="components asked of rankfold (default 20)")
    p.add_argument("--memory-limit", default="1GB", help="rankfold's memory_limit (default 1GB)")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--chunk-rows", type=int, default=16384, help="Zarr chunk rows (default 16384)")
    p.add_argument("--row-group-rows", type=int, default=65536, help="Parquet row group rows (default 65536)")
    p.add_argument("--contenders", help=f"comma-separated subset of: {', '.join(CONTENDERS)}")
    p.add_argument("--pause", type=float, default=0.5, help="seconds idle before each run (default 0.5)")
    p.add_argument("--quiet-wait", type=float, default=60.0,
                   help="before each run, wait up to this many seconds for other programs to leave the "
                        "CPUs nearly idle (default 60; 0 to skip)")
    p.add_argument("--max-others", type=float, default=0.10,
                   help="a run during which other programs took more than this share of the CPUs is "
                        "discarded and run again (default 0.10)")
    p.add_argument("--retries", type=int, default=2, help="re-runs allowed per contaminated run (default 2)")
    p.add_argument("--no-gemm", action="store_true", help="skip the GEMM vs SYRK microbenchmark")
    p.add_argument("--no-save", action="store_true", help="do not write bench/results/")
    p.add_argument("--generate-only", action="store_true", help="build the cached table and stop")
    p.add_argument("--snapshot", action="store_true",
                   help="benchmark src/ of the current commit, extracted under bench/.cache/, so that edits "
                        "made during the run do not mix versions")
    p.add_argument("--from-json", help="print the table of a saved run (bench/results/*.json) again")
    p.add_argument("--child", help=argparse.SUPPRESS)
    p.add_argument("--data", help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.row_group_rows % args.chunk_rows:
        p.error("--row-group-rows must be a multiple of --chunk-rows (the table is written in row groups)")
    if args.child:
        child_main(args)
    elif args.from_json:
        rerender(args)
    else:
        parent_main(args)


if __name__ == "__main__":
    main()

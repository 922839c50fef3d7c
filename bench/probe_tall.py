#!/usr/bin/env python
"""Where rankfold's time goes on the tall table: read paths, GEMM variants, the whole route.

Companion to bench_tall.py, for investigating a missed target.  Uses the table that
bench_tall.py cached (run it, or ``bench_tall.py --generate-only``, first).  Every
experiment runs its variants interleaved (A B C A B C ...) ``--repeat`` times in this one
process and prints medians, because the shared development VM's speed drifts
several-fold within minutes.  Monkeypatching here is only to estimate what a change in
src/ would buy; nothing under src/ is modified.

    .venv/bin/python bench/probe_tall.py zarr      # Zarr read paths
    .venv/bin/python bench/probe_tall.py parquet   # Parquet read paths and memory
    .venv/bin/python bench/probe_tall.py gemm      # B.T @ B variants and block sizes
    .venv/bin/python bench/probe_tall.py route     # decompose() with alternative settings
    .venv/bin/python bench/probe_tall.py malloc    # bench contenders with glibc block recycling
"""

from __future__ import annotations

import argparse
import gc
import os
import statistics
import sys
import time
from concurrent.futures import ThreadPoolExecutor

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import bench_tall  # noqa: E402


def interleave(variants: dict, repeat: int, work_bytes: float | None = None, flops: float | None = None,
               pause: float = 0.3) -> dict:
    times = {k: [] for k in variants}
    others = []
    for _ in range(repeat):
        for k, f in variants.items():
            gc.collect()
            time.sleep(pause)
            bench_tall.wait_for_quiet(30)
            busy0, own0 = bench_tall.cpu_jiffies()[0], bench_tall.own_cpu_seconds()
            t0 = time.perf_counter()
            f()
            dt = time.perf_counter() - t0
            times[k].append(dt)
            busy = (bench_tall.cpu_jiffies()[0] - busy0) / os.sysconf("SC_CLK_TCK")
            others.append(max(0.0, busy - (bench_tall.own_cpu_seconds() - own0)) / (dt * (os.cpu_count() or 1)))
    for k, ts in times.items():
        med = statistics.median(ts)
        extra = ""
        if work_bytes:
            extra += f"  {work_bytes / med / 1e9:6.2f} GB/s"
        if flops:
            extra += f"  {flops / med / 1e9:6.1f} GFLOP/s"
        first = next(iter(times.values()))
        paired = statistics.median(t / f for t, f in zip(ts, first))
        print(f"  {k:<58} median {med:8.3f} s  (min {min(ts):.3f}, max {max(ts):.3f}){extra}  "
              f"paired ratio to the first {paired:.2f}", flush=True)
    print("  per round: " + " | ".join(" ".join(f"{times[k][i]:.2f}" for k in times) for i in range(repeat)))
    print(f"  other programs' share of the CPUs during the runs: median {100 * statistics.median(others):.0f}%, "
          f"max {100 * max(others):.0f}%")
    return times


def hwm() -> str:
    return f"VmHWM {bench_tall.proc_status('VmHWM') / 1e6:.0f} MB, VmRSS {bench_tall.proc_status('VmRSS') / 1e6:.0f} MB"


# ---------------------------------------------------------------------------

def zarr_probe(meta, args):
    import numcodecs
    import zarr

    from rankfold import open_source

    zpath = meta["zarr"]
    src, part = bench_tall.rankfold_partition(zpath, args.memory_limit, args.rank)
    arr = zarr.open_array(zpath, mode="r")
    n, m = arr.shape
    crows = arr.chunks[0]
    total = n * m * 4
    print(f"Zarr {n:,} x {m}, chunks {crows} rows, blocks {len(part)} x {part.largest} rows; "
          f"GB/s counted on {total / 1e9:.2f} GB of float32")

    # 1. one chunk, one thread: what each stage costs
    key = os.path.join(zpath, "c", "3", "0")
    codec = numcodecs.Zstd()
    raw = open(key, "rb").read()
    f32 = np.frombuffer(codec.decode(raw), np.float32).reshape(-1, m)
    buf32 = np.empty(crows * m, np.float32)
    dst = np.empty((crows, m))
    stages = {
        "file read (page cache)": lambda: open(key, "rb").read(),
        "zstd decode, fresh buffer": lambda: codec.decode(raw),
        "zstd decode into a reused buffer": lambda: codec.decode(raw, out=buf32),
        "float32 -> float64 into a reused block": lambda: np.copyto(dst, f32),
        "float32 -> float64, fresh block (astype)": lambda: f32.astype(np.float64),
        "zarr arr[chunk] (one chunk, float32)": lambda: arr[3 * crows:4 * crows],
    }
    print(f"one chunk ({crows * m * 4 / 1e6:.0f} MB float32, {len(raw) / 1e6:.0f} MB on disk), one thread:")
    interleave(stages, args.repeat, crows * m * 4)

    # 2. whole-table read paths over the same blocks
    pool2 = ThreadPoolExecutor(2)

    def zarr_slicing():
        for a, b in part.bounds:
            arr[a:b]

    def zarr_slicing_f64():
        for a, b in part.bounds:
            arr[a:b].astype(np.float64)

    def rankfold_read():
        for a, b in part.bounds:
            src.read("samples", a, b)

    def zarr_chunkwise_serial():
        for a, b in part.bounds:
            out = np.empty((b - a, m))
            for r in range(a, b, crows):
                out[r - a:min(b, r + crows) - a] = arr[r:min(b, r + crows)]

    def direct(threads: int, reuse: bool):
        pool = ThreadPoolExecutor(threads)
        bufs = {}
        blocks = [np.empty((part.largest, m)) for _ in range(2)] if reuse else None

        def piece(out, a, r0, r1):
            ci = r0 // crows
            with open(os.path.join(zpath, "c", str(ci), "0"), "rb") as fh:
                data = fh.read()
            if reuse:
                import threading
                tb = bufs.setdefault(threading.get_ident(), np.empty(crows * m, np.float32))
                dec = codec.decode(data, out=tb)
            else:
                dec = codec.decode(data)
            chunk = np.frombuffer(dec, np.float32)[:(min(n, (ci + 1) * crows) - ci * crows) * m].reshape(-1, m)
            out[r0 - a:r1 - a] = chunk[r0 - ci * crows:r1 - ci * crows]

        def run():
            for i, (a, b) in enumerate(part.bounds):
                out = blocks[i % 2][:b - a] if reuse else np.empty((b - a, m))
                list(pool.map(lambda r: piece(out, a, r, min(b, r + crows)), range(a, b, crows)))
        return run

    def with_zarr_config(cfg, f):
        def run():
            with zarr.config.set(cfg):
                f()
        return run

    variants = {
        "zarr arr[a:b] per block (float32)": zarr_slicing,
        "zarr arr[a:b] per block + astype(float64)": zarr_slicing_f64,
        "rankfold ZarrSource.read (2 threads, chunk pieces, float64)": rankfold_read,
        "zarr one chunk at a time, serial, into float64": zarr_chunkwise_serial,
        "zarr arr[a:b], async.concurrency=1": with_zarr_config({"async.concurrency": 1}, zarr_slicing),
        "zarr arr[a:b], async.concurrency=2": with_zarr_config({"async.concurrency": 2}, zarr_slicing),
        "rankfold read, zarr threading.max_workers=2": with_zarr_config({"threading.max_workers": 2}, rankfold_read),
        "direct: file read + numcodecs zstd, 1 thread, float64": direct(1, False),
        "direct: file read + numcodecs zstd, 2 threads, float64": direct(2, False),
        "direct: 2 threads, reused decode buffers and blocks": direct(2, True),
    }
    print(f"all {len(part)} blocks, {args.repeat} interleaved runs:")
    interleave(variants, args.repeat, total)
    pool2.shutdown()
    src.close()


# ---------------------------------------------------------------------------

def parquet_probe(meta, args):
    import pyarrow as pa
    import pyarrow.parquet as pq

    from rankfold.sources.parquet import ParquetSource

    ppath = meta["parquet"]
    src, part = bench_tall.rankfold_partition(ppath, args.memory_limit, args.rank)
    n, m = src.shape
    total = n * m * 4
    pf = pq.ParquetFile(ppath)
    groups = [pf.metadata.row_group(i).num_rows for i in range(pf.num_row_groups)]
    print(f"Parquet {n:,} x {m}, {len(groups)} row groups of {groups[0]} rows, rankfold blocks "
          f"{len(part)} x up to {part.largest} rows; GB/s counted on {total / 1e9:.2f} GB of float32")
    names = list(src.feature_names)
    print(f"  before: {hwm()}")

    # memory: does ParquetSource keep finished streams?
    s2 = ParquetSource(ppath)
    for a, b in part.bounds[:8]:
        s2.read("samples", a, b)
    print(f"  after 8 blocks of ParquetSource.read: {len(s2._streams)} batch streams kept, {hwm()}")
    s2.close()
    del s2
    gc.collect()

    def rankfold_read():
        s = ParquetSource(ppath)
        for a, b in part.bounds:
            s.read("samples", a, b)
        s.close()

    def rankfold_read_aligned():
        # what ParquetSource does when a block is exactly one row group (read_row_group path)
        s = ParquetSource(ppath)
        row = 0
        for g in groups:
            s.read("samples", row, row + g)
            row += g
        s.close()

    def rg_columns_then_transpose():
        # columns memcpy'd into a (m, rows) float32 array, then one cast-and-transpose copy
        for i, g in enumerate(groups):
            t = pf.read_row_group(i, columns=names, use_threads=True)
            tmp = np.empty((m, g), np.float32)
            for j in range(m):
                tmp[j] = t.column(j).to_numpy()
            del t
            out = np.empty((g, m))
            out[:] = tmp.T

    def rg_columns_transpose_tiled():
        for i, g in enumerate(groups):
            t = pf.read_row_group(i, columns=names, use_threads=True)
            out = np.empty((g, m))
            step = 64
            for j0 in range(0, m, step):
                tile = np.stack([t.column(j).to_numpy() for j in range(j0, min(m, j0 + step))])
                out[:, j0:j0 + tile.shape[0]] = tile.T
            del t

    def rg_to_tensor():
        for i, g in enumerate(groups):
            t = pf.read_row_group(i, columns=names, use_threads=True)
            batch = t.combine_chunks().to_batches()[0]
            x = np.asarray(batch.to_tensor(row_major=True))
            del t, batch
            out = x.astype(np.float64)
            del x, out

    def rg_decode_only():
        for i in range(len(groups)):
            pf.read_row_group(i, columns=names, use_threads=True)

    variants = {
        "rankfold ParquetSource.read, its partition (split row groups)": rankfold_read,
        "rankfold ParquetSource.read, one row group per block": rankfold_read_aligned,
        "pyarrow read_row_group only (decode, no numpy)": rg_decode_only,
        "read_row_group, columns -> (m, rows) f32, out[:] = tmp.T": rg_columns_then_transpose,
        "read_row_group, 64-column tiles -> float64 block": rg_columns_transpose_tiled,
        "read_row_group, RecordBatch.to_tensor(row_major) + astype": rg_to_tensor,
    }
    print(f"all rows, {args.repeat} interleaved runs:")
    interleave(variants, args.repeat, total)
    print(f"  after: {hwm()}")


# ---------------------------------------------------------------------------

def gemm_probe(meta, args):
    import scipy.linalg.blas as blas

    m = args.cols
    for rows in args.gemm_rows:
        b = np.random.default_rng(0).standard_normal((rows, m))
        flops = 2 * rows * m * m

        def panels(k):
            w = m // k

            def run():
                g = np.empty((m, m))
                for i in range(k):
                    bi = b[:, i * w:(i + 1) * w]
                    for j in range(i, k):
                        g[i * w:(i + 1) * w, j * w:(j + 1) * w] = bi.T @ b[:, j * w:(j + 1) * w]
                return g
            return run

        bt = b.T
        c = b.copy()
        variants = {
            "numpy B.T @ B": lambda: b.T @ b,
            "numpy B.T @ C (distinct buffers: gemm)": lambda: b.T @ c,
            "scipy dgemm(B.T, B.T, trans_b=1)": lambda: blas.dgemm(1.0, bt, bt, trans_b=1),
            "scipy dsyrk(B.T)": lambda: blas.dsyrk(1.0, bt),
            "numpy upper panels, 2 x 256 (3/4 of the flops)": panels(2),
            "numpy upper panels, 4 x 128 (5/8 of the flops)": panels(4),
        }
        ref = b.T @ c
        err = {k: float(np.abs(np.triu(f()) - np.triu(ref)).max() / np.abs(ref).max()) for k, f in variants.items()}
        print(f"B.T @ B, block {rows:,} x {m} float64, {args.repeat} interleaved runs (GFLOP/s on 2*rows*m^2; "
              f"max rel. error of the upper triangle {max(err.values()):.0e}):")
        interleave(variants, args.repeat, flops=flops)
        del b, c, bt


# ---------------------------------------------------------------------------

def route_probe(meta, args):
    import zarr
    from threadpoolctl import threadpool_limits

    import rankfold
    import rankfold.sources.zarr_array as za
    from rankfold.folds import feature_gram

    zpath = meta["zarr"]
    orig_update = feature_gram.FeatureGram.update
    try:  # decompose() plans with a cached machine probe: cache it now, outside the timings
        from rankfold.machine import machine_speed
        machine_speed()
    except ImportError:
        pass

    def decompose():
        return rankfold.decompose(zpath, args.rank, route="features", memory_limit=args.memory_limit)

    def patched(**kw):
        def run():
            saved = {}
            if "threads" in kw:
                saved["threads"], za.READ_THREADS = za.READ_THREADS, kw["threads"]
            if "update" in kw:
                feature_gram.FeatureGram.update = kw["update"]
            try:
                if "blas" in kw:
                    with threadpool_limits(kw["blas"]):
                        decompose()
                elif "zarr" in kw:
                    with zarr.config.set(kw["zarr"]):
                        decompose()
                else:
                    decompose()
            finally:
                if "threads" in saved:
                    za.READ_THREADS = saved["threads"]
                feature_gram.FeatureGram.update = orig_update
        return run

    def read_only():
        src, part = bench_tall.rankfold_partition(zpath, args.memory_limit, args.rank)
        from rankfold.sources.readahead import iter_blocks
        for _i, _a, _blk in iter_blocks(src, part):
            pass
        src.close()

    def gemm_only():
        src, part = bench_tall.rankfold_partition(zpath, args.memory_limit, args.rank)
        b = np.ones((part.largest, src.n_features))
        for a, c in part.bounds:
            blk = b[:c - a]
            blk.T @ blk
        src.close()

    import scipy.linalg.blas as blas

    def update_sub(rows):
        def update(self, block, start=0):
            for a in range(0, block.shape[0], rows):
                orig_update(self, block[a:a + rows], start + a)  # centers the view in place
            return self
        return update

    def update_syrk(self, block, start=0):
        if block.shape[0] == 0:
            return self
        mean_b = block.mean(axis=0)
        block -= mean_b
        upper = blas.dsyrk(1.0, block.T)
        self._combine(block.shape[0], mean_b, np.triu(upper) + np.triu(upper, 1).T)
        return self

    def lean_reader():
        """What a leaner ZarrSource._fill_rows would do: chunk files read and zstd-decoded by
        2 threads into per-thread reused buffers, bypassing zarr's codec pipeline (which
        allocates fresh buffers per chunk).  Only valid for this store's codecs (bytes + zstd)."""
        import threading

        import numcodecs

        codec = numcodecs.Zstd()
        state = {"ring": [], "i": 0}
        local = threading.local()
        pool = ThreadPoolExecutor(2)

        def fill_rows(self, start, stop, out):
            m, crows, n = self.stored_shape[1], self._chunk_rows, self.stored_shape[0]

            def piece(r0):
                r1 = min(stop, r0 + crows)
                ci = r0 // crows
                if getattr(local, "buf", np.empty(0)).size != crows * m:
                    local.buf = np.empty(crows * m, np.float32)
                with open(os.path.join(self.path, "c", str(ci), "0"), "rb") as fh:
                    dec = codec.decode(fh.read(), out=local.buf)
                chunk = np.frombuffer(dec, np.float32)[:(min(n, (ci + 1) * crows) - ci * crows) * m].reshape(-1, m)
                out[r0 - start:r1 - start] = chunk[r0 - ci * crows:r1 - ci * crows]
            list(pool.map(piece, range(start, stop, crows)))
        return fill_rows

    orig_fill = za.ZarrSource._fill_rows

    def patched_lean(blas=None):
        inner = patched(blas=blas) if blas else patched()

        def run():
            za.ZarrSource._fill_rows = lean_reader()
            try:
                inner()
            finally:
                za.ZarrSource._fill_rows = orig_fill
        return run

    variants = {
        "decompose, as is": patched(),
        "decompose, fold in sub-blocks of 16384 rows": patched(update=update_sub(16384)),
        "decompose, fold in sub-blocks of 8192 rows": patched(update=update_sub(8192)),
        "decompose, scipy dsyrk instead of B.T @ B": patched(update=update_syrk),
        "read-ahead pass only (iter_blocks, no arithmetic)": read_only,
        "B.T @ B only, same blocks (no reading)": gemm_only,
        "decompose, READ_THREADS=1": patched(threads=1),
        "decompose, BLAS limited to 1 thread": patched(blas=1),
        "decompose, zarr async.concurrency=2": patched(zarr={"async.concurrency": 2}),
        "decompose, BLAS 1 thread, sub-blocks of 8192 rows": patched(blas=1, update=update_sub(8192)),
        "decompose, BLAS 1 thread, scipy dsyrk": patched(blas=1, update=update_syrk),
        "decompose, lean Zarr reader (direct zstd, reused buffers)": patched_lean(),
        "decompose, lean Zarr reader, BLAS 1 thread": patched_lean(blas=1),
        "numpy loop (bench_tall contender)": lambda: bench_tall.run_contender("numpy-loop", meta, args),
        "dask.array (bench_tall contender)": lambda: bench_tall.run_contender("dask", meta, args),
    }
    if args.only:
        keep = [int(i) for i in args.only.split(",")]
        variants = {k: v for i, (k, v) in enumerate(variants.items()) if i in keep}
    print(f"rankfold.decompose(zarr, {args.rank}, route='features', memory_limit={args.memory_limit!r}), "
          f"{args.repeat} interleaved runs:")
    interleave(variants, args.repeat, meta["params"]["rows"] * meta["params"]["cols"] * 4)


def malloc_probe(meta, args):
    """Contenders in their own processes, with and without glibc settings that recycle big blocks.

    numpy takes every block from malloc, and glibc serves requests above 32 MB with a fresh
    mmap: each 201 MB block, 34 MB decoded chunk and 30 MB compressed chunk is page-faulted
    in (and zeroed by the kernel) again.  MALLOC_MMAP_MAX_=0 makes glibc serve them from the
    heap, and MALLOC_TRIM_THRESHOLD_ keeps freed heap memory mapped, so blocks are reused.
    """
    recycle = {"MALLOC_MMAP_MAX_": "0", "MALLOC_TRIM_THRESHOLD_": str(1 << 40)}
    names = args.contenders.split(",")
    variants = [(name, env) for name in names for env in (None, recycle)]
    runs = {(n, e is not None): [] for n, e in variants}
    data = bench_tall.data_dir(args)
    for rep in range(args.repeat):
        for name, env in variants:
            time.sleep(1)
            r = bench_tall.spawn(name, args, data, env)
            if "error" in r:
                print(f"  {name} failed: {r['error']}")
                continue
            runs[(name, env is not None)].append(r)
            print(f"  [{rep + 1}] {name:<22} {'recycling' if env else 'default  '} {r['wall']:7.2f} s  "
                  f"peak RSS {r['hwm'] / 1e6:5.0f} MB  probe {r['cpu_gflops']:.0f} GF/s", flush=True)
    print("medians (glibc default vs MALLOC_MMAP_MAX_=0 MALLOC_TRIM_THRESHOLD_=2**40):")
    for name in names:
        a, b = runs[(name, False)], runs[(name, True)]
        if a and b:
            ma, mb = statistics.median(r["wall"] for r in a), statistics.median(r["wall"] for r in b)
            print(f"  {name:<22} {ma:7.2f} s -> {mb:7.2f} s  ({mb / ma:.2f}x); peak RSS "
                  f"{max(r['hwm'] for r in a) / 1e6:.0f} MB -> {max(r['hwm'] for r in b) / 1e6:.0f} MB")


def main():
    os.environ.setdefault("RANKFOLD_CACHE_DIR", os.path.join(bench_tall.CACHE, "rankfold-machine"))
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("what", choices=["zarr", "parquet", "gemm", "route", "malloc"])
    p.add_argument("--rows", type=int, default=1_000_000)
    p.add_argument("--cols", type=int, default=512)
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--chunk-rows", type=int, default=16384)
    p.add_argument("--row-group-rows", type=int, default=65536)
    p.add_argument("--rank", type=int, default=20)
    p.add_argument("--memory-limit", default="1GB")
    p.add_argument("--repeat", type=int, default=3)
    p.add_argument("--contenders", default="read-zarr-slicing,read-rankfold-zarr,rankfold-zarr,numpy-loop",
                   help="bench_tall contenders for the malloc experiment")
    p.add_argument("--only", help="route experiment: comma-separated indices of the variants to run")
    p.add_argument("--gemm-rows", type=int, nargs="+", default=[49152, 16384])
    args = p.parse_args()
    d = bench_tall.data_dir(args)
    meta_path = os.path.join(d, "params.json")
    if not os.path.exists(meta_path):
        raise SystemExit(f"no cached table at {d}; run bench_tall.py --generate-only with the same options")
    import json
    with open(meta_path) as fh:
        meta = json.load(fh)
    {"zarr": zarr_probe, "parquet": parquet_probe, "gemm": gemm_probe, "route": route_probe,
     "malloc": malloc_probe}[args.what](meta, args)


if __name__ == "__main__":
    main()

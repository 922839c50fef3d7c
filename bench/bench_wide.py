#!/usr/bin/env python
"""Wide-table benchmark: rankfold's randomized route against dask.array's ``svd_compressed``.

Builds (once, cached under ``bench/.cache/``) an ``n x m`` float32 Zarr v3 table with a
planted, geometrically decaying spectrum, unit noise and large column means, then runs
every contender in its own subprocess, interleaved round-robin, and prints one table:
median wall time, ratio to dask, peak RSS, passes, the planner's estimates next to the
measured figures, and the top-``rank`` eigenvalue relative errors against rankfold's
exact feature-Gram route.  A second part re-runs the tall table of ``bench_tall.py``
with ``route="auto"`` and times the route the planner did not choose, to check that it
chose the faster one.

Usage::

    .venv/bin/python bench/bench_wide.py                                   # 100,000 x 8,192
    .venv/bin/python bench/bench_wide.py --rows 20000 --cols 2048 --repeat 1   # smoke run

See bench/README.md for what each contender does and how to read the output.
"""

from __future__ import annotations

import argparse
import datetime
import json
import os
import platform
import shutil
import statistics
import subprocess
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
# Helpers shared with the tall benchmark (stdlib-only at import, so the parent stays small).
from bench_tall import (MARK, cpu_probe, fmt_bytes, log, maxrss, proc_status, rchar,  # noqa: E402
                        tree_bytes, warm_cache)
import bench_tall  # noqa: E402

HERE = os.path.dirname(os.path.abspath(__file__))
CACHE = os.path.join(HERE, ".cache")
RESULTS = os.path.join(HERE, "results")

# name -> label; run order within one repeat.
CONTENDERS = {
    "read-floor": "read floor (1 pass) x passes",
    "rankfold-subspace": "rankfold sketch subspace",
    "rankfold-krylov": "rankfold sketch krylov",
    "rankfold-one-pass": "rankfold sketch one-pass",
    "dask": "dask svd_compressed",
    "dask-bounded": "dask svd_compressed, bounded",
    "exact": "rankfold exact features",
}
SHORT = {"rankfold-subspace": "rf subspace", "rankfold-krylov": "rf krylov", "rankfold-one-pass": "rf one-pass",
         "dask": "dask", "dask-bounded": "dask bounded", "read-floor": "read", "exact": "exact"}
# The default set; rankfold-one-pass and dask-bounded are extras (--contenders).
REPEATED = ["read-floor", "rankfold-subspace", "rankfold-krylov", "dask"]
SKETCHES = ("rankfold-subspace", "rankfold-krylov", "rankfold-one-pass")
DASK = "dask"
EXACT = "exact"


# ---------------------------------------------------------------------------
# data: generated in pieces of whole chunks, never the whole table in memory
# ---------------------------------------------------------------------------

def factor_sds(count: int, first: float, ratio: float) -> list:
    return [round(first * ratio ** i, 10) for i in range(count)]


def data_params(args) -> dict:
    return {
        "rows": args.rows, "cols": args.cols, "seed": args.seed, "dtype": "float32",
        "zarr_chunk_rows": args.chunk_rows,
        "generation_piece_rows": args.chunk_rows * max(1, 8192 // args.chunk_rows),
        # standard deviations of the planted scores: 40 * 0.88**i, i = 0..29
        "factors": factor_sds(30, 40.0, 0.88),
        "noise_sd": 1.0,
        "column_means": "10**uniform(3, 6), a fresh draw per column",
        "zarr_codec": "zarr v3 default (zstd level 0)",
        "format": 1,
    }


def data_dir(args) -> str:
    return os.path.join(CACHE, f"wide-{args.rows}x{args.cols}-s{args.seed}-c{args.chunk_rows}")


def ensure_data(args) -> dict:
    """The cached store's metadata, generating the store first when absent or stale."""
    import numpy as np

    d = data_dir(args)
    params = data_params(args)
    meta_path = os.path.join(d, "params.json")
    zpath = os.path.join(d, "table.zarr")
    if os.path.exists(meta_path):
        with open(meta_path) as fh:
            meta = json.load(fh)
        if meta.get("params") == params:
            log(f"data: cached {d}")
            return meta
    if os.path.exists(d):
        shutil.rmtree(d)
    os.makedirs(d)
    import zarr

    n, m = args.rows, args.cols
    rng = np.random.default_rng([args.seed, 0])
    sds = np.array(params["factors"])
    k = len(sds)
    axes, _ = np.linalg.qr(rng.standard_normal((m, k)))  # orthonormal planted loadings (m, k)
    mix = (axes * sds).T                                  # (k, m)
    means = 10.0 ** rng.uniform(3, 6, size=m)
    arr = zarr.create_array(store=zpath, shape=(n, m), chunks=(min(args.chunk_rows, n), m),
                            dtype="float32", zarr_format=3, dimension_names=("sample", "feature"))
    t0 = time.perf_counter()
    piece = params["generation_piece_rows"]
    for i, a in enumerate(range(0, n, piece)):
        b = min(n, a + piece)
        prng = np.random.default_rng([args.seed, 1, i])
        block = prng.standard_normal((b - a, k)) @ mix
        block += prng.standard_normal((b - a, m), dtype=np.float32) * params["noise_sd"]
        block += means
        arr[a:b] = block.astype(np.float32)
        del block
        log(f"data: wrote rows {a:,}-{b:,} of {n:,} ({time.perf_counter() - t0:.0f} s)", end="\r")
    log("")
    meta = {"params": params, "zarr": zpath, "zarr_bytes": tree_bytes(zpath),
            "planted_variances": (sds ** 2 + params["noise_sd"] ** 2).tolist(),
            "seconds_to_generate": round(time.perf_counter() - t0, 1)}
    with open(meta_path + ".tmp", "w") as fh:
        json.dump(meta, fh, indent=1)
    os.replace(meta_path + ".tmp", meta_path)  # written last: marks the cache complete
    log(f"data: generated {d} in {meta['seconds_to_generate']} s")
    return meta


def tall_args(args) -> argparse.Namespace:
    """bench_tall's default options with this run's tall rows, to find its cached table."""
    return argparse.Namespace(rows=args.tall_rows, cols=512, seed=0, chunk_rows=16384, row_group_rows=65536)


def tall_zarr(args) -> str | None:
    path = os.path.join(bench_tall.data_dir(tall_args(args)), "table.zarr")
    ok = os.path.exists(os.path.join(os.path.dirname(path), "params.json"))
    return path if ok else None


# ---------------------------------------------------------------------------
# child side: one contender, one run, its own process
# ---------------------------------------------------------------------------

def sketch_partition(src, rank: int, limit: str, oversample: int, power_iterations: int, kind: str):
    """The blocks rankfold's randomized route cuts ``src`` into (same arithmetic as routes/sketch.py)."""
    from rankfold.memory import block_budget, parse_memory
    from rankfold.routes import sketch

    axis = src.native_axis
    size = src.n_features if axis == "samples" else src.n_samples
    fixed = (sketch.fixed_bytes(size, src.n_features, rank, oversample, power_iterations, kind)
             + src.fixed_read_bytes(axis))
    budget = block_budget(parse_memory(limit), fixed, src.min_block_bytes(axis), "bench")
    return src.partition(axis, budget)


def rankfold_summary(res) -> dict:
    a = res.attrs
    passes = a["passes"]
    out = {"eigenvalues": res.variance.tolist(), "route": a["route"], "route_reasons": a["route_reasons"],
           "passes": len(passes), "pass_names": [p["name"] for p in passes],
           "pass_seconds": [p["seconds"] for p in passes], "decoded_bytes": sum(p["bytes_read"] for p in passes),
           "blocks": passes[0]["blocks"], "block_rows": passes[0]["largest_block"],
           "plan": a["plan"], "route_seconds": a["seconds"], "memory_limit": a["parameters"]["memory_limit"]}
    if "error_bound" in a:
        out["error_bound"] = {k: a["error_bound"][k] for k in ("spectral_norm", "relative_to_first", "probability",
                                                               "basis_spectral_norm", "basis_width")
                              if k in a["error_bound"]}
    return out


def run_contender(name: str, meta: dict, args) -> dict:
    import numpy as np

    zpath = meta["zarr"]
    rank = args.rank

    if name in SKETCHES:
        import rankfold

        res = rankfold.decompose(zpath, rank, route="sketch", sketch=name.split("-", 1)[1],
                                 oversample=args.oversample, power_iterations=args.power_iterations,
                                 seed=args.seed, memory_limit=args.memory_limit)
        return rankfold_summary(res)

    if name == "exact":
        import rankfold

        res = rankfold.decompose(zpath, args.exact_rank, route="features", memory_limit=args.exact_memory_limit)
        return rankfold_summary(res)

    if name == "read-floor":
        from rankfold import open_source
        from rankfold.sources.readahead import iter_blocks

        src = open_source(zpath)
        part = sketch_partition(src, rank, args.memory_limit, args.oversample, args.power_iterations, "subspace")
        decoded = 0
        for _i, _start, block in iter_blocks(src, part):  # the route's own reader, read-ahead included
            decoded += block.size * src.storage_dtype.itemsize
            del block
        src.close()
        return {"passes": 1, "decoded_bytes": decoded, "blocks": len(part), "block_rows": part.largest}

    if name == "dask":
        import dask
        import dask.array as da

        x = da.from_zarr(zpath).astype(np.float64)
        n = x.shape[0]
        xc = x - x.mean(axis=0)  # centering as a user would write it
        u, s, v = da.linalg.svd_compressed(xc, k=rank, n_power_iter=args.power_iterations,
                                           n_oversamples=args.oversample, seed=args.seed)
        with dask.config.set(scheduler="threads"):
            s, v = dask.compute(s, v)  # variances and loadings: what rankfold returns
        return {"eigenvalues": (np.asarray(s) ** 2 / (n - 1)).tolist(),
                "blocks": x.numblocks[0], "block_rows": x.chunks[0][0]}

    if name == "dask-bounded":
        # What dask needs to stay within bounded memory: the mean first, then
        # svd_compressed(compute=True), which persists the thin products and re-reads
        # the input for every product instead of holding it.
        import dask
        import dask.array as da

        with dask.config.set(scheduler="threads"):
            x = da.from_zarr(zpath).astype(np.float64)
            n = x.shape[0]
            mu = x.mean(axis=0).compute()
            u, s, v = da.linalg.svd_compressed(x - mu, k=rank, n_power_iter=args.power_iterations,
                                               n_oversamples=args.oversample, seed=args.seed, compute=True)
            s, v = dask.compute(s, v)
        return {"eigenvalues": (np.asarray(s) ** 2 / (n - 1)).tolist(),
                "blocks": x.numblocks[0], "block_rows": x.chunks[0][0]}

    raise SystemExit(f"unknown contender {name!r}")


def run_tall(name: str, args) -> dict:
    """``tall-auto-exact``, ``tall-auto-approximate``, ``tall-features``, ``tall-sketch``."""
    import rankfold

    path = tall_zarr(args)
    what = name.split("-", 1)[1]
    if what.startswith("auto-"):
        res = rankfold.decompose(path, args.rank, route="auto", accuracy=what[5:], memory_limit=args.tall_memory_limit,
                                 seed=args.seed)
    else:
        res = rankfold.decompose(path, args.rank, route=what, memory_limit=args.tall_memory_limit, seed=args.seed)
    return rankfold_summary(res)


def run_plans(meta: dict, args) -> dict:
    """The planner's view of both tables, from metadata only."""
    from dataclasses import asdict

    import rankfold
    from rankfold.machine import machine_speed

    out = {"speed": asdict(machine_speed())}

    def one(path, limit):
        plans = {}
        for acc in ("exact", "approximate"):
            p = rankfold.plan(path, args.rank, route="auto", accuracy=acc, memory_limit=limit,
                              oversample=args.oversample, power_iterations=args.power_iterations)
            plans[acc] = {"route": p.route, "lines": p.lines(),
                          "candidates": {c.route: {"fits": c.fits, "seconds": c.seconds, "peak": c.peak_memory,
                                                   "passes": c.passes, "note": c.note} for c in p.candidates}}
        return plans

    out["wide"] = one(meta["zarr"], args.memory_limit)
    for kind in ("krylov",):
        p = rankfold.plan(meta["zarr"], args.rank, route="sketch", sketch=kind, memory_limit=args.memory_limit,
                          oversample=args.oversample, power_iterations=args.power_iterations)
        out["wide"][kind] = {"seconds": p.estimate.seconds, "peak": p.estimate.peak_memory}
    p = rankfold.plan(meta["zarr"], args.exact_rank, route="features", memory_limit=args.exact_memory_limit)
    out["wide"]["features"] = {"seconds": p.estimate.seconds, "peak": p.estimate.peak_memory}
    path = tall_zarr(args)
    if path:
        out["tall"] = one(path, args.tall_memory_limit)
        out["tall_path"] = path
    return out


def run_profile(meta: dict, args) -> dict:
    """Where one pass of the subspace route goes: read, each step of the fold, QR, each alone.

    Uses the route's own block size and times each step on the first block (median of
    ``--profile-repeat`` interleaved runs), then scales to the whole table.  Steps that
    work in place run on a fresh copy of the block; the copy is timed on its own and
    subtracted in the summary.
    """
    import numpy as np
    import zarr

    from rankfold import open_source
    from rankfold.folds import ColumnMoments, CovarianceProduct
    from rankfold.randomized import orthonormalize

    slab_rows = getattr(__import__("rankfold.folds.sketch", fromlist=["SLAB"]), "SLAB", 4096)
    zpath = meta["zarr"]
    src = open_source(zpath)
    part = sketch_partition(src, args.rank, args.memory_limit, args.oversample, args.power_iterations, "subspace")
    a, b = part.bounds[0]
    rows, m, n = b - a, src.n_features, src.n_samples
    w = args.rank + args.oversample
    rng = np.random.default_rng(0)
    q = np.linalg.qr(rng.standard_normal((m, w)))[0]
    q_last = rng.standard_normal((m, w + 10))                 # the Rayleigh-Ritz pass carries 10 test vectors
    q_kry = rng.standard_normal((m, w * (args.power_iterations + 1) + 10))
    q32 = q.astype(np.float32)
    buf = np.empty((rows, m))
    src.read("samples", a, b, out=buf)
    center = buf.mean(axis=0)
    scale = np.ones(m)
    work = np.empty_like(buf)
    arr = zarr.open_array(zpath, mode="r")
    raw32 = arr[a:b]
    c32 = (buf - center).astype(np.float32)
    krylov_prev = np.linalg.qr(rng.standard_normal((m, w * args.power_iterations)))[0]
    z_big = rng.standard_normal((m, w))

    def on_copy(f):
        def run():
            np.copyto(work, buf)
            f(work)
        return run

    def slabs(f):
        def run(block):
            for r in range(0, block.shape[0], slab_rows):
                f(block[r:r + slab_rows])
        return run

    def nan_zero(x):
        x[np.isnan(x)] = 0.0

    def thin(x, basis):
        out = np.zeros((m, basis.shape[1]))
        for r in range(0, x.shape[0], slab_rows):
            s_ = x[r:r + slab_rows]
            out += s_.T @ (s_ @ basis)
        return out

    steps = {
        "read: ZarrSource.read into float64 (2 decode threads)": lambda: src.read("samples", a, b, out=buf),
        "read: zarr arr[a:b] alone (float32, zarr's own slicing)": lambda: arr[a:b],
        "copy of the float64 block (subtracted below)": lambda: np.copyto(work, buf),
        "fold: ColumnMoments.update (moments pass), + copy": on_copy(lambda x: ColumnMoments(m).update(x)),
        f"fold: CovarianceProduct.update (w={w}), + copy": on_copy(lambda x: CovarianceProduct(q, center, scale).update(x)),
        "  part: check_values' finite test (np.sum)": lambda: np.isfinite(np.sum(buf)),
        "  part: slab -= center, + copy": on_copy(slabs(lambda x: x.__isub__(center))),
        "  part: slab[isnan(slab)] = 0, + copy": on_copy(slabs(nan_zero)),
        "  part: slab /= scale (all ones), + copy": on_copy(slabs(lambda x: x.__itruediv__(scale))),
        f"  part: thin GEMMs B.T @ (B @ Q) in slabs (w={w})": lambda: thin(buf, q),
        f"thin GEMMs, Rayleigh-Ritz pass (w={w + 10})": lambda: thin(buf, q_last),
        f"thin GEMMs, krylov Rayleigh-Ritz pass (w={q_kry.shape[1]})": lambda: thin(buf, q_kry),
        f"float32 thin GEMMs on the centered block (w={w})": lambda: thin(c32, q32),
    }
    small = {
        f"QR of {m} x {w} (orthonormalize)": lambda: orthonormalize(z_big),
        f"krylov: QR of {m} x {w} against {krylov_prev.shape[1]} columns": lambda: orthonormalize(z_big, krylov_prev),
    }
    times = {k: [] for k in list(steps) + list(small)}
    for _ in range(args.profile_repeat):
        for k, f in {**steps, **small}.items():
            t0 = time.perf_counter()
            f()
            times[k].append(time.perf_counter() - t0)
    src.close()
    del raw32
    return {"rows": rows, "n": n, "m": m, "w": w, "blocks": len(part), "slab": slab_rows,
            "times": {k: statistics.median(v) for k, v in times.items()},
            "scaled": {k: statistics.median(v) * n / rows for k, v in times.items() if k in steps},
            "small": list(small)}


def child_imports(name: str):
    import numpy  # noqa: F401
    import scipy.linalg  # noqa: F401
    import zarr  # noqa: F401

    import rankfold  # noqa: F401
    import rankfold.routes.sketch  # noqa: F401
    if name.startswith("dask"):
        import dask.array  # noqa: F401


def child_main(args) -> None:
    if args.child == "generate":
        ensure_data(args)
        return
    with open(os.path.join(args.data, "params.json")) as fh:
        meta = json.load(fh)
    child_imports(args.child)
    if args.child == "plans":
        print(MARK + json.dumps(run_plans(meta, args)), flush=True)
        return
    probe = cpu_probe()
    if args.child == "profile":
        print(MARK + json.dumps(run_profile(meta, args)), flush=True)
        return
    base_peak, base_now, r0 = maxrss(), proc_status("VmRSS"), rchar()
    t0 = time.perf_counter()
    if args.child.startswith("tall-"):
        out = run_tall(args.child, args)
    else:
        out = run_contender(args.child, meta, args)
    out["wall"] = time.perf_counter() - t0
    out.update(peak_rss=maxrss(), hwm=proc_status("VmHWM"), base_rss=base_now, base_peak_rss=base_peak,
               file_bytes_read=rchar() - r0, cpu_gflops=probe)
    print(MARK + json.dumps(out), flush=True)


# ---------------------------------------------------------------------------
# parent side: run children, collect, print
# ---------------------------------------------------------------------------

def common_args(args) -> list[str]:
    return ["--rows", str(args.rows), "--cols", str(args.cols), "--rank", str(args.rank),
            "--memory-limit", args.memory_limit, "--exact-memory-limit", args.exact_memory_limit,
            "--exact-rank", str(args.exact_rank), "--seed", str(args.seed), "--chunk-rows", str(args.chunk_rows),
            "--oversample", str(args.oversample), "--power-iterations", str(args.power_iterations),
            "--tall-rows", str(args.tall_rows), "--tall-memory-limit", args.tall_memory_limit,
            "--profile-repeat", str(args.profile_repeat)]


# rankfold's machine-speed probe is cached per host in ~/.cache/rankfold, a file other programs
# (tests, other benchmarks) may rewrite mid-run; every child here uses a private cache, probed
# once at the start of the run, so that all planner estimates of one run use the same speeds.
SPEED_DIR = os.path.join(CACHE, "machine-speed")


def spawn(child: str, args, data: str) -> dict:
    cmd = [sys.executable, os.path.abspath(__file__), "--child", child, "--data", data] + common_args(args)
    env = {**os.environ, "RANKFOLD_CACHE_DIR": SPEED_DIR}
    proc = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    for line in proc.stdout.splitlines():
        if line.startswith(MARK):
            return json.loads(line[len(MARK):])
    return {"error": f"exit code {proc.returncode}", "stdout": proc.stdout[-1500:], "stderr": proc.stderr[-3000:]}


def run_logged(label: str, child: str, args, data: str) -> dict:
    time.sleep(args.pause)
    log(f"{label:<34}", end=" ")
    r = spawn(child, args, data)
    if "error" in r:
        log(f"FAILED ({r['error']})\n{r.get('stderr', '')}")
    else:
        log(f"{r['wall']:7.2f} s  peak RSS {fmt_bytes(r['peak_rss'])}  cpu probe {r['cpu_gflops']:.0f} GF/s")
    return r


def summarize(runs: list[dict], store_bytes: int) -> dict:
    ok = [r for r in runs if "error" not in r]
    if not ok:
        return {"error": runs[0]["error"] if runs else "not run"}
    walls = [r["wall"] for r in ok]
    s = dict(ok[0])
    s.update(wall=statistics.median(walls), wall_min=min(walls), wall_max=max(walls), n=len(ok), walls=walls,
             peak_rss=max(r["peak_rss"] for r in ok), hwm=max(r["hwm"] for r in ok),
             base_rss=statistics.median(r["base_rss"] for r in ok),
             delta_rss=max(r["peak_rss"] - r["base_rss"] for r in ok),
             file_bytes_read=statistics.median(r["file_bytes_read"] for r in ok),
             cpu_gflops=statistics.median(r["cpu_gflops"] for r in ok))
    s["file_passes"] = s["file_bytes_read"] / store_bytes
    if "pass_seconds" in ok[0]:
        s["pass_seconds"] = [statistics.median(r["pass_seconds"][i] for r in ok)
                             for i in range(len(ok[0]["pass_seconds"]))]
    return s


def rel_errors(values, ref):
    import numpy as np

    v, r = np.asarray(values[:len(ref)]), np.asarray(ref)
    return np.abs(v - r) / np.abs(r)


def code_version() -> str:
    """The rankfold commit, and the files under src/ that differ from it (the code is under development)."""
    root = os.path.dirname(HERE)
    try:
        head = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=root, capture_output=True, text=True).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--", "src"], cwd=root, capture_output=True,
                               text=True).stdout.split("\n")
    except OSError:
        return "unknown (no git)"
    changed = [line[3:] for line in dirty if line.strip()]
    return head + (f" + uncommitted changes in {', '.join(changed)}" if changed else " (clean src/)")


def fmt_s(x) -> str:
    return "-" if x is None else f"{x:.1f}" if x < 1000 else f"{x:.0f}"


def render(args, meta, summ: dict, plans: dict, profile: dict | None, tall: dict, warm, exact_note: str) -> str:
    import numpy as np

    n, m, k = args.rows, args.cols, args.rank
    table_bytes = n * m * 4
    L = []
    L.append(f"rankfold wide benchmark  {datetime.datetime.now().isoformat(timespec='seconds')}")
    L.append(f"command: {' '.join([os.path.relpath(sys.executable, os.getcwd())] + sys.argv)}")
    L.append(f"table: {n:,} x {m:,} float32 ({table_bytes / 1e9:.2f} GB decoded); Zarr {fmt_bytes(meta['zarr_bytes'])} "
             f"on disk (chunks {args.chunk_rows:,} x {m:,}, zstd); planted: {len(meta['params']['factors'])} factors, "
             f"sd 40*0.88^i, unit noise, column means 1e3..1e6")
    L.append(f"rank {k}, oversample {args.oversample}, power iterations {args.power_iterations}, seed {args.seed}; "
             f"rankfold memory_limit {args.memory_limit} (exact route {args.exact_memory_limit})")
    code = args.code_at_start + ("" if args.code_at_end == args.code_at_start else
                                 f"; at the end: {args.code_at_end} (src/ changed during the run)")
    L.append(f"rankfold code: {code}")
    sp = plans.get("speed", {})
    L.append(f"machine: {os.cpu_count()} cores, {platform.machine()}, Python {platform.python_version()}; planner speeds "
             f"read {sp.get('read_bytes_per_s', 0) / 1e6:.0f} MB/s, GEMM {sp.get('gemm_flops_per_s', 0) / 1e9:.0f} GFLOP/s "
             f"({sp.get('measured', '?')})")
    L.append(f"page cache warm (warm-up read {fmt_bytes(warm[0])} in {warm[1]:.1f} s); {args.rounds_done} of {args.repeat} "
             f"repeat(s) of "
             f"{', '.join(SHORT[c] for c in args.contender_list)}, interleaved round-robin; the exact route once; "
             f"each run in its own process")
    L.append("")

    dask_ = summ.get(DASK)
    dask_ok = dask_ and "error" not in dask_
    exact = summ.get(EXACT)
    ref = np.array(exact["eigenvalues"][:k]) if exact and "error" not in exact else None
    sub = summ.get("rankfold-subspace")
    floor_passes = sub["passes"] if sub and "error" not in sub else 4
    wide = plans.get("wide", {})
    hdr = (f"{'contender':<30} {'median s':>8} {'min-max s':>11} {'runs':>4} {'x dask':>6} {'plan s':>7} "
           f"{'peak RSS':>9} {'plan peak':>9} {'base':>7} {'peak-base':>9} {'passes':>6} {'file read':>14} "
           f"{'max rel err':>11} {'med rel err':>11} {'cpu GF/s':>8}")
    L.append(hdr)
    L.append("-" * len(hdr))
    for name, label in CONTENDERS.items():
        s = summ.get(name)
        if s is None:
            continue
        if "error" in s:
            L.append(f"{label:<30} FAILED: {s['error']}")
            continue
        wall, lo, hi = s["wall"], s["wall_min"], s["wall_max"]
        passes = s.get("passes")
        plan_s = plan_peak = None
        if name == "read-floor":
            wall, lo, hi = wall * floor_passes, lo * floor_passes, hi * floor_passes
            passes = floor_passes
            plan_s = floor_passes * table_bytes / sp["read_bytes_per_s"] if sp else None
            label = f"read floor x {floor_passes} passes"
        elif "plan" in s:
            plan_s, plan_peak = s["plan"]["estimated_seconds"], s["plan"]["estimated_peak_memory"]
        if name == DASK:
            passes = None
        rd = f"{wall / dask_['wall']:.2f}" if dask_ok else "-"
        errs = "-", "-"
        if ref is not None and s.get("eigenvalues") and name != EXACT:
            e = rel_errors(s["eigenvalues"], ref)
            errs = f"{e.max():.1e}", f"{np.median(e):.1e}"
        elif name == EXACT:
            errs = "(reference)", ""
        file_read = f"{fmt_bytes(s['file_bytes_read'])} ={s['file_passes']:.1f}x"
        runs = f"{s['n']}" + ("*" if name == "read-floor" else "")
        L.append(f"{label:<30} {wall:8.1f} {lo:5.1f}-{hi:<5.1f} {runs:>4} {rd:>6} {fmt_s(plan_s):>7} "
                 f"{fmt_bytes(s['peak_rss']):>9} {fmt_bytes(plan_peak) if plan_peak else '-':>9} "
                 f"{fmt_bytes(s['base_rss']):>7} {fmt_bytes(s['delta_rss']):>9} {passes if passes else '-':>6} "
                 f"{file_read:>14} {errs[0]:>11} {errs[1]:>11} {s['cpu_gflops']:8.0f}")
    L.append("")
    L.append("median s: median wall time of the runs (interpreter start and imports excluded; for rankfold the whole")
    L.append("decompose call). read floor: one pass of rankfold's own reader (open_source + iter_blocks, read-ahead on,")
    L.append(f"the sketch route's block size) times the sketch route's {floor_passes} passes; runs* = runs of the one pass.")
    L.append("x dask: median over dask's median. plan s / plan peak: the planner's estimate (result.attrs['plan'];")
    L.append("for the read floor passes x table bytes / the planner's read speed). peak RSS: the child's ru_maxrss;")
    L.append("base: RSS after imports; peak-base: what the run added. passes: rankfold's own record. file read:")
    L.append("bytes read from files (/proc/self/io rchar, page cache included) and that over the store's size on disk,")
    L.append(f"i.e. the passes actually made over the stored bytes. rel err: |lambda_i - exact_i| / exact_i over the top {k}.")
    L.append("cpu GF/s: a 1536^3 GEMM probe at the start of each child: the shared VM's speed drifts.")
    if exact_note:
        L.append(exact_note)

    # per-component errors
    if ref is not None:
        L.append("")
        names = [c for c in CONTENDERS if c != EXACT and summ.get(c) and "error" not in summ[c]
                 and summ[c].get("eigenvalues")]
        planted = meta["planted_variances"]
        L.append(f"top-{k} eigenvalues (covariance, ddof=1) and relative errors against the exact route:")
        L.append(f"  {'i':>3} {'exact':>10} {'planted':>9}  " + " ".join(f"{SHORT[c]:>17}" for c in names))
        errs = {c: rel_errors(summ[c]["eigenvalues"], ref) for c in names}
        for i in range(k):
            pl = f"{planted[i]:9.2f}" if i < len(planted) else f"{'':>9}"
            L.append(f"  {i + 1:>3} {ref[i]:10.4f} {pl}  " + " ".join(f"{errs[c][i]:17.1e}" for c in names))
        full = exact["eigenvalues"]
        if len(full) > k:
            L.append(f"  exact lambda_{k + 1}..lambda_{len(full)}: " + ", ".join(
                f"{v:.3f}" for v in full[k:k + 12]) + (" ..." if len(full) > k + 12 else ""))

    # a posteriori bounds
    L.append("")
    L.append("rankfold's a posteriori bound (Halko et al. 2011, sec. 4.3; attrs['error_bound']), in variance units,")
    L.append("next to the least value the bounded quantity can have (from the exact route's eigenvalues):")
    full = exact["eigenvalues"] if exact and "error" not in exact else []
    for c in SKETCHES:
        s = summ.get(c)
        if not s or "error" in s or "error_bound" not in s:
            continue
        eb = s["error_bound"]
        line = (f"  {CONTENDERS[c]:<26} returned components: ||(I - VV')C|| <= {eb['spectral_norm']:.4g} "
                f"({eb['relative_to_first']:.2e} of lambda_1, probability {eb['probability']:.10g})")
        if c.endswith("one-pass"):
            line = (f"  {CONTENDERS[c]:<26} ||C - C_nystrom|| <= {eb['spectral_norm']:.4g} "
                    f"({eb['relative_to_first']:.2e} of lambda_1, probability {eb['probability']:.10g})")
        elif len(full) > k:
            line += f"; true value >= lambda_{k + 1} = {full[k]:.4g}"
        L.append(line)
        if "basis_spectral_norm" in eb:
            width = eb.get("basis_width", 0)
            line = f"  {'':<26} whole basis ({width} columns): ||(I - QQ')C|| <= {eb['basis_spectral_norm']:.4g}"
            if len(full) > width:
                line += f"; true value >= lambda_{width + 1} = {full[width]:.4g}"
            L.append(line)
    L.append("  (the estimate is 10 sqrt(2/pi) max_i ||(I - P) C w_i|| over Gaussian w_i; ||(I - P) C w|| is about the")
    L.append("  Frobenius norm of what P leaves out, so a wide noise floor makes the bound far above the spectral norm)")

    # per pass
    L.append("")
    L.append("seconds per pass (medians over runs; rankfold's attrs['passes']):")
    for c in SKETCHES + (EXACT,):
        s = summ.get(c)
        if s and "error" not in s and s.get("pass_seconds"):
            L.append(f"  {CONTENDERS[c]:<26} " + ", ".join(f"{nm} {t:.1f}" for nm, t in zip(s["pass_names"], s["pass_seconds"]))
                     + f"  (blocks {s['blocks']} x {s['block_rows']:,} rows)")
    fl = summ.get("read-floor")
    if fl and "error" not in fl:
        L.append(f"  {'read only, one pass':<26} median {fl['wall']:.1f} s (min {fl['wall_min']:.1f}, max "
                 f"{fl['wall_max']:.1f}) = {table_bytes / fl['wall'] / 1e9:.2f} GB/s of float32 "
                 f"(blocks {fl['blocks']} x {fl['block_rows']:,} rows)")

    # planner
    if wide:
        L.append("")
        L.append(f"planner on the wide table (memory_limit {args.memory_limit}): route='auto' chooses "
                 f"{wide['exact']['route']} with accuracy='exact', {wide['approximate']['route']} with accuracy='approximate'")
        for line in wide["approximate"]["lines"]:
            L.append("  | " + line)

    # targets
    L.append("")
    L.append("targets (two-core machine):")

    def target(text, ok):
        L.append(f"  [{'PASS' if ok else 'MISS'}] {text}")

    dask_err = None
    if dask_ok and ref is not None:
        dask_err = float(rel_errors(dask_["eigenvalues"], ref).max())
    for c in SKETCHES:
        s = summ.get(c)
        if not s or "error" in s:
            continue
        lab = CONTENDERS[c]
        if dask_ok:
            q = s["wall"] / dask_["wall"]
            target(f"{lab}: {q:.2f}x dask's time ({s['wall']:.1f} s vs {dask_['wall']:.1f} s; target <= 0.5)", q <= 0.5)
        if dask_err is not None:
            e = float(rel_errors(s["eigenvalues"], ref).max())
            target(f"{lab}: max relative eigenvalue error {e:.1e} vs dask's {dask_err:.1e} (target: equal or better)",
                   e <= dask_err * 1.000001)
        limit = s["memory_limit"]
        target(f"{lab}: peak RSS {fmt_bytes(s['peak_rss'])} within the {fmt_bytes(limit)} ceiling "
               f"({fmt_bytes(s['delta_rss'])} above the post-import baseline)", s["peak_rss"] <= limit)

    # tall
    L.append("")
    L.extend(render_tall(args, plans, tall))

    # profile
    if profile and "error" not in profile:
        L.append("")
        L.extend(render_profile(profile, summ, table_bytes))
    L.append("")
    L.append("All times on a warm page cache.")
    return "\n".join(L)


def render_tall(args, plans: dict, tall: dict) -> list:
    import numpy as np

    L = []
    t = plans.get("tall")
    if args.no_tall:
        L.append("tall table: skipped (--no-tall)")
        return L
    if not t:
        L.append(f"tall table: not found (run bench/bench_tall.py --rows {args.tall_rows} --generate-only first); skipped")
        return L
    L.append(f"tall table of bench_tall.py ({args.tall_rows:,} x 512 float32, {plans['tall_path']}), rank {args.rank}, "
             f"memory_limit {args.tall_memory_limit}, route='auto':")
    for acc in ("exact", "approximate"):
        p = t[acc]
        cands = ", ".join(f"{r} {c['seconds']:.0f} s" if c["fits"] else f"{r} does not fit"
                          for r, c in p["candidates"].items())
        L.append(f"  accuracy={acc:<12} planner chooses {p['route']:<9} (estimates: {cands})")
    L.append(f"  {'run':<36} {'route':<9} {'plan s':>7} {'measured s':>10} {'min-max':>11} {'peak RSS':>9} "
             f"{'peak-base':>9} {'plan peak':>9} {'passes':>6}  pass seconds")
    for label, s in tall.items():
        if "error" in s:
            L.append(f"  {label:<36} FAILED: {s['error']}")
            continue
        L.append(f"  {label:<36} {s['route']:<9} {s['plan']['estimated_seconds']:7.1f} {s['wall']:10.1f} "
                 f"{s['wall_min']:5.1f}-{s['wall_max']:<5.1f} {fmt_bytes(s['peak_rss']):>9} "
                 f"{fmt_bytes(s['delta_rss']):>9} {fmt_bytes(s['plan']['estimated_peak_memory']):>9} {s['passes']:>6}  "
                 + ", ".join(f"{x:.1f}" for x in s["pass_seconds"]))
    by_route = {s["route"]: s for s in tall.values() if "error" not in s}
    if "features" in by_route and "sketch" in by_route:
        f, sk = by_route["features"], by_route["sketch"]
        e = rel_errors(sk["eigenvalues"], f["eigenvalues"])
        L.append(f"  sketch vs features on the tall table: top-{args.rank} eigenvalue relative error max {e.max():.1e}, "
                 f"median {np.median(e):.1e} (the tall table has 5 factors, then a flat noise floor)")
        faster = "features" if f["wall"] <= sk["wall"] else "sketch"
        for acc in ("exact", "approximate"):
            chosen = t[acc]["route"]
            if chosen in ("features", "sketch"):
                ok = chosen == faster
                L.append(f"  [{'PASS' if ok else 'MISS'}] accuracy={acc}: the planner chose {chosen}; measured "
                         f"features {f['wall']:.1f} s, sketch {sk['wall']:.1f} s: {faster} was faster"
                         + ("" if acc == "approximate" or chosen != "features" or ok else
                            " (with accuracy='exact' the sketch is not allowed)"))
    return L


def render_profile(p: dict, summ: dict, table_bytes: int) -> list:
    L = []
    rows, n, m, w = p["rows"], p["n"], p["m"], p["w"]
    L.append(f"profile of one subspace pass: each step alone on rankfold's block of {rows:,} x {m:,} "
             f"(float64 {rows * m * 8 / 1e9:.2f} GB; slabs of {p['slab']:,} rows), median of "
             f"interleaved runs, scaled by {n:,}/{rows:,} to a whole pass:")
    for k, t in p["times"].items():
        if k in p["small"]:
            L.append(f"  {k:<62} {t * 1e3:9.1f} ms (once per iteration)")
        else:
            L.append(f"  {k:<62} {t:7.3f} s per block  {p['scaled'][k]:6.1f} s per pass")
    sc = p["scaled"]
    copy = sc["copy of the float64 block (subtracted below)"]
    read = sc["read: ZarrSource.read into float64 (2 decode threads)"]
    fold = sc[f"fold: CovarianceProduct.update (w={w}), + copy"] - copy
    gemm = sc[f"  part: thin GEMMs B.T @ (B @ Q) in slabs (w={w})"]
    moments = sc["fold: ColumnMoments.update (moments pass), + copy"] - copy
    L.append(f"  => a power-iteration pass: read {read:.1f} s + fold {fold:.1f} s (of which thin GEMMs {gemm:.1f} s, "
             f"centering/NaN/scale {fold - gemm:.1f} s): perfect overlap max = {max(read, fold):.1f} s, "
             f"none = sum {read + fold:.1f} s")
    L.append(f"  => the moments pass: read {read:.1f} s + fold {moments:.1f} s")
    s = summ.get("rankfold-subspace")
    if s and "error" not in s and s.get("pass_seconds"):
        L.append("     measured in the subspace runs: " + ", ".join(
            f"{nm} {t:.1f} s" for nm, t in zip(s["pass_names"], s["pass_seconds"])))
    return L


def parent_main(args) -> None:
    t_start = time.perf_counter()
    args.code_at_start = code_version()
    data = data_dir(args)
    gen = subprocess.run([sys.executable, os.path.abspath(__file__), "--child", "generate"] + common_args(args))
    if gen.returncode:
        raise SystemExit(f"data generation failed (exit code {gen.returncode})")
    with open(os.path.join(data, "params.json")) as fh:
        meta = json.load(fh)
    if args.generate_only:
        return
    tall_path = None if args.no_tall else tall_zarr(args)
    warm = warm_cache([meta["zarr"]] + ([tall_path] if tall_path else []))
    log(f"warm-up read {fmt_bytes(warm[0])} in {warm[1]:.1f} s")
    if os.path.isdir(SPEED_DIR) and not args.keep_speed:
        shutil.rmtree(SPEED_DIR)  # the planner child below probes this machine afresh
    plans = spawn("plans", args, data)
    if "error" in plans:
        log(f"planner child FAILED:\n{plans.get('stderr')}")
        plans = {}
    store = meta["zarr_bytes"]

    # the exact route: once, cached beside the data (delete exact-*.json or pass --rerun-exact)
    exact_cache = os.path.join(data, f"exact-r{args.exact_rank}-{args.exact_memory_limit}.json")
    exact_run, exact_note = None, ""
    if not args.no_exact and os.path.exists(exact_cache) and not args.rerun_exact:
        with open(exact_cache) as fh:
            exact_run = json.load(fh)
        exact_note = (f"exact route: result and timing cached from {exact_run.get('when')} ({exact_cache}); "
                      "--rerun-exact measures it again")
        log(exact_note)

    names = args.contenders.split(",") if args.contenders else list(REPEATED)
    unknown = [c for c in names if c not in CONTENDERS or c == EXACT]
    if unknown:
        raise SystemExit(f"unknown contender(s) {', '.join(unknown)}; choose from "
                         f"{', '.join(c for c in CONTENDERS if c != EXACT)} (the exact route: --no-exact)")
    runs: dict[str, list] = {c: [] for c in names}
    args.contender_list = names
    profile = None
    rounds_done, round_seconds = 0, 0.0
    for rep in range(args.repeat):
        elapsed = time.perf_counter() - t_start
        if rep >= 2 and elapsed + round_seconds + args.tall_reserve > args.time_budget * 60:
            log(f"stopping after {rep} rounds: another round (~{round_seconds:.0f} s) would pass the "
                f"--time-budget of {args.time_budget} min ({elapsed:.0f} s spent, {args.tall_reserve} s kept for the tall part)")
            break
        t_round = time.perf_counter()
        for name in names:
            runs[name].append(run_logged(f"[{rep + 1}/{args.repeat}] {name}", name, args, data))
        if rep == 0 and not args.no_exact and exact_run is None:
            exact_run = run_logged("[once] exact features route", EXACT, args, data)
            if "error" not in exact_run:
                exact_run["when"] = datetime.datetime.now().isoformat(timespec="seconds")
                with open(exact_cache, "w") as fh:
                    json.dump(exact_run, fh)
        round_seconds = time.perf_counter() - t_round
        if rep == 0 and not args.no_profile:
            log("[once] profile of one pass ...", end=" ")
            profile = spawn("profile", args, data)
            log("done" if "error" not in profile else f"FAILED\n{profile.get('stderr')}")
        rounds_done = rep + 1
    args.rounds_done = rounds_done
    summ = {name: summarize(rs, store) for name, rs in runs.items()}
    if exact_run is not None:
        summ[EXACT] = summarize([exact_run], store)

    # the tall table with route='auto', and the route the planner did not take
    tall: dict = {}
    if tall_path and plans.get("tall"):
        t = plans["tall"]
        jobs = {}
        for route in ("features", "sketch"):
            acc = next((a for a in ("exact", "approximate") if t[a]["route"] == route), None)
            if acc:
                jobs[f"route='auto', accuracy='{acc}'"] = f"tall-auto-{acc}"
            else:
                jobs[f"route='{route}' (forced)"] = f"tall-{route}"
        tall_bytes = tree_bytes(tall_path)
        tall_runs = {label: [] for label in jobs}
        for rep in range(args.tall_repeat):
            order = list(jobs.items()) if rep % 2 == 0 else list(jobs.items())[::-1]
            for label, child in order:
                tall_runs[label].append(run_logged(f"[tall {rep + 1}/{args.tall_repeat}] {child}", child, args, data))
        tall = {label: summarize(rs, tall_bytes) for label, rs in tall_runs.items()}
    elif not args.no_tall:
        log("tall table not found; skipping the route='auto' part")
    log(f"all runs: {time.perf_counter() - t_start:.0f} s")
    args.code_at_end = code_version()

    text = render(args, meta, summ, plans, profile, tall, warm, exact_note)
    print(text)
    if not args.no_save:
        os.makedirs(RESULTS, exist_ok=True)
        stamp = datetime.datetime.now().strftime("%Y-%m-%d-%H%M")
        base = os.path.join(RESULTS, f"wide-{stamp}-{args.rows}x{args.cols}")
        with open(base + ".txt", "w") as fh:
            fh.write(text + "\n")
        with open(base + ".json", "w") as fh:
            json.dump({"args": vars(args), "meta": meta, "runs": runs, "exact": exact_run, "plans": plans,
                       "profile": profile, "tall": tall}, fh, indent=1)
        log(f"saved {os.path.relpath(base, os.getcwd())}.txt (and .json with every run)")


def main(argv=None) -> None:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--rows", type=int, default=100_000, help="samples (default 100,000)")
    p.add_argument("--cols", type=int, default=8192, help="features (default 8,192)")
    p.add_argument("--repeat", type=int, default=3,
                   help="runs of the read floor, both sketches and dask; the median is reported (default 3)")
    p.add_argument("--rank", type=int, default=20, help="components (default 20)")
    p.add_argument("--contenders", help="comma-separated, run in this order each round (default "
                   f"{','.join(REPEATED)}; extras: rankfold-one-pass, dask-bounded)")
    p.add_argument("--oversample", type=int, default=10, help="oversampling for rankfold and dask (default 10)")
    p.add_argument("--power-iterations", type=int, default=2, help="for rankfold and dask (default 2)")
    p.add_argument("--memory-limit", default="2GB", help="rankfold's ceiling for the sketch routes (default 2GB)")
    p.add_argument("--exact-rank", type=int, default=100,
                   help="components the exact route computes (default 100: lambda_21.. for the bound check)")
    p.add_argument("--exact-memory-limit", default="4GB",
                   help="ceiling for the exact route (the m x m Gram needs 3 m^2 doubles; default 4GB)")
    p.add_argument("--rerun-exact", action="store_true", help="measure the exact route even when cached")
    p.add_argument("--no-exact", action="store_true", help="skip the exact route (no errors are printed)")
    p.add_argument("--no-profile", action="store_true", help="skip the one-pass profile")
    p.add_argument("--profile-repeat", type=int, default=3, help="runs of each profiled step (default 3)")
    p.add_argument("--no-tall", action="store_true", help="skip the tall-table route='auto' part")
    p.add_argument("--tall-rows", type=int, default=1_000_000,
                   help="rows of bench_tall's cached table to use (default 1,000,000)")
    p.add_argument("--tall-memory-limit", default="1GB", help="rankfold's ceiling on the tall table (default 1GB)")
    p.add_argument("--tall-repeat", type=int, default=1,
                   help="runs of each tall route, alternating their order (default 1)")
    p.add_argument("--time-budget", type=float, default=25.0,
                   help="minutes; rounds after the second are skipped when they would pass it (default 25)")
    p.add_argument("--tall-reserve", type=int, default=150,
                   help="seconds kept for the tall part when applying --time-budget (default 150)")
    p.add_argument("--keep-speed", action="store_true",
                   help="reuse the previous run's machine-speed probe (bench/.cache/machine-speed) instead of probing again")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--chunk-rows", type=int, default=2048, help="Zarr chunk rows (default 2,048: 64 MB chunks at 8,192 columns)")
    p.add_argument("--pause", type=float, default=1.0, help="seconds idle before each run (default 1)")
    p.add_argument("--no-save", action="store_true", help="do not write bench/results/")
    p.add_argument("--generate-only", action="store_true", help="build the cached table and stop")
    p.add_argument("--child", help=argparse.SUPPRESS)
    p.add_argument("--data", help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.child:
        child_main(args)
    else:
        parent_main(args)


if __name__ == "__main__":
    main()

#!/usr/bin/env python
"""Cluster benchmark: the tall and wide tables serially, on ``local:1`` and on ``local:2``.

Uses the cached tables of ``bench_tall.py`` (Zarr, feature route) and ``bench_wide.py``
(Zarr, randomized subspace route), built by their own code when absent.  Each run is a
fresh subprocess; a cluster run starts its LocalCluster before the clock starts (the
start-up time is reported on its own), so the timed part is the decomposition.  Printed
per table and setup: median wall time, ratio to serial, the bytes read from storage, and
the bytes moved between processes, two ways: rankfold's own upper bound (task arguments
and states, ``attrs["cluster"]["bytes_moved"]``) and distributed's counter of bytes sent
from worker to worker (``Worker.transfer_outgoing_bytes_total``).  Data blocks never
travel, so both stay far below the bytes read.

Usage::

    .venv/bin/python bench/bench_cluster.py                                     # full size
    .venv/bin/python bench/bench_cluster.py --tall-rows 20000 --wide-rows 4000 \\
        --wide-cols 512 --repeat 1                                              # smoke run

See bench/README.md.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)

import bench_tall  # noqa: E402  (the table builders are reused, not copied)
import bench_wide  # noqa: E402

MARK = "BENCH-RESULT "
SETUPS = ("serial", "local:1", "local:2")


def tall_args(args) -> argparse.Namespace:
    return argparse.Namespace(rows=args.tall_rows, cols=args.tall_cols, seed=0, chunk_rows=args.tall_chunk_rows,
                              row_group_rows=args.tall_chunk_rows * 4)


def wide_args(args) -> argparse.Namespace:
    return argparse.Namespace(rows=args.wide_rows, cols=args.wide_cols, seed=0, chunk_rows=args.wide_chunk_rows)


def child_main(args) -> None:
    """One decomposition in this process; prints one JSON line after MARK."""
    import rankfold

    options = json.loads(args.options)
    client = cluster = None
    startup = 0.0
    if args.setup != "serial":
        import logging

        from distributed import Client, LocalCluster

        t0 = time.perf_counter()
        cluster = LocalCluster(n_workers=int(args.setup.split(":")[1]), threads_per_worker=1, processes=True,
                               host="127.0.0.1", dashboard_address=None, silence_logs=logging.ERROR)
        client = Client(cluster, set_as_default=False)
        startup = time.perf_counter() - t0
    scratch = None
    if options.get("scores"):
        # Scores go to a result store, which the workers write chunk by chunk themselves
        # (held in memory instead, they would all be assembled in this process).
        import tempfile

        scratch = tempfile.mkdtemp(prefix="bench-cluster-", dir=os.path.dirname(os.path.abspath(args.data)))
        options["out"] = os.path.join(scratch, "result.zarr")
    t0 = time.perf_counter()
    result = rankfold.decompose(args.data, args.rank, cluster=client, **options)
    seconds = time.perf_counter() - t0
    if scratch is not None:
        import shutil

        shutil.rmtree(scratch, ignore_errors=True)
    out = {"setup": args.setup, "seconds": seconds, "startup": startup,
           "bytes_read": sum(p["bytes_read"] for p in result.attrs["passes"]),
           "passes": len(result.attrs["passes"]), "route": result.attrs["route"],
           "variance": [float(v) for v in result.variance]}
    if client is not None:
        out["bytes_moved"] = result.attrs["cluster"]["bytes_moved"]
        out["tasks"] = result.attrs["cluster"]["tasks"]
        sent = client.run(lambda dask_worker: dask_worker.transfer_outgoing_bytes_total)
        out["worker_to_worker"] = int(sum(sent.values()))
        client.close()
        cluster.close()
    print(MARK + json.dumps(out), flush=True)


def spawn(args, setup: str, data: str, options: dict) -> dict:
    cmd = [sys.executable, os.path.abspath(__file__), "--child", "--setup", setup, "--data", data,
           "--rank", str(args.rank), "--options", json.dumps(options)]
    done = subprocess.run(cmd, capture_output=True, text=True)
    lines = [l for l in done.stdout.splitlines() if l.startswith(MARK)]
    if done.returncode or not lines:
        raise SystemExit(f"{setup} on {data} failed:\n{done.stderr[-3000:]}")
    return json.loads(lines[-1][len(MARK):])


def fmt_bytes(n: float) -> str:
    for unit in ("B", "KB", "MB", "GB"):
        if abs(n) < 1000:
            return f"{n:,.1f} {unit}"
        n /= 1000
    return f"{n:,.1f} TB"


def parent_main(args) -> None:
    tables = {
        "tall": (bench_tall.ensure_data(tall_args(args))["zarr"] if "tall" in args.tables else None,
                 {"route": "features", "memory_limit": args.memory_limit, "scores": args.with_scores}),
        "wide": (bench_wide.ensure_data(wide_args(args))["zarr"] if "wide" in args.tables else None,
                 {"route": "sketch", "memory_limit": args.memory_limit, "sketch": "subspace",
                  "scores": args.with_scores}),
    }
    lines = [f"{'table':6} {'setup':8} {'median s':>9} {'vs serial':>9} {'start-up s':>10} {'read':>10} "
             f"{'moved (bound)':>14} {'worker->worker':>15} {'tasks':>6}"]
    for table, (data, options) in tables.items():
        if table not in args.tables:
            continue
        runs = {s: [] for s in SETUPS}
        for _ in range(args.repeat):  # interleaved, so a busy spell hits every setup alike
            for setup in SETUPS:
                bench_tall.log(f"{table}: {setup} ...")
                runs[setup].append(spawn(args, setup, data, options))
        serial = statistics.median(r["seconds"] for r in runs["serial"])
        reference = runs["serial"][0]["variance"]
        for setup in SETUPS:
            rs = runs[setup]
            med = statistics.median(r["seconds"] for r in rs)
            worst = max(max(abs(a / b - 1) for a, b in zip(r["variance"], reference)) for r in rs)
            assert worst < 1e-9, f"{table} {setup}: variances differ from serial by {worst:.1e}"
            last = rs[-1]
            lines.append(f"{table:6} {setup:8} {med:9.2f} {med / serial:9.2f} "
                         f"{statistics.median(r['startup'] for r in rs):10.2f} {fmt_bytes(last['bytes_read']):>10} "
                         f"{fmt_bytes(last.get('bytes_moved', 0)):>14} {fmt_bytes(last.get('worker_to_worker', 0)):>15} "
                         f"{last.get('tasks', 0):6}")
    print("\n".join(lines))


def main(argv=None) -> None:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--tall-rows", type=int, default=1_000_000, help="tall table samples (default 1,000,000)")
    p.add_argument("--tall-cols", type=int, default=512, help="tall table features (default 512)")
    p.add_argument("--tall-chunk-rows", type=int, default=16384, help="tall Zarr chunk rows (default 16384)")
    p.add_argument("--wide-rows", type=int, default=100_000, help="wide table samples (default 100,000)")
    p.add_argument("--wide-cols", type=int, default=8192, help="wide table features (default 8,192)")
    p.add_argument("--wide-chunk-rows", type=int, default=2048, help="wide Zarr chunk rows (default 2,048)")
    p.add_argument("--rank", type=int, default=20, help="components (default 20)")
    p.add_argument("--memory-limit", default="1GB", help="rankfold's ceiling, per process (default 1GB)")
    p.add_argument("--repeat", type=int, default=3, help="runs per setup; the median is reported (default 3)")
    p.add_argument("--with-scores", action="store_true",
                   help="write scores too, to a result store beside the data (on a cluster each worker "
                        "writes its own chunks; default: without)")
    p.add_argument("--tables", nargs="+", choices=("tall", "wide"), default=["tall", "wide"],
                   help="which tables to run (default both)")
    p.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    p.add_argument("--setup", help=argparse.SUPPRESS)
    p.add_argument("--data", help=argparse.SUPPRESS)
    p.add_argument("--options", help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.child:
        child_main(args)
    else:
        parent_main(args)


if __name__ == "__main__":
    main()

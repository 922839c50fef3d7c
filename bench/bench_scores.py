#!/usr/bin/env python
"""What scores cost: decompose with and without them, and projection against the read floor.

Uses the tall table of ``bench_tall.py`` (cached under ``bench/.cache/``; Zarr, zstd).  Every
run is its own subprocess; the table prints medians and ratios measured in the same run:

- randomized route (subspace, rank 20) with scores / without (target: at most 1.15);
- feature-Gram route with scores / without (target: at most one more read of the data);
- ``rankfold project`` of the whole table / rankfold's read-only pass over it (the floor).

Usage::

    .venv/bin/python bench/bench_scores.py                            # 1,000,000 x 512, 3 repeats
    .venv/bin/python bench/bench_scores.py --rows 100000 --repeat 1   # smoke run
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
import bench_tall  # noqa: E402  (the cached table, quiet-machine wait, reading helpers)

MARK = "BENCH-RESULT "
CONTENDERS = {
    "read-floor": "rankfold's reader over the Zarr table, no arithmetic",
    "sketch": "decompose --route sketch --no-scores",
    "sketch+scores": "decompose --route sketch (scores fused into the last pass)",
    "features": "decompose --route features --no-scores",
    "features+scores": "decompose --route features (one more pass for the scores)",
    "project": "project the whole table into the feature-Gram result",
}


def child(args) -> None:
    import rankfold

    meta = json.loads(args.data)
    path = meta["zarr"]
    work = tempfile.mkdtemp(dir=args.work)
    t0 = time.perf_counter()
    info: dict = {}
    if args.child == "read-floor":
        from rankfold.sources.readahead import iter_blocks

        src, part = bench_tall.rankfold_partition(path, args.memory_limit, args.rank)
        for _i, _s, block in iter_blocks(src, part):
            del block
        src.close()
        info["passes"] = 1
    elif args.child == "project":
        result = os.path.join(args.work, "features-result.zarr")
        if not os.path.exists(result):
            rankfold.decompose(path, args.rank, route="features", memory_limit=args.memory_limit, out=result,
                               scores=False)
            t0 = time.perf_counter()
        done = rankfold.project(result, path, out=os.path.join(work, "p.zarr"), memory_limit=args.memory_limit)
        info["passes"] = len(done.attrs["passes"])
    else:
        route = args.child.split("+")[0]
        res = rankfold.decompose(path, args.rank, route=route, memory_limit=args.memory_limit,
                                 scores=args.child.endswith("+scores"), out=os.path.join(work, "r.zarr"))
        info["passes"] = len(res.attrs["passes"])
        info["pass_seconds"] = [round(p["seconds"], 2) for p in res.attrs["passes"]]
    info["seconds"] = time.perf_counter() - t0
    info["peak_rss"] = bench_tall.proc_status("VmHWM")
    shutil.rmtree(work, ignore_errors=True)
    print(MARK + json.dumps(info), flush=True)


def spawn(name: str, args, meta: dict) -> dict:
    cmd = [sys.executable, os.path.abspath(__file__), "--child", name, "--data", json.dumps(meta),
           "--rank", str(args.rank), "--memory-limit", args.memory_limit, "--work", args.work]
    proc = subprocess.run(cmd, stdout=subprocess.PIPE, text=True)
    for line in proc.stdout.splitlines():
        if line.startswith(MARK):
            return json.loads(line[len(MARK):])
    return {"error": f"exit code {proc.returncode}", "stdout": proc.stdout[-2000:]}


def parent(args) -> None:
    tall_args = argparse.Namespace(rows=args.rows, cols=args.cols, seed=0, chunk_rows=16384, row_group_rows=65536)
    meta = bench_tall.ensure_data(tall_args)
    bench_tall.warm_cache([meta["zarr"]])
    args.work = tempfile.mkdtemp(prefix="bench-scores-", dir=bench_tall.CACHE)
    runs: dict[str, list[dict]] = {name: [] for name in CONTENDERS}
    try:
        spawn("project", args, meta)  # builds the feature-Gram result once, outside the timings
        for r in range(args.repeat):
            for name in CONTENDERS:
                if args.quiet_wait:
                    bench_tall.wait_for_quiet(args.quiet_wait)
                out = spawn(name, args, meta)
                runs[name].append(out)
                bench_tall.log(f"repeat {r + 1}/{args.repeat} {name:<16} "
                               + (f"{out['seconds']:.2f} s" if "seconds" in out else out.get("error", "?")))
    finally:
        shutil.rmtree(args.work, ignore_errors=True)
    med = {n: statistics.median(x["seconds"] for x in v if "seconds" in x) for n, v in runs.items()
           if any("seconds" in x for x in v)}
    rss = {n: max(x.get("peak_rss", 0) for x in v) for n, v in runs.items()}
    print(f"\nscores benchmark: {args.rows:,} x {args.cols} float32 Zarr, rank {args.rank}, "
          f"memory limit {args.memory_limit}, {args.repeat} repeat(s); medians\n")
    print(f"{'run':<18}{'seconds':>9}{'peak RSS':>11}  what")
    for name, what in CONTENDERS.items():
        if name in med:
            print(f"{name:<18}{med[name]:>9.2f}{bench_tall.fmt_bytes(rss[name]):>11}  {what}")
    print()
    if {"sketch", "sketch+scores"} <= set(med):
        print(f"randomized route, scores / none : {med['sketch+scores'] / med['sketch']:.3f}  (target <= 1.15)")
    if {"features", "features+scores", "read-floor"} <= set(med):
        extra = (med["features+scores"] - med["features"]) / med["read-floor"]
        print(f"feature Gram, scores / none     : {med['features+scores'] / med['features']:.3f}  "
              f"(extra time = {extra:.2f} reads of the data; target <= 1)")
    if {"project", "read-floor"} <= set(med):
        gb = args.rows * args.cols * 4 / 1e9
        print(f"projection / read floor         : {med['project'] / med['read-floor']:.3f}  "
              f"({gb / med['project']:.2f} GB/s of stored float32 against {gb / med['read-floor']:.2f} GB/s)")


def main(argv=None) -> None:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--rows", type=int, default=1_000_000)
    p.add_argument("--cols", type=int, default=512)
    p.add_argument("--rank", type=int, default=20)
    p.add_argument("--repeat", type=int, default=3)
    p.add_argument("--memory-limit", default="1GB")
    p.add_argument("--quiet-wait", type=float, default=60.0,
                   help="wait up to this many seconds for an idle machine before each run (0 to skip)")
    p.add_argument("--child", help=argparse.SUPPRESS)
    p.add_argument("--data", help=argparse.SUPPRESS)
    p.add_argument("--work", help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.child:
        child(args)
    else:
        parent(args)


if __name__ == "__main__":
    main()

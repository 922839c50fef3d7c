"""The ``rankfold`` command line: argument parsing and error reporting only.

``main(argv) -> int`` parses, calls the library, prints, and turns every
:class:`~rankfold.errors.RankfoldError` into a one-line message and its exit
code in one place (:func:`main`).  No computation lives here.
"""

from __future__ import annotations

import argparse
import os
import shlex
import signal
import sys
import time

from rankfold.errors import RankfoldError

EXIT_INTERNAL = 70
EXIT_INTERRUPTED = 130


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="rankfold",
        description="Principal components of tables too big for memory (Parquet, Zarr, .npy).")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    d = sub.add_parser("decompose", help="compute the leading principal components of a table")
    d.add_argument("source", metavar="SOURCE", help="Parquet file or folder, Zarr array or group, or .npy file")
    d.add_argument("--rank", "-k", type=int, required=True, help="number of components to keep")
    d.add_argument("--out", "-o", required=True, metavar="RESULT.zarr", help="result store to write")
    _source_options(d)
    d.add_argument("--id-column", metavar="NAME", help="Parquet column kept as sample ids")
    _planning_options(d)
    d.add_argument("--seed", type=int, default=0, help="seed of the random test matrix (randomized route)")
    d.add_argument("--no-scores", dest="scores", action="store_false",
                   help="skip the per-sample outputs (scores, residuals, flags); saves a pass on some routes")
    d.add_argument("--scores-dtype", choices=("float32", "float64"), default="float32",
                   help="dtype of the stored scores (default float32)")
    d.add_argument("--flag-threshold", type=float, default=3.5, metavar="T",
                   help="flag samples whose residual exceeds median + T x 1.4826 x MAD (default 3.5)")
    d.add_argument("--overwrite", action="store_true", help="replace an existing result store")
    d.add_argument("--checkpoint-every", type=float, default=300.0, metavar="SECONDS",
                   help="save the progress of a pass this often (default 300; 0 = after every block); "
                        "rerunning the same command resumes from the last save")
    d.add_argument("--restart", action="store_true",
                   help="discard a checkpoint left by an earlier run of this command and start over")
    d.add_argument("--quiet", "-q", action="store_true", help="print nothing but errors")
    _cluster_option(d)

    p = sub.add_parser("plan", help="say which route would run, its passes, memory and time, without reading data")
    p.add_argument("source", metavar="SOURCE", help="Parquet file or folder, Zarr array or group, or .npy file")
    p.add_argument("--rank", "-k", type=int, required=True, help="number of components to keep")
    p.add_argument("--no-scores", dest="scores", action="store_false", help="plan without the per-sample outputs")
    _source_options(p)
    _planning_options(p)

    j = sub.add_parser("project", help="place new samples into an existing decomposition")
    j.add_argument("result", metavar="RESULT.zarr")
    j.add_argument("source", metavar="SOURCE", help="table holding every feature of the result, by name")
    j.add_argument("--out", "-o", required=True, metavar="SCORES", help="Zarr group, or Parquet file with --format parquet")
    j.add_argument("--format", choices=("zarr", "parquet"), default="zarr", help="output format (default zarr)")
    j.add_argument("--memory-limit", metavar="SIZE", help="ceiling for blocks and buffers (default: 60%% of available)")
    j.add_argument("--scores-dtype", choices=("float32", "float64"), default="float32")
    j.add_argument("--id-column", metavar="NAME", help="Parquet id column (default: the one the result used)")
    j.add_argument("--array", metavar="NAME", help="array inside a Zarr group")
    j.add_argument("--overwrite", action="store_true", help="replace an earlier projection at --out")
    j.add_argument("--quiet", "-q", action="store_true", help="print nothing but errors")
    _cluster_option(j)

    s = sub.add_parser("show", help="print a result's components, route and timings")
    s.add_argument("result", metavar="RESULT.zarr")
    s.add_argument("--top", type=int, default=None, help="show only the first N components")

    c = sub.add_parser("compare", help="exact against randomized on a subset, or two stored results",
                       description="With one data source: draw a reproducible subset, run the exact route and "
                       "randomized settings on it, and recommend the cheapest setting that meets the target. "
                       "With two result stores: the same per-component figures for the second against the first.")
    c.add_argument("paths", nargs="+", metavar="SOURCE | RESULT_A RESULT_B",
                   help="a Parquet/Zarr/.npy table, or two rankfold result stores")
    c.add_argument("--out", "-o", required=True, metavar="REPORT_DIR", help="report folder to create")
    c.add_argument("--rank", "-k", type=int, help="number of components compared (subset comparison)")
    c.add_argument("--subset", metavar="FRACTION", help="expected share of the samples kept: 5%%, 0.05 (default 5%%)")
    c.add_argument("--feature-subset", metavar="FRACTION", help="share of the features kept (default: all)")
    c.add_argument("--settings", metavar="SPEC",
                   help="randomized settings, e.g. 'subspace:p=10,q=2;krylov:q=1;one-pass' (default: subspace "
                        "q=0,1,2, krylov q=2 and one-pass, p=10)")
    c.add_argument("--target-angle", type=float, default=None, metavar="DEG",
                   help="largest angle to the exact components a setting may have (default 5 degrees)")
    c.add_argument("--seed", type=int, help="seed of the subset and of the settings (default 0)")
    c.add_argument("--overwrite", action="store_true", help="replace an earlier report folder at --out")
    _source_options(c)
    _cluster_option(c)

    r = sub.add_parser("report", help="write a self-contained HTML report of a result (figures, numbers as JSON)")
    r.add_argument("result", metavar="RESULT.zarr")
    r.add_argument("--out", "-o", metavar="DIR",
                   help="report folder to write (default: the result's path with .zarr replaced by .report)")
    r.add_argument("--label-column", metavar="NAME",
                   help="Parquet column of the source colouring the scores scatter (at most 12 distinct values)")
    r.add_argument("--max-points", type=int, default=20000, metavar="N",
                   help="most samples drawn in the scatter, chosen at random (default 20000)")
    r.add_argument("--seed", type=int, default=0, help="seed of the scatter's random sample (default 0)")
    r.add_argument("--overwrite", action="store_true", help="replace an existing report folder")

    m = sub.add_parser("demo", help="generate two invented data sets and decompose them")
    m.add_argument("--out", default="rankfold-demo", metavar="DIR", help="folder for data and results (default: ./rankfold-demo)")
    m.add_argument("--scale", type=float, default=1.0,
                   help="multiply the data size (e.g. 50 for tables larger than a laptop's memory)")
    m.add_argument("--memory-limit", metavar="SIZE", help="ceiling for data and state")
    return parser


def _source_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--memory-limit", metavar="SIZE", help="ceiling for data and state, e.g. 512MB, 4GB "
                   "(default: 60%% of available memory)")
    p.add_argument("--standardize", action="store_true", help="correlation PCA (unit-variance features)")
    p.add_argument("--columns", nargs="+", metavar="NAME", help="Parquet columns to use (names or patterns like 'temp_*')")
    p.add_argument("--exclude", nargs="+", metavar="NAME", help="Parquet columns to leave out (names or patterns)")
    p.add_argument("--samples-as", choices=("rows", "columns"), default="rows",
                   help="how samples are stored in a Zarr or .npy array (default: rows)")
    p.add_argument("--missing", choices=("refuse", "fill-mean"), default="refuse",
                   help="missing values: refuse (default) or fill with the column mean")
    p.add_argument("--missing-code", type=float, metavar="VALUE",
                   help="a stored value meaning missing, e.g. -1 in integer genotype stores")
    p.add_argument("--array", metavar="NAME", help="array inside a Zarr group")


def _cluster_option(p: argparse.ArgumentParser) -> None:
    p.add_argument("--cluster", metavar="ADDRESS|local:N",
                   help="read the data on a dask.distributed cluster (every pass of decompose and "
                        "project, the subset of compare): a scheduler address (tcp://host:8786) or "
                        "local:N for N worker processes on this machine")


def _planning_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--route", choices=("auto", "memory", "features", "samples", "sketch"), default="auto",
                   help="force a route (default: the planner picks the fastest that fits)")
    p.add_argument("--accuracy", choices=("exact", "approximate"), default="exact",
                   help="exact (default) keeps to exact routes unless none fits; approximate allows "
                        "the randomized route when it is faster")
    p.add_argument("--oversample", type=int, default=10, metavar="P",
                   help="extra sketch columns beyond the rank (randomized route, default 10)")
    p.add_argument("--power-iterations", type=int, default=2, metavar="Q",
                   help="passes of subspace iteration (randomized route, default 2)")
    p.add_argument("--sketch", choices=("subspace", "krylov", "one-pass"), default="subspace",
                   help="randomized method: subspace iteration (default), block Krylov for slowly decaying "
                        "spectra, or one-pass for data that can be read only once (less accurate)")


def _common(args) -> dict:
    """Keyword arguments shared by plan and decompose."""
    return dict(memory_limit=args.memory_limit, standardize=args.standardize, columns=args.columns,
                exclude=args.exclude, samples_as=args.samples_as, missing=args.missing,
                missing_code=args.missing_code, route=args.route, array=args.array, accuracy=args.accuracy,
                oversample=args.oversample, power_iterations=args.power_iterations, sketch=args.sketch)


def _decompose(args) -> int:
    from rankfold.api import decompose
    from rankfold.progress import command_monitor
    from rankfold.report import describe_result

    if not args.quiet:
        print(f"rankfold: decomposing {args.source} into {args.rank} component(s)", file=sys.stderr)
    # Bars on a terminal, status lines otherwise, the run log beside the result (rankfold.progress).
    monitor = command_monitor(args.out, sys.stderr, quiet=args.quiet,
                              command=shlex.join(["rankfold", *args.argv]))

    def show_resume(message: str) -> None:
        if not args.quiet:
            print(f"rankfold: {message}", file=sys.stderr, flush=True)

    with monitor:
        result = decompose(args.source, args.rank, id_column=args.id_column, seed=args.seed, out=args.out,
                           overwrite=args.overwrite, progress=monitor, on_plan=monitor.on_plan,
                           scores=args.scores, scores_dtype=args.scores_dtype, flag_threshold=args.flag_threshold,
                           checkpoint_every=args.checkpoint_every, restart=args.restart, on_resume=show_resume,
                           cluster=args.cluster,
                           **_common(args))
        lines = describe_result(result)
        monitor.finished(lines)
    if not args.quiet:
        print("\n".join(lines))
    return 0


def _plan(args) -> int:
    from rankfold.api import plan

    print("\n".join(plan(args.source, args.rank, scores=args.scores, **_common(args)).lines()))
    return 0


def _project(args) -> int:
    import warnings

    from rankfold.projection import project
    from rankfold.report import describe_projection

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        done = project(args.result, args.source, out=args.out, format=args.format, memory_limit=args.memory_limit,
                       scores_dtype=args.scores_dtype, id_column=args.id_column, array=args.array,
                       overwrite=args.overwrite, cluster=args.cluster)
    for w in caught:
        print(f"rankfold: warning: {w.message}", file=sys.stderr)
    if not args.quiet:
        print("\n".join(describe_projection(done)))
    return 0


def _show(args) -> int:
    from rankfold.report import describe_result
    from rankfold.result import open_result

    print("\n".join(describe_result(open_result(args.result), args.top)))
    return 0


def _report(args) -> int:
    from rankfold.reporting import default_report_folder, write_result_report
    from rankfold.result import open_result

    out = args.out or default_report_folder(args.result)
    print(write_result_report(open_result(args.result), out, label_column=args.label_column,
                              max_points=args.max_points, seed=args.seed, overwrite=args.overwrite))
    return 0


def _demo(args) -> int:
    from rankfold.demo import run_demo
    from rankfold.memory import parse_memory

    t0 = time.perf_counter()
    for line in run_demo(os.path.abspath(args.out), scale=args.scale,
                         memory_limit=parse_memory(args.memory_limit)):
        print(line, flush=True)
    print(f"\ndemo finished in {time.perf_counter() - t0:.1f} s")
    return 0


def _compare(args) -> int:
    from rankfold.compare.engine import DEFAULT_TARGET_ANGLE, compare_paths, report_page
    from rankfold.compare.text import comparison_lines

    comparison = compare_paths(
        args.paths, rank=args.rank, out=args.out, overwrite=args.overwrite,
        target_angle=DEFAULT_TARGET_ANGLE if args.target_angle is None else args.target_angle,
        subset=args.subset, feature_subset=args.feature_subset, settings=args.settings, seed=args.seed,
        memory_limit=args.memory_limit, standardize=args.standardize, missing=args.missing,
        samples_as=args.samples_as, columns=args.columns, exclude=args.exclude,
        missing_code=args.missing_code, array=args.array, cluster=args.cluster)
    print("\n".join(comparison_lines(comparison)))
    page = report_page(args.out)
    print(f"report: {page or os.path.join(args.out, 'comparison.json')}")
    return 0


COMMANDS = {"decompose": _decompose, "plan": _plan, "project": _project, "show": _show, "report": _report,
            "demo": _demo, "compare": _compare}


def main(argv: list[str] | None = None) -> int:
    """Run the command line with ``argv``; return the exit code."""
    parser = _parser()
    if hasattr(signal, "SIGXFSZ"):
        # Past a file-size limit (ulimit -f) writes then fail with EFBIG, which the
        # result and checkpoint writers turn into a message, instead of the signal
        # killing the process without one.
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse has printed its usage message
        return int(exc.code or 0)
    args.argv = [str(a) for a in (sys.argv[1:] if argv is None else argv)]
    try:
        return COMMANDS[args.command](args)
    except RankfoldError as exc:
        print(f"rankfold: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("rankfold: interrupted; no result was written. Run the same command again to resume from the "
              "last checkpoint saved (if any), or add --restart to start over", file=sys.stderr)
        return EXIT_INTERRUPTED
    except MemoryError:
        print("rankfold: error: out of memory; lower --memory-limit so that blocks fit, "
              "or close other programs", file=sys.stderr)
        return 4
    except OSError as exc:
        print(f"rankfold: error: {exc.filename or ''}: {exc.strerror or exc}", file=sys.stderr)
        return 3
    except Exception as exc:  # a bug of ours: say so plainly, without a traceback
        if os.environ.get("RANKFOLD_DEBUG"):
            raise
        print(f"rankfold: internal error ({type(exc).__name__}: {exc}); please report it with the "
              "command you ran (set RANKFOLD_DEBUG=1 for details)", file=sys.stderr)
        return EXIT_INTERNAL


def run() -> None:
    """Console-script entry point."""
    sys.exit(main())

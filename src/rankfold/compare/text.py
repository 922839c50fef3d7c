"""A comparison as lines of text, for ``rankfold compare`` (the CLI prints them)."""

from __future__ import annotations

from rankfold.memory import format_bytes


def comparison_lines(c: dict) -> list[str]:
    """Header, one row per setting (worst component), the recommendation and the full-table estimate."""
    ref = c["reference"]
    k = len(ref["variance"])
    lines = [c["title"]]
    if c.get("subset"):
        s = c["subset"]
        lines.append(f"subset   {s['samples']:,} samples x {s['features']:,} features "
                     f"(fraction {s['fraction']:.3g}, seed {s['seed']})")
    if c.get("cluster"):
        lines.append(cluster_line(c["cluster"]))
    fr = ", ".join(f"{v:.2%}" for v in ref["variance_fraction"])
    lines.append(f"reference {ref['label']}: {ref['passes']} pass(es), {ref['seconds']:.2f} s; "
                 f"variance fractions {fr}")
    lines.append(f"worst of {k} component(s) per setting; target: every angle below "
                 f"{c['target_angle_degrees']:g} degrees")
    width = max([len("setting")] + [len(e["label"]) for e in c["settings"]])
    lines.append(f"  {'setting':<{width}}  passes  seconds  max angle  max eig err  min score r  "
                 f"bound      true error  meets")
    for e in c["settings"]:
        corr = e["score_correlation"]
        r = "-" if not corr or any(v is None for v in corr) else f"{min(corr):.5f}"
        lines.append(f"  {e['label']:<{width}}  {e['passes']:>6}  {_num(e['seconds'], '.2f'):>7}  "
                     f"{_num(_worst(e['angle_degrees']), '.3f'):>9}  {_num(_worst(e['eigenvalue_relative_error']), '.2e'):>11}  "
                     f"{r:>11}  {_num(e['error_bound'], '.4g'):<9}  {_num(e['true_error'], '.4g'):<10}  "
                     f"{'yes' if e['meets_target'] else 'no'}")
    if c["kind"] == "subset":
        if c["recommended"]:
            lines.append(f"recommended: {c['recommended']} (meets the target with the fewest passes, "
                         "then the least memory)")
        else:
            lines.append("recommended: none of the settings meets the target; try more power iterations "
                         "(q), krylov, a larger oversampling (p), or a looser --target-angle")
        est = c.get("full_table_estimate")
        if est:
            lines.append(f"full table with it: about {_duration(est['seconds'])}, {est['passes']} passes, peak "
                         f"memory about {format_bytes(est['peak_memory'])} ({est['route']} route, planner estimate)")
    return lines


def cluster_line(info: dict) -> str:
    """Where the subset was read: ``subset read on local:2 (2 workers, ...)``; the runs are this process's."""
    where = info["kind"] if str(info["kind"]).startswith("local:") else info["scheduler"]
    return (f"subset read on {where} ({info['workers']} worker(s), {info['tasks']} task(s), "
            f"{format_bytes(info['bytes_moved'])} moved); the runs below ran in this process")


def _worst(values):
    present = [v for v in values if v is not None]
    return max(present) if present else None


def _num(value, fmt: str) -> str:
    return "-" if value is None else format(value, fmt)


def _duration(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.1f} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"

"""What ``goalkit scan`` prints about one log, and the partial layout it offers (the command:
:mod:`goalkit.pipeline.scancommand`)."""

from __future__ import annotations

import os

from goalkit.errors import LayoutError
from goalkit.logs.detect import partial_layout
from goalkit.logs.layout import is_layout_file
from goalkit.logs.texttable import text_table
from goalkit.outputs import write_text


def _fmt(x) -> str:
    return f"{x:.6g}" if isinstance(x, float) else str(x)


def render_report(report: dict) -> list[str]:
    """The human-readable form of a :func:`~goalkit.logs.scan.scan_logs` report."""
    conv = {"T+1": "T+1 observations per episode", "pairs": "observation / next-observation pairs",
            "T": "T observations per episode (last action dropped)"}[report["convention"]]
    L = report["lengths"]
    kept = report["episodes"]
    total = report["episodes_in_log"]
    out = [f"log:          {report['path']}",
           f"stored as:    {report['shape']}, {conv}",
           f"episodes:     {kept}" + (f" usable of {total}" if total != kept else ""),
           f"transitions:  {report['steps']}",
           f"length:       shortest {L['min']}, median {_fmt(L['median'])}, mean {L['mean']:.2f}, "
           f"longest {L['max']}",
           "", "keys read:"]
    rows = [(k["role"], k["key"], k["dtype"], "attribute" if k["shape"] == "attribute"
             else str(tuple(k["shape"]))) for k in report["keys"]]
    files = report.get("files") or []
    if len(files) > 1:       # several files: say which file each key was read in
        out.insert(1, f"files:        {len(files)} ({os.path.basename(files[0])} .. {os.path.basename(files[-1])})")
        rows = [(os.path.basename(k.get("file", "")),) + r for k, r in zip(report["keys"], rows)]
        out += text_table(("file", "role", "key", "dtype", "stored shape"), rows)
    else:
        out += text_table(("role", "key", "dtype", "stored shape"), rows)
    out += ["", "observation range:"]
    out += text_table(("dim", "field", "lowest", "highest"),
                      [(d["dim"], d["field"] or "-", _fmt(d["min"]), _fmt(d["max"]))
                       for d in report["observation_range"]])
    if report["success_by_task"] is not None:
        out += ["", "success by task (an episode succeeds when its flag is ever true):"]
        out += text_table(("task", "episodes", "succeeded", "share"),
                          [("all" if t["task"] is None else t["task"], t["episodes"], t["succeeded"],
                            f"{t['rate']:.1%}") for t in report["success_by_task"]])
    if report["rewards"] is not None:
        r = report["rewards"]
        out += ["", f"rewards:      lowest {_fmt(r['min'])}, highest {_fmt(r['max'])}, "
                    f"mean {r['mean']:.4g}"]
    for title, items in (("notes", report["notes"]), ("findings", report["problems"])):
        if items:
            out += ["", f"{title}:"] + [f"  - {x}" for x in items]
    if report["skipped"]:
        out += ["", f"skipped episodes ({len(report['skipped'])}):"]
        out += [f"  - episode {s['episode']}: {s['reason']}" for s in report["skipped"][:20]]
        if len(report["skipped"]) > 20:
            out.append(f"  ... and {len(report['skipped']) - 20} more (see --json)")
    return out


def offer_partial(exc: LayoutError, logs, write_layout, replace: bool) -> None:
    """Detection could not decide: save a partial layout (with --write-layout) or say how to get one."""
    text = partial_layout(logs, reason=exc.message)
    if text is None:                       # no array found: nothing to list
        return
    if write_layout is not None:
        write_text(write_layout, text, replace=replace, ours=is_layout_file, what="layout file")
        exc.message += (f"; a partial layout listing every array with a guess per role was saved to "
                        f"{write_layout}: finish it, then rerun with --layout {write_layout}")
    else:
        exc.message += ("; --write-layout FILE saves a partial layout listing every array with a guess per "
                        "role, for you to finish")
    exc.args = (exc.render(),)

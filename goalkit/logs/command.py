"""The ``goalkit scan`` command: check task logs, summarise them, propose a layout."""

from __future__ import annotations

import click

from goalkit.cli_support import echo_json, progress, quiet_option, user_errors
from goalkit.errors import LayoutError, LogError
from goalkit.logs.bagfile import is_bag_path
from goalkit.logs.bagscan import list_topics, propose_bag_layout, render_topics
from goalkit.logs.detect import partial_layout, propose_layout
from goalkit.logs.layout import is_layout_file, layout_to_toml, load_layout
from goalkit.logs.opener import open_logs
from goalkit.logs.scan import scan_logs
from goalkit.logs.texttable import text_table
from goalkit.outputs import check_no_overlap, refuse_existing, write_text


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


def _offer_partial(exc: LayoutError, logs, write_layout, replace: bool) -> None:
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


@click.command("scan", context_settings={"show_default": True})
@click.argument("logs", type=click.Path(), metavar="LOGS")
@click.option("--layout", "layout_file", type=click.Path(dir_okay=False), default=None,
              help="Layout file (TOML) mapping the log's keys to roles. Without it a layout is "
                   "proposed from the log and printed.")
@click.option("--json", "as_json", is_flag=True, help="Print the report as one JSON object.")
@click.option("--write-layout", "write_layout", type=click.Path(dir_okay=False), default=None,
              help="Save the layout used (given or proposed) to this file (never one of the inputs).")
@click.option("--replace", is_flag=True,
              help="With --write-layout: replace an existing layout file there (only a layout file is "
                   "ever replaced; without this option an existing file is refused).")
@click.option("--skip-bad-episodes", is_flag=True,
              help="Skip episodes with problems (listed in the report) instead of stopping.")
@click.option("--chunk", "chunk", type=click.IntRange(min=1), default=200_000,
              help="Transitions read per chunk.")
@quiet_option
@user_errors
def scan(logs, layout_file, as_json, write_layout, skip_bad_episodes, chunk, quiet, replace):
    """Check the task logs LOGS and summarise them; propose a layout when none is given.

    LOGS is an HDF5 file, a .npz file, a directory of per-episode .npz files, a Parquet step
    table (with --layout), or a ROS bag (ROS 1 .bag, ROS 2 bag directory) or a folder of bags:
    for bags the topics are listed and a layout is proposed from their message types.
    """
    if write_layout is not None:   # before any work: never over an input, never over a foreign file
        check_no_overlap([("logs", logs), ("layout", layout_file)], [("--write-layout", write_layout)])
        refuse_existing(write_layout, replace=replace, ours=is_layout_file, what="layout file")
    listing = None
    if is_bag_path(logs):
        listing = list_topics(logs)
    if layout_file is not None:
        layout = load_layout(layout_file)
        proposed = False
    elif str(logs).lower().endswith(".parquet"):
        raise LayoutError("Parquet step tables need a layout with shape = \"table\" (--layout); "
                          "see docs/layout.md", file=logs)
    elif listing is not None:
        layout = propose_bag_layout(listing)
        proposed = True
    else:
        try:
            layout = propose_layout(logs)
        except LayoutError as exc:
            _offer_partial(exc, logs, write_layout, replace)
            raise
        proposed = True
    try:
        if skip_bad_episodes:   # opening reads the log once to find episodes with bad values
            with progress(None, "check", quiet=quiet or as_json) as bar:
                source = open_logs(logs, layout, skip_bad_episodes=True, advance=bar.update)
        else:
            source = open_logs(logs, layout)
        with progress(int(source.lengths.sum()), "scan", quiet=quiet or as_json) as bar:
            report = scan_logs(source, max_transitions=chunk, advance=bar.update)
    except LogError as exc:
        if exc.episode is not None and not skip_bad_episodes:
            exc.message += " (--skip-bad-episodes skips such episodes)"
        raise
    text = layout_to_toml(layout)
    if proposed:
        report["notes"].insert(0, "no layout given: read with the proposed layout below")
    report["layout"] = text
    report["layout_proposed"] = proposed
    if listing is not None:
        report["topics"] = listing["topics"]
    if write_layout is not None:
        write_text(write_layout, text, replace=replace, ours=is_layout_file, what="layout file")
        report["layout_written"] = str(write_layout)
    if as_json:
        echo_json(report)
        return
    if quiet:
        return
    if listing is not None:
        for line in render_topics(listing):
            click.echo(line)
    for line in render_report(report):
        click.echo(line)
    if proposed:
        click.echo("")
        click.echo("proposed layout:" if write_layout is None else f"proposed layout (saved to {write_layout}):")
        for line in text.splitlines():
            click.echo(f"  {line}".rstrip())
    elif write_layout is not None:
        click.echo(f"\nlayout saved to {write_layout}")

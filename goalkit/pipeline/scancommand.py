"""The ``goalkit scan`` command: check task logs, summarise them, propose a layout, write a
starter recipe; or scan every source of a recipe."""

from __future__ import annotations

import os
from pathlib import Path

import click

from goalkit.archive import is_pattern
from goalkit.cli_support import echo_json, progress, quiet_option, user_errors
from goalkit.errors import LayoutError, LogError, OutputError
from goalkit.logs.anylogs import holds_log_files, open_logs
from goalkit.logs.bagfile import is_bag_path
from goalkit.logs.bagscan import list_topics, propose_bag_layout, render_topics
from goalkit.logs.detect import propose_layout
from goalkit.logs.layout import is_layout_file, layout_to_toml, load_layout
from goalkit.logs.multi import expand_entries
from goalkit.logs.scan import scan_logs
from goalkit.logs.scanreport import offer_partial, render_report
from goalkit.outputs import check_no_overlap, refuse_existing, write_text
from goalkit.pipeline.recipe import load_recipe, parse_recipe
from goalkit.pipeline.scansources import render_sources, scan_sources
from goalkit.pipeline.starter import choose_goal, placeholder_threshold, starter_recipe


def _refuse_any_file(path) -> None:
    """A starter recipe never replaces anything (there is no --replace for it)."""
    if os.path.isfile(path) and not os.path.islink(path):
        raise OutputError("the recipe already exists; scan never replaces a file (choose another path)", file=path)
    refuse_existing(path, replace=False, what="recipe")


def _is_recipe_argument(logs) -> bool:
    return len(logs) == 1 and str(logs[0]).lower().endswith(".toml")


def _log_files(logs, layout) -> list[str] | None:
    """The files several LOGS name (expanded as a recipe's [logs] path list), or None for one log."""
    if len(logs) == 1 and not is_pattern(logs[0]) and not holds_log_files(logs[0], layout):
        return None
    entries = [os.path.abspath(os.path.expanduser(e)) for e in logs]
    files = expand_entries(entries, layout.shape if layout is not None else None, key=None)
    return files


def _scan_recipe(path, as_json, quiet, others) -> None:
    given = [name for name, value in others if value]
    if given:
        raise click.UsageError(f"{', '.join(given)} cannot be used when LOGS is a recipe")
    report = scan_sources(load_recipe(path))
    if as_json:
        echo_json(report)
    elif not quiet:
        for line in render_sources(report):
            click.echo(line)
    bad = next((s for s in report["sources"] if s["problem"] is not None), None)
    if bad is not None:
        tag = f" (source '{bad['name']}')" if bad["name"] else ""
        raise LogError(bad["problem"] + ("" if bad["problem"].endswith(tag) else tag))


def _starter_text(path, logs, source, report, layout_text, layout_file, skip) -> str:
    """The starter recipe's text, checked by loading it as a recipe."""
    tg = source.read(0, min(1, len(source.lengths))).task_goals
    goal = choose_goal(dict(source.fields), len(report["observation_range"]),
                       None if tg is None else int(tg.shape[1]))
    text = starter_recipe(logs, path, goal=goal, threshold=placeholder_threshold(report["observation_range"],
                                                                                 goal.columns),
                          layout_text=layout_text, layout_file=layout_file, skip_bad_episodes=skip,
                          episodes=report["episodes"], has_success=report["success_by_task"] is not None)
    parse_recipe(text, file=str(path), base=Path(os.path.abspath(path)).parent)
    return text


@click.command("scan", context_settings={"show_default": True})
@click.argument("logs", nargs=-1, required=True, metavar="LOGS...")
@click.option("--layout", "layout_file", type=click.Path(dir_okay=False), default=None,
              help="Layout file (TOML) mapping the log's keys to roles. Without it a layout is "
                   "proposed from the log and printed.")
@click.option("--json", "as_json", is_flag=True, help="Print the report as one JSON object.")
@click.option("--write-layout", "write_layout", type=click.Path(dir_okay=False), default=None,
              help="Save the layout used (given or proposed) to this file (never one of the inputs).")
@click.option("--write-recipe", "write_recipe", type=click.Path(dir_okay=False), default=None,
              help="Write a starter recipe for these logs to this new file (an existing file is never "
                   "replaced); paths in it are relative to its folder.")
@click.option("--replace", is_flag=True,
              help="With --write-layout: replace an existing layout file there (only a layout file is "
                   "ever replaced; without this option an existing file is refused).")
@click.option("--skip-bad-episodes", is_flag=True,
              help="Skip episodes with problems (listed in the report) instead of stopping.")
@click.option("--chunk", "chunk", type=click.IntRange(min=1), default=200_000,
              help="Transitions read per chunk.")
@quiet_option
@user_errors
def scan(logs, layout_file, as_json, write_layout, write_recipe, skip_bad_episodes, chunk, quiet, replace):
    """Check the task logs LOGS and summarise them; propose a layout when none is given.

    LOGS is an HDF5 file, a .npz file, a directory of per-episode .npz files, a Parquet step
    table (with --layout), or a ROS bag (ROS 1 .bag, ROS 2 bag directory) or a folder of bags:
    for bags the topics are listed and a layout is proposed from their message types. Several
    files, quoted glob patterns and folders of .h5/.npz files are read as one log, in natural
    order of their names (as a recipe's [logs] path list).

    LOGS may instead be one recipe (a .toml file): every source it names is opened on its own
    and reported (files, episodes, transitions, arrays, the layout used or the detection
    problem); exit status 2 when a source cannot be read.
    """
    if _is_recipe_argument(logs):
        _scan_recipe(logs[0], as_json, quiet, [("--layout", layout_file), ("--write-layout", write_layout),
                                               ("--write-recipe", write_recipe)])
        return
    layout = load_layout(layout_file) if layout_file is not None else None
    files = _log_files(logs, layout)
    first = files[0] if files else logs[0]
    inputs = [("logs", f) for f in (files or logs)] + [("layout", layout_file)]
    if write_layout is not None or write_recipe is not None:   # before any work: never over an input
        check_no_overlap(inputs, [("--write-layout", write_layout), ("--write-recipe", write_recipe)])
    if write_layout is not None:
        refuse_existing(write_layout, replace=replace, ours=is_layout_file, what="layout file")
    if write_recipe is not None:
        _refuse_any_file(write_recipe)
    listing = list_topics(first) if is_bag_path(first) else None
    proposed = layout is None
    if layout is None and str(first).lower().endswith(".parquet"):
        raise LayoutError("Parquet step tables need a layout with shape = \"table\" (--layout); "
                          "see docs/layout.md", file=first)
    if layout is None and listing is not None:
        layout = propose_bag_layout(listing)
    elif layout is None:
        try:
            layout = propose_layout(first)
        except LayoutError as exc:
            offer_partial(exc, first, write_layout, replace)
            if write_recipe is not None:
                exc.message += ("; no recipe was written: finish the layout, then run goalkit scan with "
                                "--layout and --write-recipe")
                exc.args = (exc.render(),)
            raise
    target = files if files and len(files) > 1 else first
    try:
        if skip_bad_episodes:   # opening reads the log once to find episodes with bad values
            with progress(None, "check", quiet=quiet or as_json) as bar:
                source = open_logs(target, layout, skip_bad_episodes=True, advance=bar.update)
        else:
            source = open_logs(target, layout)
        with progress(int(source.lengths.sum()), "scan", quiet=quiet or as_json) as bar:
            report = scan_logs(source, max_transitions=chunk, advance=bar.update)
    except LogError as exc:
        if exc.episode is not None and not skip_bad_episodes:
            exc.message += " (--skip-bad-episodes skips such episodes)"
        raise
    text = layout_to_toml(layout)
    if proposed:
        report["notes"].insert(0, "no layout given: read with the proposed layout below")
    if files and len(files) > 1:
        report["files"] = list(files)
    report["layout"] = text
    report["layout_proposed"] = proposed
    if listing is not None:
        report["topics"] = listing["topics"]
    recipe_text = None
    if write_recipe is not None:
        recipe_text = _starter_text(write_recipe, logs, source, report, text, write_layout or layout_file,
                                    skip_bad_episodes)
    if write_layout is not None:
        write_text(write_layout, text, replace=replace, ours=is_layout_file, what="layout file")
        report["layout_written"] = str(write_layout)
    if recipe_text is not None:
        write_text(write_recipe, recipe_text, replace=False, what="recipe")
        report["recipe_written"] = str(write_recipe)
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
    if write_recipe is not None:
        click.echo(f"\nstarter recipe written to {write_recipe}: its threshold is a placeholder; choose one "
                   f"with goalkit tune {write_recipe}")

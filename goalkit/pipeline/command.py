"""``goalkit build``: a recipe in, a goal-conditioned dataset out."""

from __future__ import annotations

import click

from goalkit.cli_support import ChunkProgress, command_line, echo_json, on_interrupt, quiet_option, user_errors, warn
from goalkit.errors import GoalkitError
from goalkit.pipeline.build import build as run_build
from goalkit.pipeline.buildfolder import folder_of
from goalkit.pipeline.workfolder import work_folder_of
from goalkit.pipeline.recipe import load_recipe
from goalkit.pipeline.graphsummary import summary_lines as graph_lines
from goalkit.pipeline.searchsetup import summary_lines
from goalkit.write.info import reward_text, widths_text


def format_summary(path, summary: dict, reward: dict | None = None, file_bytes: int | None = None,
                   seconds: float | None = None, card=()) -> str:
    """The human-readable build summary.

    Parameters
    ----------
    path : Path
        The set written.
    summary : dict
        The stored summary (rows, strategies, quantiles, composition, warnings).
    reward : dict, optional
        The reward rule (``RewardRule.describe()``): distance, threshold, form.
    file_bytes, seconds : optional
        The set's size and the build's wall-clock time.
    card : sequence of Path
        The card files written.
    """

    size = f", {file_bytes:,} bytes" if file_bytes is not None else ""
    took = f" in {seconds:.1f} s" if seconds is not None else ""
    lines = [f"wrote {path}{size}{took}",
             f"  rows: {summary['rows']['train']:,} train, {summary['rows']['validation']:,} validation",
             f"  reward: {reward_text(reward)}",
             f"  widths: {widths_text((summary.get('composition') or {}).get('widths'))}",
             f"  reached (all rows): {summary['reached_fraction']:.1%}",
             "  strategy          rows        reached"]
    for name, s in summary["strategies"].items():
        lines.append(f"  {name:<15} {s['rows']:>10,}   {s['reached_fraction']:>8.1%}")
    sources = summary.get("sources")
    if sources:
        lines.append("  source            episodes  transitions   goals each   rows (train/validation)")
        for name, v in sources.items():
            lines.append(f"  {name:<15} {v['episodes']:>10,} {v['transitions']:>12,}   "
                         f"{v.get('goals_per_transition', '-'):>10}   "
                         f"{v['rows']['train']:,}/{v['rows']['validation']:,}")
    q = summary.get("goal_distance_quantiles")
    if q:
        lines.append("  goal distance quantiles: " + "  ".join(f"{k}={v:.4g}" for k, v in q.items()))

    lines += summary_lines(summary) + rule_lines(summary)
    lines += graph_lines(summary)
    for w in summary.get("warnings", []):
        lines.append(f"  warning: {w}")
    if card:
        lines.append(f"  card: {', '.join(str(p) for p in card)} (goalkit info {path} prints its facts)")
    return "\n".join(lines)


def rule_lines(summary: dict) -> list[str]:
    """Summary lines of a region rule and of goal masks (none for other sets)."""
    lines = []
    r = summary.get("region")
    if r:
        parts = [f"{lo:g} <= delta{k}" if hi == float("inf") else f"delta{k} <= {hi:g}" if lo == -float("inf")
                 else f"{lo:g} <= delta{k} <= {hi:g}" for k, (lo, hi) in enumerate(zip(r["lower"], r["upper"]))
                 if not (lo == -float("inf") and hi == float("inf"))]
        moved = "" if r["margin"] == 0 else f", bounds moved out by {r['margin']:g}"
        lines.append(f"  region rule: reached iff {', '.join(parts) or 'always'} (delta = achieved - goal{moved})")
    m = summary.get("goal_masks")
    if m:
        total = sum(summary["rows"].values())
        share = ", ".join(f"{n / total:.0%}" if total else "-" for n in m["rows_per_dimension"])
        lines.append(f"  goal masks: rows constraining each goal dimension: {share}; "
                     f"full masks {m['full_mask_rows'] / total:.0%}" if total else "  goal masks: no rows")
    return lines


@click.command(context_settings={"show_default": True})
@click.argument("recipe", type=click.Path(dir_okay=False))
@click.option("--out", "out", type=click.Path(dir_okay=False), default=None,
              help="Write the dataset here instead of the recipe's [output] path.")
@click.option("--seed", type=int, default=None, help="Override the recipe's seed.")
@click.option("--chunk-rows", type=click.IntRange(min=1000), default=None, show_default=False,
              help="Output rows per processing chunk, or per shard with --workers/--scheduler (memory "
                   "and speed only; the output bytes do not depend on it).  [default: 65536 in one "
                   "process, 131072 per shard]")
@click.option("--workers", type=click.IntRange(min=0), default=0,
              help="Local worker processes; 0 builds in this process. With N >= 1 every chunk is a "
                   "shard file in .NAME.shards/ beside the output, and a re-run resumes.")
@click.option("--scheduler", default=None, metavar="ADDRESS",
              help="Run the shards on this running dask.distributed scheduler (e.g. tcp://host:8786).")
@click.option("--restart", is_flag=True,
              help="With --workers/--scheduler: discard the shards of an interrupted build instead of resuming.")
@click.option("--replace", is_flag=True,
              help="Replace an existing dataset at the output path. Only a goalkit set is ever replaced; "
                   "without this option an existing output is refused.")
@click.option("--keep-work", "keep_work", is_flag=True,
              help="Keep the relabelled rows in .NAME.work/ beside the set and reuse those of unchanged "
                   "episodes (same log file checksum and position, same recipe apart from its log paths) "
                   "on the next build with this option; the set's bytes are the same.")
@click.option("--no-card", "no_card", is_flag=True,
              help="Do not write the dataset card (NAME.card.md and NAME.card-goals.png beside the set).")
@click.option("--json", "as_json", is_flag=True, help="Print the summary as one JSON object.")
@quiet_option
@user_errors
def build(recipe, out, seed, chunk_rows, workers, scheduler, restart, replace, keep_work, no_card, as_json, quiet):
    """Build the goal-conditioned dataset that RECIPE describes.

    Reads the logs a chunk of episodes at a time, relabels every transition with the recipe's
    strategy mixture, scores each (transition, goal) pair with its reward rule and writes one
    HDF5 file (under a temporary name, renamed when complete). The file's bytes are the same
    whatever --chunk-rows, --workers or --scheduler. The output may not be, or lie in, any of the
    recipe's inputs, and an existing output is replaced only with --replace.

    Beside the set goes its dataset card, NAME.card.md with the plot NAME.card-goals.png
    (docs/card.md; `goalkit info SET` prints the same facts), unless --no-card.

    When logs grow (files added to the recipe's paths, or matched by its globs), rebuild with
    --keep-work --replace: only episodes of new or changed files are relabelled, the others are
    taken from the work folder, and the set is the same, byte for byte, as a fresh build.
    """
    if workers and scheduler is not None:
        raise GoalkitError("give --workers or --scheduler, not both", key="--scheduler")
    parsed = load_recipe(recipe).with_overrides(seed=seed, out=out)
    import os
    import time

    started = time.time()

    def note():
        out_path = parsed.output.path
        try:
            written = os.stat(out_path).st_mtime >= started - 1.0
        except OSError:
            written = False
        if written and not no_card:  # interrupted while the card was being written
            return (f"the set was written at {out_path}; its dataset card was not (write it with "
                    f"goalkit.write_card, or rerun with --replace)")
        text = interrupted_note(out_path, sharded=bool(workers or scheduler), cluster=scheduler is not None)
        if keep_work:
            text += (f"; the rows of finished units stay in {work_folder_of(out_path)}/ for the next "
                     f"build with --keep-work")
        return text

    on_interrupt(note)
    with ChunkProgress("build", quiet=quiet) as bar:
        result = run_build(parsed, max_rows_per_chunk=chunk_rows, progress=bar, workers=workers,
                           scheduler=scheduler, fresh=restart, replace=replace, card=not no_card,
                           keep_work=keep_work)
    extra = {"shards": result.shards} if result.shards is not None else {}
    if result.reuse is not None:
        extra["reuse"] = result.reuse
    extra.update(reward=parsed.reward.describe(), file_bytes=result.file_bytes, seconds=result.seconds,
                 card=[str(p) for p in result.card])
    if as_json:
        echo_json({"path": str(result.path), **result.summary, **extra})
    elif quiet:
        for w in result.summary.get("warnings", []):
            warn(w)
    else:
        click.echo(format_summary(result.path, result.summary, reward=parsed.reward.describe(),
                                  file_bytes=result.file_bytes, seconds=result.seconds, card=result.card))
        if result.shards is not None:
            s = result.shards
            click.echo(f"  shards: {s['total']} ({s['reused']} reused from an interrupted run, "
                       f"{s['computed']} computed on {s['runner']})")
        if result.reuse is not None:
            click.echo(reuse_line(result.reuse))


def reuse_line(reuse: dict) -> str:
    """The summary line of a build with --keep-work: episodes reused and new, the work folder."""
    eps = reuse["episodes"]
    if reuse["reason"]:
        return (f"  reuse: 0 episodes reused ({reuse['reason']}), {eps['new']:,} relabelled; "
                f"the work folder {reuse['folder']} was not used")
    return (f"  reuse: {eps['reused']:,} episodes reused, {eps['new']:,} new or changed (relabelled); "
            f"work folder {reuse['folder']}: {reuse['files']:,} files, {reuse['bytes']:,} bytes")


def interrupted_note(output, sharded: bool, cluster: bool = False) -> str:
    """What an interrupted build leaves: nothing at the output; with shards, the finished ones.

    Local workers have finished or dropped their shards when this is asked; tasks already
    running on a Dask cluster may still add shard files afterwards, so the count is a floor.
    """
    if not sharded:
        return f"nothing was written at {output}"
    folder = folder_of(output)
    kept = len(list(folder.glob("shard-*.npz"))) if folder.is_dir() else 0
    if not kept and not cluster:
        return f"nothing was written at {output}, and no shard had finished"
    more = " (tasks still running on the cluster may add more)" if cluster else ""
    return (f"nothing was written at {output}; {kept} finished shard{'' if kept == 1 else 's'} kept in "
            f"{folder}/{more}; run this to resume: {command_line(drop=('--restart',))}")

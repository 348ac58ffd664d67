"""``goalkit build``: a recipe in, a goal-conditioned dataset out."""

from __future__ import annotations

import click

from goalkit.cli_support import ChunkProgress, command_line, echo_json, on_interrupt, quiet_option, user_errors, warn
from goalkit.errors import GoalkitError
from goalkit.pipeline.build import build as run_build
from goalkit.pipeline.buildfolder import folder_of
from goalkit.pipeline.recipe import load_recipe
from goalkit.pipeline.graphsummary import summary_lines as graph_lines
from goalkit.pipeline.searchsetup import summary_lines


def format_summary(path, summary: dict) -> str:
    """The human-readable build summary."""
    lines = [f"wrote {path}",
             f"  rows: {summary['rows']['train']:,} train, {summary['rows']['validation']:,} validation",
             f"  reached (all rows): {summary['reached_fraction']:.1%}",
             "  strategy          rows        reached"]
    for name, s in summary["strategies"].items():
        lines.append(f"  {name:<15} {s['rows']:>10,}   {s['reached_fraction']:>8.1%}")
    q = summary.get("goal_distance_quantiles")
    if q:
        lines.append("  goal distance quantiles: " + "  ".join(f"{k}={v:.4g}" for k, v in q.items()))

    lines += summary_lines(summary)
    lines += graph_lines(summary)
    for w in summary.get("warnings", []):
        lines.append(f"  warning: {w}")
    return "\n".join(lines)


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
@click.option("--json", "as_json", is_flag=True, help="Print the summary as one JSON object.")
@quiet_option
@user_errors
def build(recipe, out, seed, chunk_rows, workers, scheduler, restart, replace, as_json, quiet):
    """Build the goal-conditioned dataset that RECIPE describes.

    Reads the logs a chunk of episodes at a time, relabels every transition with the recipe's
    strategy mixture, scores each (transition, goal) pair with its reward rule and writes one
    HDF5 file (under a temporary name, renamed when complete). The file's bytes are the same
    whatever --chunk-rows, --workers or --scheduler. The output may not be, or lie in, any of the
    recipe's inputs, and an existing output is replaced only with --replace.
    """
    if workers and scheduler is not None:
        raise GoalkitError("give --workers or --scheduler, not both", key="--scheduler")
    parsed = load_recipe(recipe).with_overrides(seed=seed, out=out)
    on_interrupt(lambda: interrupted_note(parsed.output.path, sharded=bool(workers or scheduler),
                                          cluster=scheduler is not None))
    with ChunkProgress("build", quiet=quiet) as bar:
        result = run_build(parsed, max_rows_per_chunk=chunk_rows, progress=bar, workers=workers,
                           scheduler=scheduler, fresh=restart, replace=replace)
    extra = {"shards": result.shards} if result.shards is not None else {}
    if as_json:
        echo_json({"path": str(result.path), **result.summary, **extra})
    elif quiet:
        for w in result.summary.get("warnings", []):
            warn(w)
    else:
        click.echo(format_summary(result.path, result.summary))
        if result.shards is not None:
            s = result.shards
            click.echo(f"  shards: {s['total']} ({s['reused']} reused from an interrupted run, "
                       f"{s['computed']} computed on {s['runner']})")


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

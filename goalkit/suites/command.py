"""``goalkit suite``: draw a held-out goal suite from a built set (thin; see goalkit.suites.make)."""

from __future__ import annotations

import click

from goalkit.errors import GoalkitError
from goalkit.cli_support import echo_json, on_interrupt, quiet_option, user_errors
from goalkit.suites.make import make_suite
from goalkit.suites.strata import DEFAULT_EDGES
from goalkit.write.relocate import LOGS_ROOT_HELP


def _edges(text: str) -> list:
    try:
        return [float(x) for x in str(text).replace(" ", "").split(",") if x]
    except ValueError:
        raise GoalkitError(f"expected comma-separated whole numbers, got {text!r}", key="--horizon-edges") from None


@click.command(context_settings={"show_default": True})
@click.argument("dataset", type=click.Path(dir_okay=False))
@click.option("--out", "out", type=click.Path(dir_okay=False), required=True,
              help="The suite file (HDF5) to write; its card goes beside it with suffix .md.")
@click.option("--horizon-edges", default=",".join(map(str, DEFAULT_EDGES)), metavar="N,N,...",
              help="Steps-to-goal bucket edges: 4,16,64 gives 1-4, 5-16, 17-64, >=65 (and unreachable).")
@click.option("--far-quantile", type=float, default=0.5,
              help="Goals farther from the nearest training goal than this quantile of the candidates are 'far'.")
@click.option("--far-distance", type=float, default=None,
              help="An explicit near/far cut in goal-space units (overrides --far-quantile).")
@click.option("--join-radius", type=float, default=None,
              help="Radius of neighbour joins between held-out episodes, goal space. Default: the set's Euclidean "
                   "reward threshold.")
@click.option("--join-neighbours", type=int, default=8, help="Nearest states searched per state and per goal.")
@click.option("--per-cell", type=int, default=100, help="Rows kept per (route, horizon bucket, near/far) cell.")
@click.option("--candidates", type=int, default=20000, help="Validation rows considered at most (chosen by seed).")
@click.option("--seed", type=int, default=0, help="Seed of every choice (same seed, byte-identical suite).")
@click.option("--replace", is_flag=True, help="Replace an existing suite file and card (only files of those kinds).")
@click.option("--logs-root", type=click.Path(file_okay=False), default=None, metavar="FOLDER",
              show_default="none: beside the set, then the recorded paths",
              help="Indexed sets (they read their logs): " + LOGS_ROOT_HELP)
@click.option("--json", "as_json", is_flag=True, help="Print the result as one JSON object.")
@quiet_option
@user_errors
def suite(dataset, out, horizon_edges, far_quantile, far_distance, join_radius, join_neighbours, per_cell,
          candidates, seed, replace, logs_root, as_json, quiet):
    """Draw a held-out goal suite from DATASET's validation split.

    Rows are (state, goal, horizon, reachable) pairs with the logged action, stratified by
    route (the own episode reaches the goal, only several joined episodes do, or none), horizon
    bucket and distance to the nearest training goal. Score checkpoints on it with
    goalkit assess.
    """
    on_interrupt(f"nothing was written at {out}")
    result = make_suite(dataset, out, edges=_edges(horizon_edges), far_quantile=far_quantile,
                        far_distance=far_distance, join_radius=join_radius, join_neighbours=join_neighbours,
                        per_cell=per_cell, candidates=candidates, seed=seed, replace=replace,
                        logs_root=logs_root)
    if as_json:
        echo_json(result.as_dict())
        return
    if quiet:
        return
    c = result.counts
    click.echo(f"wrote: {result.path} ({result.rows} rows from {c['episodes']} held-out episodes; "
               f"{c['candidates']} candidates, {c['joins']} joins) and its card {result.card}")
    for cell in c["cells"]:
        click.echo(f"  {cell['route']:<8} {cell['bucket']:<12} {cell['proximity']:<4} {cell['rows']:>6} rows "
                   f"of {cell['candidates']}")

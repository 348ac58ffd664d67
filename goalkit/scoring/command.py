"""``goalkit assess``: score named checkpoints on a held-out suite, offline (see goalkit.scoring.run)."""

from __future__ import annotations

import click

from goalkit.cli_support import echo_json, on_interrupt, quiet_option, user_errors
from goalkit.outputs import check_no_overlap, refuse_existing
from goalkit.scoring.report import is_png, plot_paths
from goalkit.scoring.run import assess_suite, check_options


@click.command(context_settings={"show_default": True})
@click.argument("dataset", type=click.Path(dir_okay=False))
@click.argument("suite", type=click.Path(dir_okay=False))
@click.option("--policy", "policies", multiple=True, metavar="MODULE:CALLABLE",
              help="A policy: called with {'observation', 'goal'} numpy batches, returns (B, A) actions. "
                   "Give twice to compare two checkpoints.")
@click.option("--value", "values", multiple=True, metavar="MODULE:CALLABLE",
              help="A value function: same batches, returns (B,) values. Give twice to compare two.")
@click.option("--import-path", type=click.Path(file_okay=False), default=None,
              help="A folder put in front of the import path to import the entry points from.")
@click.option("--batch-size", type=int, default=1024, help="Rows per call.")
@click.option("--resamples", type=int, default=1000, help="Bootstrap resamples over episodes (0: no intervals).")
@click.option("--confidence", type=float, default=0.95, help="Coverage of the intervals.")
@click.option("--seed", type=int, default=0, help="Seed of the resamples.")
@click.option("--plots", type=click.Path(file_okay=False), default=None, help="Write PNG plots into this folder.")
@click.option("--replace", is_flag=True, help="Replace existing plots (only PNG files).")
@click.option("--json", "as_json", is_flag=True, help="Print the report as one JSON object.")
@quiet_option
@user_errors
def assess(dataset, suite, policies, values, import_path, batch_size, resamples, confidence, seed, plots,
           replace, as_json, quiet):
    """Score policies and value functions on SUITE, drawn from DATASET, offline.

    Only the modules named are imported. Policy: action error against the logged actions where
    the log reaches the goal, by horizon bucket. Value: Spearman with negative steps-to-goal and
    ROC AUC for reachable vs unreachable goals. Intervals resample episodes. These are offline
    proxies, not a substitute for supervised trials on the machine.
    """
    check_options(policies=policies, values=values, batch_size=batch_size, resamples=resamples,
                  confidence=confidence)
    pngs = plot_paths(plots, policy=bool(policies), value=bool(values)) if plots else []
    check_no_overlap([("set", dataset), ("suite", suite)], [("--plots", p) for p in pngs])
    for p in pngs:
        refuse_existing(p, replace=replace, ours=is_png, what="plot")
    result = assess_suite(dataset, suite, policies=policies, values=values, import_path=import_path,
                          batch_size=batch_size, resamples=resamples, confidence=confidence, seed=seed)
    if plots:
        on_interrupt(f"plots already written in {plots}, if any, are kept")
    written = [str(p) for p in result.write_plots(plots, replace=replace)] if plots else []
    if as_json:
        echo_json({**result.as_dict(), "plots": written})
        return
    if quiet:
        return
    click.echo(result.render())
    if written:
        click.echo(f"plots: {', '.join(written)}")

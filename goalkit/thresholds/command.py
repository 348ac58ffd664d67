"""``goalkit tune``: choose the goal-match threshold of a recipe (thin; see goalkit.thresholds.session)."""

from __future__ import annotations

import click

from goalkit.cli_support import ChunkProgress, echo_json, on_interrupt, quiet_option, user_errors, warn
from goalkit.errors import TuningError
from goalkit.outputs import check_no_overlap, refuse_existing
from goalkit.pipeline.recipe import is_recipe_file, load_recipe
from goalkit.thresholds.plots import is_png, plot_paths
from goalkit.thresholds.recipe_edit import write_tuned_recipe
from goalkit.thresholds.report import render
from goalkit.thresholds.session import (CHUNK_TRANSITIONS, MAX_TRANSITIONS, check_distances, check_options,
                                  tune_recipe)


@click.command(context_settings={"show_default": True})
@click.argument("recipe", type=click.Path(dir_okay=False))
@click.option("--labels", "labels", type=click.Path(dir_okay=False), default=None,
              help="Labelled-pairs file (.npz or .csv: achieved, goal, reached, episode).")
@click.option("--from-success", is_flag=True,
              help="Label each logged transition by its success flag against its task goal.")
@click.option("--distance", "distances", multiple=True, metavar="NAME",
              help="Candidate distance (repeat, or comma-separate): euclidean, l1, chebyshev, "
                   "cosine, box. Default: the recipe's.")
@click.option("--chooser", default="max-f1", metavar="NAME",
              help="How to pick the threshold: max-f1, target-precision or youden.")
@click.option("--target-precision", "target", type=float, default=None,
              help="Precision the chooser target-precision must keep, in (0, 1].")
@click.option("--resamples", type=int, default=1000,
              help="Bootstrap resamples over episodes for the interval (0: none).")
@click.option("--plots", "plots", type=click.Path(file_okay=False), default=None,
              help="Write PNG plots into this folder.")
@click.option("--write-recipe", "write_recipe", type=click.Path(dir_okay=False), default=None,
              help="Write a copy of the recipe with the chosen threshold (needs labels); never over the "
                   "recipe or another input.")
@click.option("--replace", is_flag=True,
              help="Replace an existing tuned recipe (only a recipe) and existing plots (only PNG files); "
                   "without this option existing outputs are refused.")
@click.option("--max-transitions", type=int, default=MAX_TRANSITIONS,
              help="Read at most this many transitions: whole episodes, a fixed sample by seed.")
@click.option("--json", "as_json", is_flag=True, help="Print the result as one JSON object.")
@quiet_option
@user_errors
def tune(recipe, labels, from_success, distances, chooser, target, resamples, plots, write_recipe,
         replace, max_transitions, as_json, quiet):
    """Choose the goal-match threshold of RECIPE's [reward] rule.

    With labels (--labels FILE or --from-success) every distinct distance is tried as a
    threshold; the chooser picks one, a bootstrap over episodes gives its interval, and
    per-dimension box tolerances are suggested. Without labels only the goal space is
    described (motion per step and after h steps, distance to other episodes, rewarded
    share per strategy), with a rule-of-thumb range. Logs are read a chunk at a time.
    """
    check_options(labels=labels, from_success=from_success, chooser=chooser, target=target,
                  n_resamples=resamples, max_transitions=max_transitions)
    if write_recipe is not None and labels is None and not from_success:
        raise TuningError("writing a tuned recipe needs labels (--labels FILE or --from-success); "
                          "without labels tune only suggests a range", key="--write-recipe")
    parsed = load_recipe(recipe)
    _check_outputs(parsed, labels=labels, from_success=from_success, distances=distances, plots=plots,
                   write_recipe=write_recipe, replace=replace)
    if plots:
        on_interrupt(f"no tuned recipe was written; plots already written in {plots}, if any, are kept")
    with ChunkProgress("tune", quiet=quiet) as bar:
        result = tune_recipe(parsed, labels=labels, from_success=from_success, distances=distances,
                             chooser=chooser, target=target, n_resamples=resamples,
                             max_transitions=max_transitions, chunk_transitions=CHUNK_TRANSITIONS,
                             progress=bar)
    out = result.as_dict()
    out["plots"] = [str(p) for p in result.write_plots(plots, replace=replace)] if plots else []
    out["written_recipe"] = None
    if write_recipe is not None:
        ch = out["chosen"]
        note = (f"goalkit tune: {ch['chooser']} on {out['sample']['episodes']} episodes "
                f"({'success flags' if out['mode'] == 'success-flags' else 'labelled pairs'}); "
                f"was {parsed.reward.distance_name} {_value(parsed.reward.describe()['threshold'])}")
        edit = write_tuned_recipe(parsed, write_recipe, threshold=result.recipe_threshold(),
                                  distance=result.recipe_distance(), note=note, replace=replace)
        out["written_recipe"] = {"path": str(write_recipe), "kept_comments": edit.kept_comments,
                                 "changes": list(edit.changes)}
    if as_json:
        echo_json(out)
        return
    if quiet:
        for w in out.get("warnings", []):
            warn(w)
        return
    click.echo(render(out))
    if out["plots"]:
        click.echo(f"plots:      {len(out['plots'])} PNG files in {plots}")
    if out["written_recipe"]:
        w = out["written_recipe"]
        how = "" if w["kept_comments"] else " (written afresh: the original's comments could not be kept)"
        click.echo(f"wrote:      {w['path']}: {'; '.join(w['changes'])}{how}")


def _check_outputs(parsed, *, labels, from_success, distances, plots, write_recipe, replace) -> None:
    """Before any work: no output over an input, no existing output without --replace."""
    names = check_distances(distances) or [parsed.reward.distance_name]
    pngs = plot_paths(plots, names, labelled=labels is not None or from_success) if plots else []
    outputs = [("--write-recipe", write_recipe)] + [("--plots", p) for p in pngs]
    check_no_overlap(list(parsed.inputs()) + [("labels", labels)], outputs)
    if write_recipe is not None:
        refuse_existing(write_recipe, replace=replace, ours=is_recipe_file, what="tuned recipe")
    for p in pngs:
        refuse_existing(p, replace=replace, ours=is_png, what="plot")


def _value(x) -> str:
    return "[" + ", ".join(f"{v:.4g}" for v in x) + "]" if isinstance(x, (list, tuple)) else f"{x:.4g}"

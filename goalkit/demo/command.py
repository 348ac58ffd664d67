"""The ``goalkit demo`` command: write the invented irrigation-gantry logs, layout and recipe."""

from __future__ import annotations

import click

from goalkit.cli_support import echo_json, on_interrupt, progress, quiet_option, user_errors
from goalkit.demo.files import write_demo


@click.command("demo", context_settings={"show_default": True})
@click.argument("directory", type=click.Path(), metavar="DIR")
@click.option("--episodes", default=200, type=click.IntRange(min=1), help="Number of episodes to simulate.")
@click.option("--seed", default=0, type=click.IntRange(min=0),
              help="Seed; the same seed writes byte-identical files.")
@click.option("--frames", is_flag=True, help="Also store 32x32 top-down camera frames.")
@click.option("--replace", is_flag=True,
              help="Replace the demo's files in DIR if they exist (only demo logs, layout and recipe "
                   "files; without this option existing files are refused).")
@quiet_option
@click.option("--json", "as_json", is_flag=True, help="Print what was written as one JSON object.")
@user_errors
def demo(directory, episodes, seed, frames, replace, quiet, as_json):
    """Write invented demo logs of the irrigation-gantry bench into DIR.

    Writes DIR/gantry-logs.h5 (HDF5, one group per episode), DIR/gantry-layout.toml and
    DIR/gantry-recipe.toml (a ready recipe whose output is DIR/gantry-goals.h5).
    """
    on_interrupt(f"each file in {directory} is written whole or not at all; run the same command again "
                 f"to write them all")
    with progress(episodes, "demo", quiet=quiet or as_json, unit="episode") as bar:
        report = write_demo(directory, episodes=episodes, seed=seed, frames=frames, advance=bar.update,
                            replace=replace)
    if as_json:
        echo_json(report.as_dict())
        return
    if quiet:
        return
    click.echo(f"logs:   {report.logs} ({report.episodes} episodes, {report.steps} steps)")
    click.echo(f"layout: {report.layout}")
    click.echo(f"recipe: {report.recipe}")
    rates = ", ".join(f"{kind} {rate:.0%}" if rate == rate else f"{kind} -"
                      for kind, rate in report.success_rates.items())
    click.echo(f"success by controller: {rates}")
    click.echo(f"next:   goalkit build {report.recipe}")

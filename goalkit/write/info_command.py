"""``goalkit info``: print a set's card facts from the file alone."""

from __future__ import annotations

import click

from goalkit.cli_support import echo_json, quiet_option, user_errors
from goalkit.write.info import format_info, set_facts


@click.command(context_settings={"show_default": True})
@click.argument("dataset", type=click.Path(dir_okay=False))
@click.option("--json", "as_json", is_flag=True,
              help="Print the facts as one JSON object (every log file, the recipe text, the histograms).")
@quiet_option
@user_errors
def info(dataset, as_json, quiet):
    """Print what DATASET is: rows, reward rule, widths, sources, composition, limits.

    Reads only the set's stored attributes (nothing is re-derived, no column is read), so it
    takes well under a second on a set of any size; `goalkit verify` checks that those facts
    are true. The same facts make the dataset card written beside each build (docs/card.md).
    A set built before goalkit stored a fact says which ones it cannot show ("not stored").
    Writes nothing.
    """

    facts = set_facts(dataset)
    if as_json:
        echo_json(facts)
    elif not quiet:
        click.echo(format_info(facts))

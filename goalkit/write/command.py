"""``goalkit verify``: re-derive a built dataset from its source logs and check it."""

from __future__ import annotations

import sys

import click

from goalkit.cli_support import EXIT_FOUND_WANTING, EXIT_OK, ChunkProgress, echo_json, quiet_option, user_errors


@click.command(context_settings={"show_default": True})
@click.argument("dataset", type=click.Path(dir_okay=False))
@click.option("--max-failures", type=click.IntRange(min=1), default=20, help="List at most this many failures.")
@click.option("--json", "as_json", is_flag=True, help="Print the report as one JSON object.")
@quiet_option
@user_errors
def verify(dataset, max_failures, as_json, quiet):
    """Check DATASET against the logs it was built from, trusting nothing stored in it.

    Exit status 0 when every check passes, 1 when some fail (the first failures are listed;
    with --quiet one line on stderr says how many), 2 when the file cannot be read as a goalkit
    dataset, 130 when interrupted (verify writes nothing).
    """
    from goalkit.write.verify import verify_set

    with ChunkProgress("verify", quiet=quiet) as bar:
        report = verify_set(dataset, max_failures=max_failures, progress=bar)
    if as_json:
        echo_json({"path": dataset, **report.as_dict()})
    elif quiet:
        if not report.ok:
            click.echo(f"goalkit: NOT consistent: {dataset} ({_count(len(report.failures), 'failure')} listed; "
                       f"run without --quiet to see them)", err=True)
    else:
        rows = report.checked.get("rows", {})
        if report.ok:
            click.echo(f"consistent: {dataset} ({rows.get('train', 0):,} train and {rows.get('validation', 0):,} "
                       f"validation rows re-derived from {report.checked.get('episodes', 0):,} episodes; "
                       f"{report.checked.get('columns', 0)} column checksums and "
                       f"{_count(report.checked.get('source_files', 0), 'source file')} match)")
        else:
            click.echo(f"NOT consistent: {dataset}")
            for f in report.failures:
                click.echo(f"  - {f}")
    sys.exit(EXIT_OK if report.ok else EXIT_FOUND_WANTING)


def _count(n: int, noun: str) -> str:
    """``"1 source file"``, ``"2 source files"``."""
    return f"{n} {noun}" if n == 1 else f"{n} {noun}s"

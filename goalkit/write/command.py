"""``goalkit verify``: re-derive a built dataset from its source logs and check it."""

from __future__ import annotations

import sys

import click

from goalkit.cli_support import ChunkProgress, echo_json, user_errors


@click.command(context_settings={"show_default": True})
@click.argument("dataset", type=click.Path(dir_okay=False))
@click.option("--max-failures", type=click.IntRange(min=1), default=20, help="List at most this many failures.")
@click.option("--json", "as_json", is_flag=True, help="Print the report as one JSON object.")
@click.option("--quiet", is_flag=True, help="No progress bar.")
@user_errors
def verify(dataset, max_failures, as_json, quiet):
    """Check DATASET against the logs it was built from, trusting nothing stored in it.

    Exit status 0 when every check passes, 1 when some fail (the first failures are listed),
    2 when the file cannot be read as a goalkit dataset.
    """
    from goalkit.write.verify import verify_set

    with ChunkProgress("verify", quiet=quiet) as bar:
        report = verify_set(dataset, max_failures=max_failures, progress=bar)
    if as_json:
        echo_json({"path": dataset, **report.as_dict()})
    else:
        rows = report.checked.get("rows", {})
        if report.ok:
            click.echo(f"consistent: {dataset} ({rows.get('train', 0):,} train and {rows.get('validation', 0):,} "
                       f"validation rows re-derived from {report.checked.get('episodes', 0):,} episodes; "
                       f"{report.checked.get('columns', 0)} column checksums and "
                       f"{_count(report.checked.get('source_files', 0), 'source file')} match)")
            if not report.checked.get("sealed", True):
                click.echo(f"  note: a format version {report.checked.get('format_version')} set has no seal: its "
                           f"attributes were checked by re-derivation only")
        else:
            click.echo(f"NOT consistent: {dataset}")
            for f in report.failures:
                click.echo(f"  - {f}")
    sys.exit(0 if report.ok else 1)


def _count(n: int, noun: str) -> str:
    """``"1 source file"``, ``"2 source files"``."""
    return f"{n} {noun}" if n == 1 else f"{n} {noun}s"

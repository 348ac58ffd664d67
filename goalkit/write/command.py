"""``goalkit verify``: re-derive a built dataset from its source logs and check it."""

from __future__ import annotations

import sys

import click

from goalkit.audit import audit_set
from goalkit.cli_support import EXIT_FOUND_WANTING, EXIT_OK, ChunkProgress, echo_json, quiet_option, user_errors
from goalkit.write.relocate import LOGS_ROOT_HELP
from goalkit.write.verify import verify_set

#: Quoted in the help of --sample; pinned by tests/audit/test_power.py against
#: goalkit.audit.run.share_power_note() (100,000 rows, share 0.2, 25 checks, family error 1e-6).
SAMPLE_POWER_NOTE = "0.0086"


@click.command(context_settings={"show_default": True})
@click.argument("dataset", type=click.Path(dir_okay=False))
@click.option("--max-failures", type=click.IntRange(min=1), default=20, help="List at most this many failures.")
@click.option("--sample", type=click.IntRange(min=1), default=None, metavar="ROWS",
              help="Run only the independent audit (rules and laws, docs/audit.md) on at least ROWS rows, "
                   "in blocks of whole transitions (about one storage chunk) at positions drawn with the set's "
                   "seed; no replay. Power: at "
                   f"100,000 rows a strategy share of 0.2 that is really 0.2 + {SAMPLE_POWER_NOTE} or more "
                   "fails with probability >= 90% (exact binomial test at the audit's per-check level); "
                   "the report gives this shift for the rows audited.")
@click.option("--logs-root", type=click.Path(file_okay=False), default=None, metavar="FOLDER",
              show_default="none: beside the set, then the recorded paths", help=LOGS_ROOT_HELP)
@click.option("--json", "as_json", is_flag=True, help="Print the report as one JSON object.")
@quiet_option
@user_errors
def verify(dataset, max_failures, sample, logs_root, as_json, quiet):
    """Check DATASET against the logs it was built from, trusting nothing stored in it.

    After the replay, an audit that shares no code with the builder checks every row against
    the documented rules and tests the draws against their documented laws (family error
    1e-6, Holm); its checks are listed with their p-values.

    The logs are looked for beside the set first (a set moved together with its logs needs no
    option), then at their recorded paths, then under --logs-root; the set is never modified.

    Exit status 0 when every check passes, 1 when some fail (the first failures are listed;
    with --quiet one line on stderr says how many; a stored chunk that does not decompress is
    one of them, naming its split, column and rows), 2 when the file cannot be read as a goalkit
    dataset, a log file is found nowhere or a moved one has another checksum, 130 when
    interrupted (verify writes nothing).
    """
    if sample is not None:
        _audit_only(dataset, sample, max_failures, as_json, quiet, logs_root)

    with ChunkProgress("verify", quiet=quiet) as bar:
        report = verify_set(dataset, max_failures=max_failures, progress=bar, logs_root=logs_root)
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
            if not report.checked.get("sealed", True):
                click.echo(f"  note: a format version {report.checked.get('format_version')} set has no seal: its "
                           f"attributes were checked by re-derivation only")
        else:
            click.echo(f"NOT consistent: {dataset}")
            for f in report.failures:
                click.echo(f"  - {f}")
        if "audit" in report.checked:
            _echo_checks(report.checked["audit"])
    sys.exit(EXIT_OK if report.ok else EXIT_FOUND_WANTING)


def _audit_only(dataset, sample, max_failures, as_json, quiet, logs_root=None):
    result = audit_set(dataset, sample=sample, logs_root=logs_root)
    failures = result.failures[:max_failures]
    if as_json:
        echo_json({"path": dataset, "ok": result.ok, "failures": failures, "checked": {"audit": result.as_dict()}})
    elif quiet:
        if not result.ok:
            click.echo(f"goalkit: audit FAILED: {dataset} ({_count(len(result.failures), 'failure')}; run "
                       f"without --quiet to see them)", err=True)
    else:
        rows = sum(result.rows.values())
        click.echo(f"{'audit passed' if result.ok else 'audit FAILED'}: {dataset} ({rows:,} sampled rows)")
        for f in failures:
            click.echo(f"  - {f}")
        _echo_checks(result.as_dict())
    sys.exit(EXIT_OK if result.ok else EXIT_FOUND_WANTING)


def _echo_checks(audit: dict) -> None:
    """One line per statistical check of the audit: verdict, p-value, Holm threshold."""
    checks = audit.get("checks", [])
    click.echo(f"audit: {len(checks)} statistical checks, family error <= {audit.get('alpha'):g} (Holm); "
               f"{sum(audit.get('rows', {}).values()):,} rows; seed {audit.get('seed')}; a share shift of "
               f"{audit.get('share_shift_90', float('nan')):.4f} is found with 90% power")
    for c in checks:
        click.echo(f"  {'ok  ' if c['passed'] else 'FAIL'} {c['name']}: p = {c['p_value']:.3g} "
                   f"(threshold {c['threshold']:.2g}; {c['test']}; {c['detail']})")


def _count(n: int, noun: str) -> str:
    """``"1 source file"``, ``"2 source files"``."""
    return f"{n} {noun}" if n == 1 else f"{n} {noun}s"

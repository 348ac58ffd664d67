"""Shared pieces of the command-line interface: error handling, progress, JSON output."""

from __future__ import annotations

import functools
import json
import sys

import click
import numpy as np

from goalkit.errors import GoalkitError

#: Exit status for bad input (a GoalkitError).
EXIT_BAD_INPUT = 2


def debug_enabled() -> bool:
    """True when the top-level ``--debug`` flag was given."""
    ctx = click.get_current_context(silent=True)
    while ctx is not None:
        if ctx.obj and ctx.obj.get("debug"):
            return True
        ctx = ctx.parent
    return False


def user_errors(func):
    """Decorate a click command: a GoalkitError becomes one line on stderr and exit status 2.

    With ``goalkit --debug`` the traceback is shown instead.
    """

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        try:
            return func(*args, **kwargs)
        except GoalkitError as exc:
            if debug_enabled():
                raise
            click.echo(f"goalkit: error: {exc}", err=True)
            sys.exit(EXIT_BAD_INPUT)

    return wrapper


def progress(total: int, desc: str, quiet: bool = False, unit: str = "step"):
    """Return a tqdm bar on a terminal, a silent one when piped or ``quiet``.

    Parameters
    ----------
    total : int
        Amount of work (e.g. transitions).
    desc : str
        Label shown before the bar.
    quiet : bool
        Never show the bar.
    unit : str
        Unit name for the rate.
    """
    import shutil

    from tqdm import tqdm

    disable = quiet or not sys.stderr.isatty()
    # a terminal that reports no size (a fresh pseudo-terminal) would get no bar at all
    size = shutil.get_terminal_size((80, 24))
    return tqdm(total=total, desc=desc, unit=unit, unit_scale=True, disable=disable,
                file=sys.stderr, leave=False, ncols=size.columns, nrows=size.lines)


def _default(obj):
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return float(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def echo_json(obj) -> None:
    """Print ``obj`` as one JSON object (numpy scalars and arrays converted)."""
    click.echo(json.dumps(obj, default=_default, sort_keys=True))


class ChunkProgress:
    """A callable ``(done, total)`` that drives a bar, opened on the first call.

    Parameters
    ----------
    desc : str
        Label of the bar.
    quiet : bool
        Never show the bar.
    unit : str
        Unit name.
    """

    def __init__(self, desc: str, quiet: bool = False, unit: str = "transition"):
        self.desc, self.quiet, self.unit = desc, quiet, unit
        self.bar = None

    def __call__(self, done: int, total: int) -> None:
        if self.bar is None:
            self.bar = progress(total=total, desc=self.desc, quiet=self.quiet, unit=self.unit)
        self.bar.update(done)

    def close(self) -> None:
        """Remove the bar."""
        if self.bar is not None:
            self.bar.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

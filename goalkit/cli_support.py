"""Shared pieces of the command-line interface: error handling, progress, JSON output."""

from __future__ import annotations

import functools
import json
import os
import sys

import click

from goalkit.errors import GoalkitError

#: Exit statuses, the same for every command (docs/cli.md).
EXIT_OK = 0
#: ``verify`` only: the set was checked and found wanting.
EXIT_FOUND_WANTING = 1
#: Bad input (a GoalkitError, an unreadable or unwritable file) or a refused output; click's own
#: usage errors (unknown option, bad option value) also exit 2.
EXIT_BAD_INPUT = 2
#: An unexpected exception: a bug in goalkit.
EXIT_INTERNAL = 3
#: Interrupted (SIGINT, Ctrl-C): 128 + 2, as shells report a death by SIGINT.
EXIT_INTERRUPTED = 130
#: Standard output closed by its reader (``goalkit verify SET | head``): 128 + SIGPIPE, as shells
#: report a death by SIGPIPE; nothing is printed.
EXIT_OUTPUT_CLOSED = 141

#: Help text of every command's ``--quiet`` (one convention for all commands).
QUIET_HELP = ("No progress bar and no report on stdout; warnings and errors still go to stderr, "
              "and --json output is still printed.")

_NOTE_KEY = "goalkit.interrupt_note"


def debug_enabled() -> bool:
    """True when the top-level ``--debug`` flag was given."""
    ctx = click.get_current_context(silent=True)
    while ctx is not None:
        if ctx.obj and ctx.obj.get("debug"):
            return True
        ctx = ctx.parent
    return False


def quiet_option(func):
    """The ``--quiet`` flag, with the same meaning and help text in every command."""
    return click.option("--quiet", is_flag=True, help=QUIET_HELP)(func)


def warn(text: str) -> None:
    """One warning line on stderr (shown with ``--quiet`` too)."""
    click.echo(f"goalkit: warning: {text}", err=True)


def on_interrupt(note) -> None:
    """Say what an interruption of the running command leaves behind.

    Parameters
    ----------
    note : str or callable
        The text after ``"goalkit: interrupted; "`` (e.g. ``"nothing was written at OUT"``), or a
        function returning it, called when the interruption happens (so it can count what was
        kept). The default is ``"nothing was written"``.
    """
    ctx = click.get_current_context(silent=True)
    if ctx is not None:
        ctx.meta[_NOTE_KEY] = note


def command_line(drop=()) -> str:
    """The command as the user typed it after ``goalkit`` (for "run it again" advice).

    Parameters
    ----------
    drop : sequence of str
        Flags to leave out (e.g. ``--restart``, which would discard what is to be resumed).
    """
    import shlex

    ctx = click.get_current_context(silent=True)
    args = ctx.meta.get("goalkit.args") if ctx is not None else None
    if args is None:
        args = sys.argv[1:]
    return shlex.join(["goalkit", *(str(a) for a in args if str(a) not in drop)])


def _interrupt_note() -> str:
    ctx = click.get_current_context(silent=True)
    note = ctx.meta.get(_NOTE_KEY) if ctx is not None else None
    if callable(note):
        try:
            note = note()
        except Exception:  # the note must never hide the interruption itself
            note = None
    return note or "nothing was written"


def _one_line(text: str) -> str:
    return " ".join(str(text).split())


def _leave(status: int, line: str, exc: BaseException) -> None:
    """Print the traceback (only with --debug), then the one line, then exit with ``status``."""
    if debug_enabled():
        import traceback

        sys.stdout.flush()
        traceback.print_exception(exc, file=sys.stderr)
    click.echo(line, err=True)
    if status == EXIT_INTERRUPTED:
        forget_caught_interrupt()
    sys.exit(status)


def forget_caught_interrupt() -> None:
    """Make the interpreter's exit status the one asked for after a Ctrl-C that was handled.

    CPython remembers a KeyboardInterrupt that escaped code run by ``exec`` or ``eval`` of a
    string (a dataclass or namedtuple being made by a module imported at that moment, say) even
    when a caller caught it, and at exit then kills itself with SIGINT instead of returning the
    status given to ``sys.exit`` (a parent sees -2, not 130). Running a string again clears
    that memory (CPython 3.11, ``Python/pythonrun.c``: ``run_eval_code_obj`` resets
    ``_Py_UnhandledKeyboardInterrupt`` before it runs the code).
    """
    exec("pass", {})  # noqa: S102  a constant string: see the docstring


#: Set when Python swallowed a KeyboardInterrupt (raised inside a weakref callback or __del__,
#: where an exception is "ignored"); the next progress step raises it again.
_SWALLOWED: list = []


def check_interrupt() -> None:
    """Raise KeyboardInterrupt if a Ctrl-C was swallowed since the last check.

    Python cannot raise an exception out of a weakref callback or ``__del__``; a SIGINT that
    lands there (h5py frees such objects all the time) would be printed as "Exception ignored"
    and lost. :func:`run_guarded` records it instead, and every progress step calls this.
    """
    if _SWALLOWED:
        _SWALLOWED.clear()
        raise KeyboardInterrupt


def _watch_swallowed(previous):
    def hook(unraisable):
        if isinstance(unraisable.exc_value, KeyboardInterrupt):
            _SWALLOWED.append(True)
            return
        previous(unraisable)
    return hook


def run_guarded(func, *args, **kwargs):
    """Run ``func`` under the one exit convention of every command (see docs/cli.md).

    - :class:`~goalkit.errors.GoalkitError`: ``goalkit: error: ...`` and exit 2.
    - ``OSError`` naming a file (unreadable input, unwritable output): the same, exit 2.
    - ``KeyboardInterrupt`` (SIGINT) or ``click.Abort``: ``goalkit: interrupted; <what was kept>``
      (see :func:`on_interrupt`) and exit 130.
    - any other exception is a bug: ``goalkit: internal error: ...`` and exit 3.
    - after a SIGINT, any exception counts as the interruption (130): a library may turn the
      KeyboardInterrupt into an error of its own (dask.distributed does).

    Each is one line on stderr; ``goalkit --debug`` prints the traceback before that line and
    never changes the exit status. click's own exits and usage errors pass through unchanged.
    """
    import signal
    import threading

    previous_hook = sys.unraisablehook
    sys.unraisablehook = _watch_swallowed(previous_hook)
    seen = []  # a SIGINT arrived: whatever a library turned it into, the command was interrupted

    def on_sigint(signum, frame):
        seen.append(signum)
        signal.default_int_handler(signum, frame)

    main_thread = threading.current_thread() is threading.main_thread()
    previous_handler = signal.signal(signal.SIGINT, on_sigint) if main_thread else None
    try:
        return func(*args, **kwargs)
    except (SystemExit, click.exceptions.Exit, click.ClickException):
        raise
    except Exception as exc:
        if not seen:
            _classify(exc)
        # e.g. dask.distributed can turn the KeyboardInterrupt into an error of its own
        _leave(EXIT_INTERRUPTED, f"goalkit: interrupted; {_one_line(_interrupt_note())}", exc)
    except (KeyboardInterrupt, click.Abort) as exc:
        _leave(EXIT_INTERRUPTED, f"goalkit: interrupted; {_one_line(_interrupt_note())}", exc)
    finally:
        sys.unraisablehook = previous_hook
        if main_thread:
            signal.signal(signal.SIGINT, previous_handler)


def _classify(exc: Exception) -> None:
    """Leave with the status and line of a non-interrupt exception (see :func:`run_guarded`)."""
    if isinstance(exc, BrokenPipeError) and _stdout_closed():
        # the reader of our stdout went away (piped into head): not an error of ours; point
        # stdout at /dev/null so the interpreter's final flush does not fail again
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        sys.exit(EXIT_OUTPUT_CLOSED)
    if isinstance(exc, GoalkitError):
        _leave(EXIT_BAD_INPUT, f"goalkit: error: {_one_line(exc)}", exc)
    if isinstance(exc, OSError) and exc.filename is not None:
        _leave(EXIT_BAD_INPUT, f"goalkit: error: {exc.filename}: {_one_line(exc.strerror or exc)}", exc)
    _leave(EXIT_INTERNAL, _internal_line(exc), exc)  # a bug: say so, and how to get the details


def _stdout_closed() -> bool:
    """True when standard output is a pipe whose reader has gone (poll reports POLLERR on it)."""
    import select

    try:
        poller = select.poll()
        poller.register(sys.stdout.fileno(), select.POLLOUT)
        return any(events & select.POLLERR for _, events in poller.poll(0))
    except (OSError, ValueError, AttributeError):
        return False


def _internal_line(exc: BaseException) -> str:
    hint = "" if debug_enabled() else "rerun with goalkit --debug for the traceback and "
    return (f"goalkit: internal error: {type(exc).__name__}: {_one_line(exc)[:300]} "
            f"(a bug in goalkit: {hint}please report it)")


def user_errors(func):
    """Decorate a click command with the exit convention of :func:`run_guarded`."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        return run_guarded(func, *args, **kwargs)

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

    class Bar(tqdm):
        def update(self, n=1):
            check_interrupt()
            return super().update(n)

    return Bar(total=total, desc=desc, unit=unit, unit_scale=True, disable=disable,
                file=sys.stderr, leave=False, ncols=size.columns, nrows=size.lines)


def _default(obj):
    # numpy scalars and arrays (their .tolist() gives Python numbers and lists), without
    # importing numpy here: the CLI's entry point imports this module on every run
    tolist = getattr(obj, "tolist", None)
    if callable(tolist):
        return tolist()
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
        check_interrupt()
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

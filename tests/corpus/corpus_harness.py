"""Run one malformed-input case through the goalkit CLI and check how it was refused.

A :class:`Case` is plain data (arguments, files to write, the expected exit status), so other
suites can add their own cases and call :func:`run_case`. Every case must leave:

- the documented exit status (2 for bad input; docs/cli.md),
- exactly one line on stderr, starting ``goalkit: error:``, with no traceback, and nothing on stdout,
- no hang: each case has a time bound (cases that could hang run in a killable subprocess),
- every input byte-identical (SHA-256 of every file in the case folder and the shared logs),
- nothing new anywhere in the case folder (no output, no temporary sibling, no build folder).
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

#: A file whose content is this is created as a folder instead.
FOLDER = object()


@dataclass(frozen=True)
class Case:
    """One malformed input and what goalkit must do with it.

    Attributes
    ----------
    name : str
        Unique id, e.g. ``"recipe-gamma=1.5"``.
    args : tuple of str
        Command line after ``goalkit``; ``{dir}`` is the case folder, ``{base}`` the shared logs'.
    files : dict
        File name (in the case folder) -> text ("{dir}" and "{base}" filled in), bytes,
        :data:`FOLDER`, or a function of the shared folder returning bytes.
    expect : int
        Exit status.
    contains : str, optional
        Text the error line must contain (the key or file it names).
    subprocess : bool
        Run ``python -m goalkit.cli`` with a timeout instead of click's CliRunner (a possible hang).
    seconds : float
        Time bound.
    """

    name: str
    args: tuple
    files: dict = field(default_factory=dict)
    expect: int = 2
    contains: str | None = None
    subprocess: bool = False
    seconds: float = 30.0


def _sha256(path: Path) -> str:
    """SHA-256 (FIPS 180-4, via hashlib) of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def snapshot(*folders: Path) -> dict:
    """Every entry under ``folders`` (hidden ones too): path -> SHA-256, or "folder"."""
    out = {}
    for folder in folders:
        for root, dirs, files in os.walk(folder):
            for d in dirs:
                out[os.path.join(root, d)] = "folder"
            for f in files:
                p = os.path.join(root, f)
                out[p] = "link" if os.path.islink(p) else _sha256(Path(p))
    return out


def materialise(case: Case, folder: Path, base: Path) -> list[str]:
    """Write the case's files into ``folder``; return its arguments with paths filled in."""
    for name, content in case.files.items():
        target = folder / name
        if content is FOLDER:
            target.mkdir(parents=True, exist_ok=True)
        elif callable(content):
            target.write_bytes(content(base))
        elif isinstance(content, bytes):
            target.write_bytes(content)
        else:
            target.write_text(fill(content, folder, base), encoding="utf-8")
    return [fill(str(a), folder, base) for a in case.args]


def fill(text: str, folder: Path, base: Path) -> str:
    """``text`` with ``{dir}`` and ``{base}`` replaced (no other braces are touched)."""
    return text.replace("{dir}", str(folder)).replace("{base}", str(base))


def run_case(case: Case, folder: Path, base: Path) -> dict:
    """Run ``case`` in the empty folder ``folder`` against the shared logs in ``base``; assert.

    Returns
    -------
    dict
        ``{"status", "stderr", "seconds"}`` for reports.
    """
    folder.mkdir(parents=True, exist_ok=True)
    args = materialise(case, folder, base)
    before = snapshot(folder, base)
    t0 = time.monotonic()
    if case.subprocess:
        try:
            res = subprocess.run([sys.executable, "-m", "goalkit.cli", *args], capture_output=True, text=True,
                                 timeout=case.seconds, cwd=folder)
        except subprocess.TimeoutExpired:
            raise AssertionError(f"{case.name}: no answer within {case.seconds} s (a hang)") from None
        status, out, err = res.returncode, res.stdout, res.stderr
    else:
        from click.testing import CliRunner

        from goalkit.cli import main

        cwd = os.getcwd()
        os.chdir(folder)
        try:
            res = CliRunner().invoke(main, args)
        finally:
            os.chdir(cwd)
        status, out, err = res.exit_code, res.stdout, res.stderr
    seconds = time.monotonic() - t0
    where = f"{case.name}: goalkit {' '.join(args)}\nstdout: {out!r}\nstderr: {err!r}"
    assert status == case.expect, f"exit {status}, expected {case.expect}\n{where}"
    assert seconds <= case.seconds, f"took {seconds:.1f} s (bound {case.seconds} s)\n{where}"
    assert "Traceback" not in err and "Traceback" not in out, where
    lines = err.strip().splitlines()
    assert len(lines) == 1, f"expected one line on stderr\n{where}"
    if case.expect == 2:
        assert lines[0].startswith("goalkit: error: "), where
        assert out == "", where
    if case.contains is not None:
        assert fill(case.contains, folder, base) in lines[0], where
    after = snapshot(folder, base)
    assert after == before, f"files changed: {sorted(set(after.items()) ^ set(before.items()))}\n{where}"
    return {"status": status, "stderr": lines[0], "seconds": seconds}

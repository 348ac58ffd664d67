"""Shared helpers for our TOML files (layout, recipe): loading and key checking."""

from __future__ import annotations

import difflib
import sys
from pathlib import Path
from typing import Any, Iterable, Mapping

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on 3.10 only
    import tomli as tomllib

from goalkit.errors import GoalkitError, shown


def load_toml(path, error=GoalkitError) -> dict:
    """Read a TOML file, turning every failure into a one-line ``error``.

    Parameters
    ----------
    path : str or Path
        File to read.
    error : type of GoalkitError
        Exception class to raise (e.g. ``LayoutError``).

    Returns
    -------
    dict
        The parsed document.
    """
    return parse_toml(read_text_file(path, error), path, error)


#: Largest TOML file read (recipes and layouts are a few kB; this bounds what a wrong path costs).
MAX_TOML_BYTES = 1 << 20


def read_text_file(path, error=GoalkitError, limit: int = MAX_TOML_BYTES) -> str:
    """Read a small UTF-8 text file, refusing folders, devices, pipes and files over ``limit``.

    Every failure is a one-line ``error`` naming the file; a device such as ``/dev/zero`` is
    refused before it is read, so a wrong path can neither hang nor fill memory.
    """
    import stat

    path = Path(path)
    try:
        info = path.stat()
    except FileNotFoundError:
        raise error("file not found", file=path) from None
    except OSError as exc:
        raise error(f"cannot read ({exc.strerror or exc})", file=path) from None
    if stat.S_ISDIR(info.st_mode):
        raise error("expected a file, got a folder", file=path)
    if not stat.S_ISREG(info.st_mode):
        raise error("expected a regular file, got a device, pipe or socket", file=path)
    if info.st_size > limit:
        raise error(f"expected a text file of at most {limit:,} bytes, got {info.st_size:,}", file=path)
    try:
        with open(path, "rb") as fh:
            data = fh.read(limit + 1)
    except OSError as exc:
        raise error(f"cannot read ({exc.strerror or exc})", file=path) from None
    if len(data) > limit:
        raise error(f"expected a text file of at most {limit:,} bytes", file=path)
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise error(f"cannot read as UTF-8 text (byte {exc.start}: {exc.reason})", file=path) from None


def parse_toml(text: str, path, error=GoalkitError) -> dict:
    """Parse TOML ``text`` read from ``path`` (used only in messages)."""
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise error(f"not valid TOML: {exc}", file=path) from None


def closest(word: str, valid: Iterable[str]) -> str | None:
    """Return the valid word closest to ``word``, or None when nothing is close."""
    found = difflib.get_close_matches(word, list(valid), n=1, cutoff=0.6)
    return found[0] if found else None


def check_keys(table: Mapping[str, Any], valid: Iterable[str], *, file, section: str,
               error=GoalkitError) -> None:
    """Refuse unknown keys in ``table``, listing the valid ones and the closest match.

    Parameters
    ----------
    table : mapping
        A TOML table.
    valid : iterable of str
        The keys allowed in it.
    file : str or Path
        The file the table came from (for the message).
    section : str
        The table's name, e.g. ``"[reward]"`` (for the message).
    error : type of GoalkitError
        Exception class to raise.
    """
    valid = list(valid)
    for key in table:
        if key not in valid:
            hint = closest(key, valid)
            tip = f"; did you mean '{hint}'?" if hint else ""
            raise error(f"unknown key '{key}' in {section}{tip} valid keys: {', '.join(valid)}",
                        file=file, key=key)


def expect_type(value, types, *, file, key, what: str, error=GoalkitError):
    """Return ``value`` if it is an instance of ``types``, else raise ``error`` saying ``what``."""
    if isinstance(value, bool) and bool not in (types if isinstance(types, tuple) else (types,)):
        raise error(f"expected {what}, got {shown(value)}", file=file, key=key)
    if not isinstance(value, types):
        raise error(f"expected {what}, got {shown(value)}", file=file, key=key)
    return value

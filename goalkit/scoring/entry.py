"""The user's policy or value function, named as an entry point ``package.module:callable``.

Only the named module is imported (with its parent packages, as Python imports any module);
nothing else of the user's is imported or run. An extra folder can be put in front of
``sys.path`` for the import. Anything that goes wrong inside the user's code is reported as
theirs: the entry point, the exception, and the file and line of the last frame of the
traceback outside goalkit and Python's import machinery.
"""

from __future__ import annotations

import importlib
import re
import sys
import traceback
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from goalkit.errors import GoalkitError

_SPEC = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)*:[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)*$")
_GOALKIT = str(Path(__file__).resolve().parents[1])


class CallableError(GoalkitError):
    """The user's entry point cannot be imported, raises, or returns the wrong thing."""


def _user_frame(exc: BaseException) -> str:
    """``file:line`` of the last traceback frame outside goalkit and the import machinery."""
    frames = traceback.extract_tb(exc.__traceback__)
    for fr in reversed(frames):
        name = fr.filename
        if name.startswith("<frozen") or str(Path(name).resolve()).startswith(_GOALKIT):
            continue
        return f"{name}:{fr.lineno}"
    if isinstance(exc, SyntaxError) and exc.filename:
        return f"{exc.filename}:{exc.lineno}"
    return "unknown place"


def _theirs(spec: str, role: str, exc: BaseException, when: str) -> CallableError:
    text = " ".join(str(exc).split())[:300]
    return CallableError(f"{role} {spec} raised {type(exc).__name__}{': ' + text if text else ''} {when} "
                         f"(at {_user_frame(exc)}; an error in that code, not in goalkit)", key=f"--{role}")


@contextmanager
def _search_path(folder):
    if folder is None:
        yield
        return
    folder = str(Path(folder).resolve())
    sys.path.insert(0, folder)
    try:
        yield
    finally:
        try:
            sys.path.remove(folder)
        except ValueError:
            pass


@dataclass(frozen=True)
class Entry:
    """A loaded entry point.

    Attributes
    ----------
    spec : str
        ``package.module:callable`` as given.
    role : str
        ``"policy"`` or ``"value"``.
    func : callable
    """

    spec: str
    role: str
    func: object

    def call(self, batch: dict, *, start: int):
        """Call the user's function on one batch; its exceptions become a :class:`CallableError`."""
        try:
            return self.func(batch)
        except (Exception, SystemExit) as exc:  # the user's code (sys.exit included): report it as theirs
            raise _theirs(self.spec, self.role, exc,
                          f"on suite rows {start}..{start + len(batch['goal']) - 1}") from None

    def check(self, out, *, start: int, rows: int, width: int | None = None) -> np.ndarray:
        """Check one batch's result; return float64 ``(B, width)`` actions or ``(B,)`` values.

        Raises
        ------
        CallableError
            Wrong shape, a non-numeric dtype, or a non-finite number.
        """
        b = rows
        where = f"for suite rows {start}..{start + b - 1}"
        want = f"({b}, {width})" if self.role == "policy" else f"({b},)"
        try:
            arr = np.asarray(out)
        except Exception:  # noqa: BLE001  (a ragged or odd object)
            arr = None
        if arr is None or arr.dtype.kind not in "iuf":
            got = type(out).__name__ if arr is None else f"dtype {arr.dtype}"
            raise CallableError(f"{self.role} {self.spec} returned {got} {where}; expected a numeric array of "
                                f"shape {want}", key=f"--{self.role}")
        if self.role == "value" and arr.shape == (b, 1):
            arr = arr[:, 0]
        if arr.shape != ((b, width) if self.role == "policy" else (b,)):
            raise CallableError(f"{self.role} {self.spec} returned shape {arr.shape} {where}; expected {want}",
                                key=f"--{self.role}")
        arr = arr.astype(np.float64)
        bad = ~np.isfinite(arr)
        if bad.any():
            row = int(np.argwhere(bad)[0][0])
            raise CallableError(f"{self.role} {self.spec} returned a non-finite number ({arr[bad][0]}) for suite "
                                f"row {start + row}; expected finite numbers", key=f"--{self.role}")
        return arr


def load_entry(spec: str, role: str, *, path=None) -> Entry:
    """Import the module an entry point names and return its callable.

    Parameters
    ----------
    spec : str
        ``package.module:callable`` (the callable may be a dotted attribute, ``mod:obj.method``).
    role : {"policy", "value"}
    path : str or Path, optional
        A folder put in front of ``sys.path`` for the import only.

    Raises
    ------
    CallableError
        One line naming the entry point and what was expected.
    """
    if not isinstance(spec, str) or not _SPEC.match(spec):
        raise CallableError(f"{role} {spec!r}: expected an entry point package.module:callable", key=f"--{role}")
    if path is not None and not Path(path).is_dir():
        raise CallableError(f"expected a folder to import from, got {path}", key="--import-path")
    module_name, attr = spec.split(":")
    with _search_path(path):
        try:
            module = importlib.import_module(module_name)
        except ModuleNotFoundError as exc:
            if exc.name and (module_name == exc.name or module_name.startswith(exc.name + ".")):
                raise CallableError(f"{role} {spec}: cannot import module {module_name} (no module named "
                                    f"{exc.name}); expected an importable package.module:callable (give the folder "
                                    f"with --import-path)", key=f"--{role}") from None
            raise _theirs(spec, role, exc, "while importing") from None
        except (Exception, SystemExit) as exc:  # sys.exit at import time is theirs too
            raise _theirs(spec, role, exc, "while importing") from None
    obj = module
    for part in attr.split("."):
        try:
            obj = getattr(obj, part)
        except AttributeError:
            raise CallableError(f"{role} {spec}: module {module_name} has no attribute {attr}; expected "
                                f"package.module:callable", key=f"--{role}") from None
        except Exception as exc:
            raise _theirs(spec, role, exc, "while looking up the callable") from None
    if not callable(obj):
        raise CallableError(f"{role} {spec}: {attr} is a {type(obj).__name__}, not callable; expected a function "
                            f"taking a dict of numpy arrays", key=f"--{role}")
    return Entry(spec, role, obj)

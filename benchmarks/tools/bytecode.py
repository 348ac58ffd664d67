"""Give goalkit's modules their compiled bytecode before a benchmark measures anything.

    from tools.bytecode import compile_package      # in a benchmark script under benchmarks/

An installed package has its bytecode: pip compiles every module when it installs it, and an
editable install writes ``__pycache__`` on the first import. A shell with
``PYTHONDONTWRITEBYTECODE=1`` (some containers set it) never writes it, so every new interpreter
of a build -- the coordinator, each worker's fork server, the planning helper -- would compile
goalkit's sources again, about 0.1 CPU seconds each, and the multi-process cases would pay it
more often than the one-process ones. :func:`compile_package` writes the bytecode once,
explicitly (``compileall`` writes whatever the variable says), so every case imports as a user's
installed copy does. Already compiled modules are left as they are.
"""

from __future__ import annotations

import compileall
import os
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def compile_package(root: Path = ROOT) -> dict:
    """Compile ``root``/goalkit's modules to bytecode (``__pycache__``); what was done, for the report.

    Returns
    -------
    dict
        ``{"compiled": bool, "dont_write_bytecode_env": bool}``: whether every module compiled,
        and whether the environment would otherwise have kept Python from writing bytecode.
    """
    ok = compileall.compile_dir(str(root / "goalkit"), quiet=1, workers=1)
    return {"compiled": bool(ok), "dont_write_bytecode_env": bool(os.environ.get("PYTHONDONTWRITEBYTECODE"))
            or bool(sys.flags.dont_write_bytecode)}

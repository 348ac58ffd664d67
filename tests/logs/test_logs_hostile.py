"""Malformed and hostile logs through ``goalkit scan``, ``build`` and ``embed``.

Every malformed case (see :mod:`hostile_logs`) must end in exit status 2 with exactly one line
on stderr naming the file and the key, no traceback, no hang, inputs byte-identical afterwards
and nothing left at the output path; the accepted edge cases must succeed. The cases that
could block a reader that opened them (a FIFO, ``/dev/zero``, a symlink loop) run as real
subprocesses with a timeout.

``GOALKIT_FULL_CORPUS=1`` adds the full seeded corpus: grids of declared shapes and task ids
(in process) and random byte damage of compressed logs (one subprocess per case).
"""

from __future__ import annotations

import collections
import hashlib
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from goalkit.cli import main
from hostile_logs import LENGTHS, Made, default_cases, flat_log, full_cases, grouped_log, _layout

FULL = os.environ.get("GOALKIT_FULL_CORPUS") == "1"
EXE = str(Path(sys.executable).with_name("goalkit"))
CASES = default_cases(seed=0)

RECIPE = """version = 1
seed = 3
[logs]
path = "{log}"
layout = "{layout}"
[goal]
indices = [0, 1, 2]
[relabel]
goals_per_transition = 2
[relabel.weights]
future = 1
[reward]
distance = "euclidean"
threshold = 0.05
[output]
path = "{out}"
chunk_rows = 1024
"""


def digest(paths) -> dict:
    """sha256 of every file under the given paths (links recorded by their target, not followed)."""
    out = {}
    for p in map(Path, paths):
        items = [p] if not p.is_dir() or p.is_symlink() else sorted(p.rglob("*"))
        for q in items:
            if q.is_symlink():
                out[str(q)] = "link:" + os.readlink(q)
            elif q.is_file():
                out[str(q)] = hashlib.sha256(q.read_bytes()).hexdigest()
    return out


def commands(made: Made, d: Path, fmt: str) -> list[tuple[str, list, Path]]:
    """(name, argv, output path) of the commands a case runs through."""
    recipe = d / "recipe.toml"
    recipe.write_text(RECIPE.format(log=made.log, layout=made.layout, out=d / "out" / "set.h5"))
    (d / "out").mkdir(exist_ok=True)
    if fmt == "embed":
        values = d / "values.npy"
        return [("embed", ["embed", made.log, "--layout", made.layout, "--method", "precomputed",
                           "--values", values, "-o", d / "out" / "emb.npz", "--quiet"], d / "out" / "emb.npz")]
    return [("scan", ["scan", made.log, "--layout", made.layout, "--quiet",
                      "--write-layout", d / "out" / "layout.toml"], d / "out" / "layout.toml"),
            ("build", ["build", recipe, "--quiet"], d / "out" / "set.h5"),
            ("embed", ["embed", made.log, "--layout", made.layout, "--method", "raw", "--quiet",
                       "-o", d / "out" / "emb.npz"], d / "out" / "emb.npz")]


def check_outcome(case, made: Made, name, code, stderr, output: Path, expect=None):
    """Assert the contract; return the outcome ("accepted" or "refused")."""
    expect = expect or made.expect
    label = f"{case.name} / {name}"
    assert "Traceback" not in stderr, f"{label}: {stderr}"
    if expect == "accept" or (expect == "any" and code == 0):
        assert code == 0, f"{label}: exit {code}: {stderr}"
        assert output.exists(), label
        return "accepted"
    assert code == 2, f"{label}: exit {code}: {stderr}"
    lines = stderr.strip("\n").split("\n")
    assert len(lines) == 1 and lines[0].startswith("goalkit: error: "), f"{label}: {stderr!r}"
    file = made.file or Path(made.log).name
    assert file in lines[0], f"{label}: {lines[0]}"
    for needle in made.needles:
        assert needle in lines[0], f"{label}: {needle!r} not in {lines[0]}"
    assert not output.exists(), f"{label}: {output} was left behind"
    assert not list(output.parent.iterdir()), f"{label}: left {list(output.parent.iterdir())}"
    return "refused"


def run_case(case, d: Path, runner="cli", timeout=60) -> collections.Counter:
    made = case.make(d)
    inputs = made.inputs or [made.log]
    before = digest(inputs + [made.layout])
    seen = collections.Counter()
    for name, argv, output in commands(made, d, case.fmt):
        argv = [str(a) for a in argv]
        if runner == "cli":
            result = CliRunner().invoke(main, argv)
            if result.exception is not None and not isinstance(result.exception, SystemExit):
                raise AssertionError(f"{case.name} / {name}: {result.exception!r}") from result.exception
            code, stderr = result.exit_code, result.stderr
        else:
            proc = subprocess.run([EXE, *argv], capture_output=True, text=True, timeout=timeout,
                                  stdin=subprocess.DEVNULL, env=dict(os.environ, PYTHONWARNINGS="ignore"))
            code, stderr = proc.returncode, proc.stderr
        seen[check_outcome(case, made, name, code, stderr, output)] += 1
        for p in output.parent.iterdir():      # next command starts from an empty output folder
            p.unlink()
    assert digest(inputs + [made.layout]) == before, f"{case.name}: an input changed"
    return seen


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_malformed_log(case, tmp_path):
    run_case(case, tmp_path)


def test_corpus_counts():
    """The default corpus covers every reader and both outcomes (counts in the report)."""
    by_fmt = collections.Counter(c.fmt for c in CASES)
    assert set(by_fmt) == {"grouped", "flat-h5", "flat-npz", "per-file", "embed"}
    assert min(by_fmt.values()) >= 2
    assert len(CASES) >= 60


# ---- things that could block: real processes with a timeout -------------------------------------
def _blocking_targets(tmp_path):
    fifo = tmp_path / "pipe.h5"
    os.mkfifo(fifo)
    loop = tmp_path / "loop.h5"
    os.symlink(loop.name, loop)
    eps_dir = tmp_path / "eps"
    from logs_testdata import make_episodes, write_per_file
    table = write_per_file(eps_dir, make_episodes(LENGTHS, seed=1))
    os.mkfifo(eps_dir / "ep9.npz")
    return fifo, loop, eps_dir, table


def test_fifo_device_and_loop_never_hang(tmp_path):
    fifo, loop, eps_dir, pf_table = _blocking_targets(tmp_path)
    _, table = grouped_log(tmp_path)
    layout = _layout(tmp_path, table)
    flat_dir = tmp_path / "flat"
    flat_dir.mkdir()
    _, ftable = flat_log(flat_dir, fmt="npz")
    flat_layout = _layout(flat_dir, ftable)
    pf_dir = tmp_path / "pf"
    pf_dir.mkdir()
    pf_layout = _layout(pf_dir, pf_table)
    runs = [
        (["scan", fifo, "--layout", layout], "pipe.h5", "FIFO"),
        (["scan", fifo], "pipe.h5", "FIFO"),                        # no layout: the proposer looks
        (["scan", "/dev/zero", "--layout", flat_layout], "/dev/zero", "character device"),
        (["scan", "/dev/zero"], "/dev/zero", "character device"),
        (["scan", loop, "--layout", layout], "loop.h5", "symbolic link loop"),
        (["embed", loop, "--layout", layout, "--method", "raw", "-o", tmp_path / "e.npz"], "loop.h5",
         "symbolic link loop"),
        (["embed", fifo, "--layout", layout, "--method", "raw", "-o", tmp_path / "e.npz"], "pipe.h5", "FIFO"),
        (["scan", eps_dir, "--layout", pf_layout], "ep9.npz", "FIFO"),
        (["embed", tmp_path / "g.h5", "--layout", layout, "--method", "precomputed", "--values", fifo,
          "-o", tmp_path / "e.npz"], "pipe.h5", "FIFO"),
    ]
    for argv, name, what in runs:
        proc = subprocess.run([EXE, *map(str, argv)], capture_output=True, text=True, timeout=60,
                              stdin=subprocess.DEVNULL, env=dict(os.environ, PYTHONWARNINGS="ignore"))
        lines = proc.stderr.strip("\n").split("\n")
        assert proc.returncode == 2 and len(lines) == 1, (argv, proc.stderr)
        assert name in lines[0] and what in lines[0] and "Traceback" not in proc.stderr, lines[0]
    assert not (tmp_path / "e.npz").exists()


def test_a_few_cases_as_real_processes(tmp_path):
    """The in-process contract holds for real runs too (one case per reader)."""
    picked = ["grouped corrupt chunk of an observation", "flat-h5 declared 10**12 episode ids",
              "flat-npz corrupt deflated observations", "per-file symlink loop among the episode files"]
    cases = {c.name: c for c in CASES}
    for i, name in enumerate(picked):
        d = tmp_path / str(i)
        d.mkdir()
        run_case(cases[name], d, runner="subprocess")


def test_large_task_attribute_is_refused_before_it_is_read(tmp_path, monkeypatch):
    """An attribute is read whole, so its declared size is checked first (limit lowered here:
    a real attribute over the limit needs megabytes of dense attribute storage)."""
    import goalkit.logs.access as access
    from goalkit.errors import LogError
    from goalkit.logs import open_logs

    monkeypatch.setattr(access, "MAX_ATTR_VALUES", 2)
    path, table = grouped_log(tmp_path, edit=lambda f: f["runs/ep3"].attrs.__setitem__("task", [7, 7, 7]))
    with pytest.raises(LogError) as info:
        open_logs(path, table)
    assert str(info.value) == (f"{path}: key runs/ep3/task: episode 3: attribute declares 3 values; "
                               f"expected at most 2 (a task id is one value)")


# ---- the precomputed embedding of width 0 is refused when read, too ---------------------------
def test_zero_width_precomputed_embedding_refused_when_read(tmp_path):
    import zipfile

    from goalkit.errors import EmbeddingError
    from goalkit.goals import load_embedding
    from goalkit.goals.precomputed import Precomputed
    from goalkit.goals.embedfile import save_embedding
    from hostile_logs import npy_bytes

    emb = Precomputed().fit(np.ones((6, 2)), np.array([0, 2, 6]))
    good = save_embedding(tmp_path / "e.npz", emb)
    with zipfile.ZipFile(good) as zf:
        members = {i.filename: zf.read(i) for i in zf.infolist()}
    members["attr.values_.npy"] = npy_bytes(np.zeros((6, 0)))
    with zipfile.ZipFile(tmp_path / "zero.npz", "w") as zf:
        for k, v in members.items():
            zf.writestr(k, v)
    with pytest.raises(EmbeddingError) as info:
        load_embedding(tmp_path / "zero.npz")
    msg = str(info.value)
    assert "zero.npz" in msg and "attr.values_" in msg and "\n" not in msg
    with pytest.raises(EmbeddingError, match="at least 1 column"):
        Precomputed().fit(np.ones((6, 0)), np.array([0, 2, 6]))


# ---- the full corpus (GOALKIT_FULL_CORPUS=1) -------------------------------------------------
@pytest.mark.skipif(not FULL, reason="the full hostile-log corpus runs with GOALKIT_FULL_CORPUS=1")
def test_full_corpus(tmp_path, capsys):
    in_process, damaged = full_cases(seed=0)
    outcomes = collections.Counter()
    for i, case in enumerate(in_process):
        d = tmp_path / f"g{i}"
        d.mkdir()
        for outcome, n in run_case(case, d).items():
            outcomes[("grid", outcome)] += n
    for i, case in enumerate(damaged):
        d = tmp_path / f"r{i}"
        d.mkdir()
        for outcome, n in run_case(case, d, runner="subprocess").items():
            outcomes[("random damage", outcome)] += n
    with capsys.disabled():
        print(f"\nfull hostile corpus: {len(in_process)} grid cases + {len(damaged)} damaged logs; "
              f"command runs by outcome: {dict(sorted(outcomes.items()))}")
    assert outcomes[("grid", "refused")] > 0 and outcomes[("random damage", "refused")] > 0


def test_deflate_ratio_bound_against_zlib():
    """DEFLATE_MAX_RATIO (1032, zlib's figure for deflate, from memory) bounds what zlib itself
    achieves on the most compressible input there is (all zero bytes), and is tight."""
    import zlib

    from goalkit.logs.limits import DEFLATE_MAX_RATIO

    n = 10 ** 7
    ratio = n / len(zlib.compress(bytes(n), 9))
    assert 1000 < ratio <= DEFLATE_MAX_RATIO

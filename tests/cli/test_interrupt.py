"""Ctrl-C: real processes interrupted mid-run exit 130 with one line saying what was kept.

The signal goes to the whole process group, as a terminal's Ctrl-C does (POSIX: the terminal
sends SIGINT to the foreground process group), so local build workers receive it too.
"""

import hashlib
import json
import os
import re
import shlex
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from goalkit.demo import make_demo

CLI = [sys.executable, "-m", "goalkit.cli"]
EPISODES = 4000


def sha256(path) -> str:
    """SHA-256 (FIPS 180-4, via hashlib) of a whole file."""
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def cpu_seconds(pid: int) -> float:
    """User + system CPU time of a process, from /proc/PID/stat (proc(5): fields 14 and 15)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def start(args, cwd):
    return subprocess.Popen([*CLI, *map(str, args)], cwd=cwd, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, start_new_session=True)


def interrupt_when(proc, ready, timeout=60.0):
    """Wait until ``ready()`` (the command is at work), then send SIGINT to its process group."""
    deadline = time.monotonic() + timeout
    while not ready():
        assert proc.poll() is None, f"finished before it could be interrupted: {proc.communicate()}"
        assert time.monotonic() < deadline, "never got going"
        time.sleep(0.05)
    assert proc.poll() is None, "finished before it could be interrupted: use more demo episodes"
    os.killpg(proc.pid, signal.SIGINT)
    out, err = proc.communicate(timeout=60)
    return proc.returncode, out, err


def busy(proc, seconds=1.5):
    """Ready once the process has used ``seconds`` of CPU (past its imports, into the work)."""
    return lambda: cpu_seconds(proc.pid) >= seconds


def one_line(err: str) -> str:
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err, err
    assert lines[0].startswith("goalkit: interrupted; "), err
    return lines[0]


@pytest.fixture(scope="module")
def big(tmp_path_factory):
    """Demo logs large enough that every command runs for several seconds, and their set."""
    d = tmp_path_factory.mktemp("big")
    info = make_demo(d, episodes=EPISODES, seed=5)
    res = subprocess.run([*CLI, "build", info["recipe"], "--out", d / "reference.h5", "--quiet"],
                         capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr
    return d


def test_single_process_build(big, tmp_path):
    out = tmp_path / "goals.h5"
    proc = start(["build", big / "gantry-recipe.toml", "--out", out], tmp_path)
    code, stdout, err = interrupt_when(proc, busy(proc))
    assert code == 130, err
    assert one_line(err) == f"goalkit: interrupted; nothing was written at {out}"
    assert stdout == "" and list(tmp_path.iterdir()) == []  # no output, no temporary sibling


def test_worker_build_keeps_its_shards_and_the_printed_command_resumes(big, tmp_path):
    out = tmp_path / "goals.h5"
    folder = tmp_path / ".goals.h5.shards"
    args = ["build", str(big / "gantry-recipe.toml"), "--out", str(out), "--workers", "2", "--chunk-rows", "20000"]
    proc = start([*args, "--restart"], tmp_path)  # the advice must leave --restart out: it discards shards
    code, _, err = interrupt_when(proc, lambda: len(list(folder.glob("shard-*.npz"))) >= 2)
    assert code == 130, err
    line = one_line(err)
    kept = len(list(folder.glob("shard-*.npz")))
    assert kept >= 2
    found = re.fullmatch(rf"goalkit: interrupted; nothing was written at {re.escape(str(out))}; (\d+) finished "
                         rf"shards? kept in {re.escape(str(folder))}/; run this to resume: (.+)", line)
    assert found, line
    assert int(found.group(1)) == kept
    resume = shlex.split(found.group(2))
    assert resume == ["goalkit", *args]
    assert not out.exists() and not list(tmp_path.glob(".goals.h5.partial-*"))
    res = subprocess.run([*CLI, *resume[1:], "--json"], cwd=tmp_path, capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr
    import json

    assert json.loads(res.stdout)["shards"]["reused"] >= kept
    assert sha256(out) == sha256(big / "reference.h5")  # the same bytes as an uninterrupted build
    assert not folder.exists()


def test_keep_work_build_keeps_its_finished_units_for_the_next_build(big, tmp_path):
    out = tmp_path / "goals.h5"
    work = tmp_path / ".goals.h5.work"
    args = ["build", str(big / "gantry-recipe.toml"), "--out", str(out), "--keep-work", "--chunk-rows", "20000"]
    proc = start(args, tmp_path)
    code, _, err = interrupt_when(proc, lambda: len(list(work.glob("unit-*.npz"))) >= 2)
    assert code == 130, err
    assert one_line(err) == (f"goalkit: interrupted; nothing was written at {out}; the rows of finished units "
                             f"stay in {work}/ for the next build with --keep-work")
    kept = len(list(work.glob("unit-*.npz")))
    assert kept >= 2 and not out.exists()
    res = subprocess.run([*CLI, *args, "--json", "--no-card"], cwd=tmp_path, capture_output=True, text=True,
                         timeout=300)
    assert res.returncode == 0, res.stderr
    assert json.loads(res.stdout)["reuse"]["units"]["reused"] >= kept
    assert sha256(out) == sha256(big / "reference.h5")  # the same bytes as an uninterrupted build


def test_verify(big, tmp_path):
    proc = start(["verify", big / "reference.h5"], tmp_path)
    code, stdout, err = interrupt_when(proc, busy(proc))
    assert code == 130 and stdout == ""
    assert one_line(err) == "goalkit: interrupted; nothing was written"


def test_tune(big, tmp_path):
    before = sha256(big / "gantry-recipe.toml")
    proc = start(["tune", big / "gantry-recipe.toml", "--from-success", "--write-recipe", tmp_path / "t.toml"],
                 tmp_path)
    code, stdout, err = interrupt_when(proc, busy(proc))
    assert code == 130 and stdout == ""
    assert one_line(err) == "goalkit: interrupted; nothing was written"
    assert list(tmp_path.iterdir()) == [] and sha256(big / "gantry-recipe.toml") == before


def test_embed(big, tmp_path):
    out = tmp_path / "e.npz"
    proc = start(["embed", big / "gantry-logs.h5", "--layout", big / "gantry-layout.toml", "--method", "sfa",
                  "--degree", "2", "-o", out], tmp_path)
    code, stdout, err = interrupt_when(proc, busy(proc))
    assert code == 130 and stdout == ""
    assert one_line(err) == f"goalkit: interrupted; nothing was written at {out}"
    assert list(tmp_path.iterdir()) == []


def test_scan_writing_a_layout(big, tmp_path):
    out = tmp_path / "proposed.toml"
    proc = start(["scan", big / "gantry-logs.h5", "--write-layout", out], tmp_path)
    code, stdout, err = interrupt_when(proc, busy(proc))
    assert code == 130 and stdout == ""
    assert one_line(err).startswith("goalkit: interrupted; ")
    assert list(tmp_path.iterdir()) == []


def test_demo(tmp_path):
    out = tmp_path / "bench"
    proc = start(["demo", out, "--episodes", str(4 * EPISODES)], tmp_path)
    code, stdout, err = interrupt_when(proc, busy(proc))
    assert code == 130 and stdout == ""
    assert one_line(err).startswith("goalkit: interrupted; ")
    # each file is written whole or not at all: no temporary file is left behind
    left = [p.name for p in out.iterdir()] if out.exists() else []
    assert all(not name.startswith(".") for name in left), left

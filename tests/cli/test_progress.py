"""Progress bars: shown on a terminal, absent when piped or with --quiet."""

import os
import pty
import subprocess
import sys
from pathlib import Path

from goalkit.demo import make_demo

EXE = str(Path(sys.executable).with_name("goalkit"))


def stderr_on_a_terminal(args):
    master, slave = pty.openpty()
    proc = subprocess.run([EXE, *map(str, args)], stdout=subprocess.DEVNULL, stderr=slave, timeout=120)
    os.close(slave)
    chunks = []
    while True:
        try:
            data = os.read(master, 65536)
        except OSError:
            break
        if not data:
            break
        chunks.append(data)
    os.close(master)
    return proc.returncode, b"".join(chunks).decode(errors="replace")


def test_build_shows_a_bar_on_a_terminal_only(tmp_path):
    info = make_demo(tmp_path, episodes=40, seed=3)
    code, err = stderr_on_a_terminal(["build", info["recipe"], "--chunk-rows", "2000"])
    assert code == 0
    assert "build" in err and "transition" in err and "%" in err
    code, err = stderr_on_a_terminal(["build", info["recipe"], "--quiet", "--replace"])
    assert code == 0 and err == ""
    piped = subprocess.run([EXE, "build", str(info["recipe"]), "--replace"], capture_output=True, text=True)
    assert piped.returncode == 0 and piped.stderr == ""

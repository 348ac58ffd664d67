"""Planted links are never followed; existing outputs need --replace; killed runs' leftovers go.

Links are planted where goalkit writes: at a temporary name (the random part of the name is
fixed for the test through ``goalkit.outputs._token``, the one source of those names), at the
predictable names older versions used, at the build folder ``.NAME.shards`` and inside it.
"""

from __future__ import annotations

import itertools
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import pytest
from click.testing import CliRunner

import goalkit.outputs as outputs
from goalkit.cli import main
from goalkit.outputs import host_tag, is_stale, temporary_name
from goalkit.pipeline.buildfolder import folder_of
from safety_cases import copy_world, make_world, one_error_line, sha256, snapshot

GOALKIT = [sys.executable, "-m", "goalkit.cli"]


@pytest.fixture(scope="module")
def world(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("world")
    make_world(root)
    return root


@pytest.fixture
def w(world, tmp_path) -> Path:
    return copy_world(world, tmp_path / "w")


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def commands(w: Path, out: Path) -> dict:
    """Command lines that write ``out`` (name -> argv), all reading the world ``w``."""
    return {
        "build": ["build", w / "gantry-recipe.toml", "--out", out, "--quiet"],
        "build --workers 2": ["build", w / "gantry-recipe.toml", "--out", out, "--workers", "2", "--quiet"],
        "scan --write-layout": ["scan", w / "gantry-logs.h5", "--layout", w / "gantry-layout.toml",
                                "--write-layout", out, "--quiet"],
        "scan --write-recipe": ["scan", w / "gantry-logs.h5", "--layout", w / "gantry-layout.toml",
                                "--write-recipe", out, "--quiet"],
        "embed -o": ["embed", w / "gantry-logs.h5", "--layout", w / "gantry-layout.toml", "--method", "pca",
                     "--dims", "2", "--fields", "head,trays", "-o", out, "--quiet"],
        "tune --write-recipe": ["tune", w / "gantry-recipe.toml", "--from-success", "--resamples", "0",
                                "--write-recipe", out, "--quiet"],
    }


OUT_NAMES = {"build": "goals.h5", "build --workers 2": "goals.h5", "scan --write-layout": "new-layout.toml",
             "embed -o": "new-emb.npz", "tune --write-recipe": "tuned.toml"}
#: Outputs that are never replaced, with or without --replace.
WRITE_ONCE = {"scan --write-recipe": "start.toml"}
ALL_OUT = {**OUT_NAMES, **WRITE_ONCE}


def _check_output(kind: str, out: Path) -> None:
    """The output is complete and of its own kind."""
    from goalkit.goals.embedfile import is_embedding_file
    from goalkit.logs.layout import is_layout_file
    from goalkit.pipeline.recipe import is_recipe_file
    from goalkit.write.format import is_goal_set

    check = {"build": is_goal_set, "build --workers 2": is_goal_set, "scan --write-layout": is_layout_file,
             "scan --write-recipe": is_recipe_file,
             "embed -o": is_embedding_file, "tune --write-recipe": is_recipe_file}[kind]
    assert check(out), out


# ---- planted links at temporary names ----------------------------------------------------------
@pytest.mark.parametrize("kind", sorted(ALL_OUT))
def test_a_link_planted_at_the_temporary_name_is_not_followed(w, tmp_path, monkeypatch, kind):
    out = w / ALL_OUT[kind]
    victim = tmp_path / "victim.txt"
    victim.write_bytes(b"precious")
    planted = "0123456789ab"
    tokens = itertools.chain([planted], (f"{i:012x}" for i in itertools.count(1)))
    monkeypatch.setattr(outputs, "_token", lambda: next(tokens))
    links = [temporary_name(out, planted),                                  # the name goalkit will try first
             out.with_name(f".{out.name}.partial-{os.getpid()}"),            # names older versions used
             out.with_name(f".{out.name}.{os.getpid()}.tmp"),
             temporary_name(out, planted).with_name(temporary_name(out, planted).name + "-dangling")]
    for link in links[:3]:
        os.symlink(victim, link)
    os.symlink(tmp_path / "not-there", links[3])                             # a dangling link
    result = run(*commands(w, out)[kind])
    assert result.exit_code == 0, result.output + result.stderr
    _check_output(kind, out)
    assert victim.read_bytes() == b"precious"
    assert all(os.readlink(p) == str(victim) for p in links[:3])             # the links are left as they were
    assert not (tmp_path / "not-there").exists()


def test_demo_does_not_follow_a_link_at_its_temporary_name(tmp_path, monkeypatch):
    out = tmp_path / "demo"
    out.mkdir()
    victim = tmp_path / "victim.txt"
    victim.write_bytes(b"precious")
    tokens = itertools.chain(["0123456789ab"], (f"{i:012x}" for i in itertools.count(1)))
    monkeypatch.setattr(outputs, "_token", lambda: next(tokens))
    os.symlink(victim, temporary_name(out / "gantry-logs.h5", "0123456789ab"))
    result = run("demo", out, "--episodes", "3", "--quiet")
    assert result.exit_code == 0, result.stderr
    assert victim.read_bytes() == b"precious"
    with h5py.File(out / "gantry-logs.h5") as f:
        assert len(f["bench"]) == 3


# ---- the build folder ----------------------------------------------------------------------------
def test_a_link_planted_at_the_build_folder_is_refused(w, tmp_path):
    out = w / "goals.h5"
    victim = tmp_path / "victim-dir"
    victim.mkdir()
    (victim / "build.json").write_text("{}")
    (victim / "shard-00000.npz").write_bytes(b"precious")
    os.symlink(victim, folder_of(out))
    before = snapshot(victim)
    line = one_error_line(run(*commands(w, out)["build --workers 2"]))
    assert "symbolic link" in line and str(folder_of(out)) in line, line
    assert snapshot(victim) == before and not out.exists()
    assert os.readlink(folder_of(out)) == str(victim)


@pytest.mark.parametrize("name", ["lock", "build.json", "shard-00000.npz", "goal_table.npy"])
def test_links_planted_inside_the_build_folder_are_not_followed(w, tmp_path, name):
    out = w / "goals.h5"
    victim = tmp_path / "victim.bin"
    victim.write_bytes(b"precious")
    folder_of(out).mkdir()
    os.symlink(victim, folder_of(out) / name)
    result = run(*commands(w, out)["build --workers 2"])
    if name == "lock":   # the lock is opened without following links: refused, one line
        line = one_error_line(result)
        assert "build folder" in line, line
        assert not out.exists()
    else:                # removed as a link (the target untouched), then written afresh
        assert result.exit_code == 0, result.stderr
        _check_output("build", out)
        assert not folder_of(out).exists()
    assert victim.read_bytes() == b"precious"


# ---- existing outputs ----------------------------------------------------------------------------
def _foreign(path: Path) -> bytes:
    path.write_bytes(b"the user's own notes, not written by goalkit\n")
    return path.read_bytes()


@pytest.mark.parametrize("kind", sorted(OUT_NAMES))
def test_an_existing_output_needs_replace_and_a_foreign_file_is_never_replaced(w, kind):
    out = w / OUT_NAMES[kind]
    argv = commands(w, out)[kind]
    assert run(*argv).exit_code == 0
    first = sha256(out)
    line = one_error_line(run(*argv))                                  # 1. refused without --replace
    assert "already exists; give --replace to replace it" in line and str(out) in line, line
    assert sha256(out) == first
    os.utime(out, (0, 0))                                              # 2. replaced with it
    assert run(*argv, "--replace").exit_code == 0
    _check_output(kind, out)
    assert os.stat(out).st_mtime > 0
    assert [p.name for p in w.iterdir() if "~goalkit-" in p.name] == []
    for foreign in ("text", "link"):                                   # 3. never a foreign file or a link
        out.unlink()
        if foreign == "text":
            kept = _foreign(out)
        else:
            target = w / "linked-target"
            kept = _foreign(target)
            os.symlink(target, out)
        line = one_error_line(run(*argv, "--replace"))
        assert ("not a" in line and "written by goalkit" in line) or "symbolic link" in line, line
        assert out.read_bytes() == kept
        assert os.path.islink(out) == (foreign == "link")


@pytest.mark.parametrize("kind", sorted(WRITE_ONCE))
def test_a_write_once_output_is_never_replaced(w, kind):
    out = w / WRITE_ONCE[kind]
    argv = commands(w, out)[kind]
    assert run(*argv).exit_code == 0
    first = sha256(out)
    for extra in ((), ("--replace",)):
        line = one_error_line(run(*argv, *extra))
        assert "already exists" in line and "never replaces" in line and str(out) in line, line
        assert sha256(out) == first
    out.unlink()
    target = w / "linked-target"
    kept = _foreign(target)
    os.symlink(target, out)
    line = one_error_line(run(*argv))
    assert "symbolic link" in line and target.read_bytes() == kept and os.path.islink(out)


def test_a_dataset_of_another_recipe_is_replaced_only_with_replace(w):
    # the case: an existing set built from another recipe was replaced without a word
    out = w / "goals.h5"
    assert run("build", w / "full-recipe.toml", "--out", out, "--quiet").exit_code == 0
    first = sha256(out)
    line = one_error_line(run("build", w / "gantry-recipe.toml", "--out", out, "--quiet"))
    assert "--replace" in line and sha256(out) == first
    assert run("build", w / "gantry-recipe.toml", "--out", out, "--quiet", "--replace").exit_code == 0
    with h5py.File(out) as f:
        assert "embedding" not in f.attrs["recipe"]


def test_an_hdf5_file_that_is_not_a_goalkit_set_is_never_replaced(w):
    out = w / "other.h5"
    with h5py.File(out, "w") as f:
        f.attrs["format"] = "someone else's"
    kept = sha256(out)
    line = one_error_line(run("build", w / "gantry-recipe.toml", "--out", out, "--quiet", "--replace"))
    assert "not a dataset written by goalkit" in line and sha256(out) == kept


def test_tune_plots_need_replace_and_only_pngs_are_replaced(w):
    plots = w / "plots"
    argv = ["tune", w / "gantry-recipe.toml", "--from-success", "--resamples", "0", "--plots", plots, "--quiet"]
    assert run(*argv).exit_code == 0
    written = sorted(p.name for p in plots.iterdir())
    assert "threshold-roc.png" in written and len(written) >= 6
    roc = sha256(plots / "threshold-roc.png")
    line = one_error_line(run(*argv))
    assert "--replace" in line and sha256(plots / "threshold-roc.png") == roc
    assert run(*argv, "--replace").exit_code == 0
    kept = _foreign(plots / "threshold-f1.png")
    line = one_error_line(run(*argv, "--replace"))
    assert "not a plot written by goalkit" in line and (plots / "threshold-f1.png").read_bytes() == kept


def test_demo_needs_replace_and_never_replaces_foreign_files(tmp_path):
    d = tmp_path / "d"
    assert run("demo", d, "--episodes", "3", "--quiet").exit_code == 0
    logs = sha256(d / "gantry-logs.h5")
    line = one_error_line(run("demo", d, "--episodes", "4", "--quiet"))
    assert "--replace" in line and sha256(d / "gantry-logs.h5") == logs
    assert run("demo", d, "--episodes", "4", "--quiet", "--replace").exit_code == 0
    with h5py.File(d / "gantry-logs.h5") as f:
        assert len(f["bench"]) == 4
    kept = _foreign(d / "gantry-recipe.toml")
    line = one_error_line(run("demo", d, "--episodes", "3", "--quiet", "--replace"))
    assert "gantry-recipe.toml" in line and (d / "gantry-recipe.toml").read_bytes() == kept
    with h5py.File(d / "gantry-logs.h5") as f:          # refused before anything was written
        assert len(f["bench"]) == 4


# ---- leftovers of killed runs ----------------------------------------------------------------------
def _dead_pid() -> int:
    p = subprocess.Popen([sys.executable, "-c", "pass"])
    p.wait()
    return p.pid


@pytest.mark.parametrize("kind", sorted(ALL_OUT))
def test_stale_temporaries_are_removed_and_nothing_else(w, kind):
    out = w / ALL_OUT[kind]
    dead, host = _dead_pid(), host_tag()
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        stale = [f".{out.name}~goalkit-{dead}-{host}-0123456789ab.tmp",
                 f".{out.name}~goalkit-{sleeper.pid}-{host}-00000000000a.tmp"]   # PID reused: see below
        kept = [f".{out.name}~goalkit-{dead}-{host}-0123456789ab.tmp.bak",       # not exactly our scheme
                f".{out.name}~goalkit-{dead}-{host}-0123456789AB.tmp",
                f".{out.name}~goalkit-{dead}-0000abcd-0123456789ab.tmp" if host != "0000abcd" else "x",  # other machine
                f".{out.name}~goalkit-{sleeper.pid}-{host}-00000000000b.tmp",   # a running writer
                f".{out.name}.partial-{dead}",                                   # older names: not ours now
                f".other.h5~goalkit-{dead}-{host}-0123456789ab.tmp",             # another output's
                f"{out.name}~goalkit-{dead}-{host}-0123456789ab.tmp"]
        for name in stale + kept:
            (w / name).write_bytes(b"x")
        # the process now holding this PID started after the file was last written: a reused PID
        os.utime(w / stale[1], (time.time() - 3600, time.time() - 3600))
        assert is_stale(w, stale[0]) and is_stale(w, stale[1]) and not is_stale(w, kept[3])
        result = run(*commands(w, out)[kind])
        assert result.exit_code == 0, result.stderr
    finally:
        sleeper.kill()
        sleeper.wait()
    names = {p.name for p in w.iterdir()}
    assert not names & set(stale)
    assert set(kept) <= names


def test_a_killed_single_process_build_leaves_a_temporary_that_the_next_run_removes(world, tmp_path):
    # docs/scaling.md: a killed run's temporary dataset is deleted by the next run
    w = copy_world(world, tmp_path / "w")
    big = tmp_path / "big"
    assert run("demo", big, "--episodes", "400", "--quiet").exit_code == 0
    out = w / "goals.h5"
    cmd = GOALKIT + ["build", str(big / "gantry-recipe.toml"), "--out", str(out), "--chunk-rows", "1000", "--quiet"]
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    deadline = time.time() + 60
    temps = []
    while time.time() < deadline and not temps and proc.poll() is None:
        temps = [p for p in w.iterdir() if p.name.startswith(".goals.h5~goalkit-")]
        time.sleep(0.005)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    if not temps:
        pytest.fail("the build finished before its temporary file was seen; make it larger")
    assert temps[0].exists() and not out.exists()
    res = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    assert sorted(p.name for p in w.iterdir() if p.name.startswith(".goals")) == []
    assert out.exists()


# ---- real processes --------------------------------------------------------------------------------
@pytest.mark.parametrize("extra", [[], ["--workers", "2"]], ids=["one-process", "workers"])
def test_real_process_build_over_its_logs_is_refused(world, tmp_path, extra):
    w = copy_world(world, tmp_path / "w")
    before = snapshot(w)
    res = subprocess.run(GOALKIT + ["build", str(w / "gantry-recipe.toml"), "--out", str(w / "gantry-logs.h5"),
                                    "--replace", "--quiet"] + extra, capture_output=True, text=True, timeout=120)
    assert res.returncode == 2 and res.stdout == ""
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "refusing to write over an input" in lines[0] and "Traceback" not in res.stderr
    assert snapshot(w) == before


def test_real_process_scan_over_a_hard_link_of_its_layout_is_refused(world, tmp_path):
    w = copy_world(world, tmp_path / "w")
    os.link(w / "gantry-layout.toml", w / "copy.toml")
    before = snapshot(w)
    res = subprocess.run(GOALKIT + ["scan", str(w / "gantry-logs.h5"), "--layout", str(w / "gantry-layout.toml"),
                                    "--write-layout", str(w / "copy.toml"), "--replace"],
                         capture_output=True, text=True, timeout=120)
    assert res.returncode == 2 and len(res.stderr.strip().splitlines()) == 1, res.stderr
    assert "is the same file as the layout" in res.stderr
    assert snapshot(w) == before

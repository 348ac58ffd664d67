"""The pieces of goalkit.outputs on their own: names, publishing races, folders, overlap rules."""

from __future__ import annotations

import os

import pytest
from click.testing import CliRunner

from goalkit.cli import main
from goalkit.errors import OutputError
from goalkit.outputs import (STEM_CHARS, check_no_overlap, create_temporary, is_temporary_of, output_file,
                             own_folder, parse_temporary, publish, temporary_name)
from safety_cases import one_error_line


def test_temporary_names_follow_one_exact_scheme(tmp_path):
    t = temporary_name(tmp_path / "set.h5", token="0123456789ab")
    parts = parse_temporary(t.name)
    assert parts["stem"] == "set.h5" and parts["pid"] == os.getpid() and parts["token"] == "0123456789ab"
    assert is_temporary_of(t.name, "set.h5") and not is_temporary_of(t.name, "set.h")
    for near in (t.name + ".bak", t.name[1:], t.name.replace(".tmp", ".TMP"), t.name.replace("~goalkit-", "~gk-"),
                 t.name.replace("0123456789ab", "0123456789"), t.name.replace(f"-{os.getpid()}-", "-0-")):
        assert parse_temporary(near) is None, near
    # a long output name still gives a legal file name (at most 255 bytes)
    long = tmp_path / ("n" * 250)
    tmp, fd = create_temporary(long)
    os.close(fd)
    assert len(tmp.name) <= 255 and is_temporary_of(tmp.name, long.name)
    assert parse_temporary(tmp.name)["stem"] == "n" * STEM_CHARS


def test_publish_never_replaces_what_appeared_meanwhile(tmp_path):
    out = tmp_path / "out.bin"
    tmp, fd = create_temporary(out)
    os.write(fd, b"new")
    os.close(fd)
    out.write_bytes(b"someone else's")                     # appeared while we were writing
    with pytest.raises(OutputError, match="already exists"):
        publish(tmp, out)
    assert out.read_bytes() == b"someone else's" and not tmp.exists()
    # a dangling link that appeared meanwhile is not followed (its target is not created)
    out.unlink()
    os.symlink(tmp_path / "target", out)
    tmp, fd = create_temporary(out)
    os.close(fd)
    with pytest.raises(OutputError, match="symbolic link"):
        publish(tmp, out, replace=True, ours=lambda p: True)
    assert not (tmp_path / "target").exists() and not tmp.exists()


def test_a_failed_write_leaves_no_output_and_no_temporary(tmp_path):
    out = tmp_path / "out.bin"
    with pytest.raises(RuntimeError):
        with output_file(out) as f:
            f.write(b"half")
            raise RuntimeError("stopped")
    assert list(tmp_path.iterdir()) == []


def test_own_folder_refuses_links_and_files(tmp_path):
    assert own_folder(tmp_path / "a") is True and own_folder(tmp_path / "a") is False
    os.symlink(tmp_path / "a", tmp_path / "b")
    with pytest.raises(OutputError, match="symbolic link"):
        own_folder(tmp_path / "b")
    (tmp_path / "c").write_bytes(b"x")
    with pytest.raises(OutputError, match="found a file"):
        own_folder(tmp_path / "c")


def test_overlap_rules(tmp_path):
    logs = tmp_path / "logs"
    logs.mkdir()
    (logs / "ep0.npz").write_bytes(b"x")
    layout = tmp_path / "layout.toml"
    layout.write_bytes(b"shape = 'per-file'")
    ins = [("logs", logs), ("layout", layout)]
    check_no_overlap(ins, [("--out", tmp_path / "fresh.h5")])       # no overlap: no error
    cases = {tmp_path / "logs": "is the logs", logs / "sub" / "x.h5": "lies inside the logs",
             tmp_path: "holds the logs", tmp_path / "layout.toml": "is the layout"}
    for out, words in cases.items():
        with pytest.raises(OutputError, match=words):
            check_no_overlap(ins, [("--out", out)])
    os.link(logs / "ep0.npz", tmp_path / "hard.npz")
    with pytest.raises(OutputError, match=r"is the same file as .*ep0.npz in the logs"):
        check_no_overlap(ins, [("--out", tmp_path / "hard.npz")])
    with pytest.raises(OutputError, match="same path as"):
        check_no_overlap([], [("-a", tmp_path / "x"), ("-b", tmp_path / "." / "x")])


def test_two_outputs_of_one_command_may_not_be_one_file(tmp_path):
    from goalkit.demo import make_demo

    info = make_demo(tmp_path, episodes=6, seed=2)
    plots = tmp_path / "plots"
    res = CliRunner().invoke(main, ["tune", info["recipe"], "--from-success", "--resamples", "0", "--plots", str(plots),
                                    "--write-recipe", str(plots / "threshold-roc.png")])
    line = one_error_line(res)
    assert "same path as" in line, line
    assert not plots.exists()

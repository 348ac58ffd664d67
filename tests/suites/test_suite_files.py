"""Suite files: deterministic by seed, safe outputs, checked checksums, the card."""

import hashlib
import subprocess
import sys

import h5py
import numpy as np
import pytest

from goalkit.errors import DatasetError, OutputError
from goalkit.suites.fileformat import COLUMNS, read_suite
from goalkit.suites.make import make_suite

GOALKIT = [sys.executable, "-m", "goalkit.cli"]


def _sha(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_same_seed_gives_byte_identical_suite_and_card(grid, tmp_path):
    a = make_suite(grid["set"], tmp_path / "a.h5", join_neighbours=64, per_cell=60, seed=0)
    assert _sha(a.path) == _sha(grid["suite"])
    assert a.card.read_text() .replace("a.h5", "X") == grid["result"].card.read_text().replace("grid-suite.h5", "X")
    b = make_suite(grid["set"], tmp_path / "b.h5", join_neighbours=64, per_cell=5, seed=1)
    c = make_suite(grid["set"], tmp_path / "c.h5", join_neighbours=64, per_cell=5, seed=2)
    eb, ec = read_suite(b.path).columns, read_suite(c.path).columns
    assert not (np.array_equal(eb["episode"], ec["episode"]) and np.array_equal(eb["step"], ec["step"]))


def test_suite_rows_are_held_out_and_consistent(grid):
    s = read_suite(grid["suite"])
    cols = s.columns
    assert set(cols) == set(COLUMNS) and len(s) == grid["result"].rows
    import goalkit

    with goalkit.open_set(grid["set"]) as gs:
        train_eps = set(np.unique(gs.read("train", ["source_episode"])["source_episode"]).tolist())
    assert not set(cols["episode"].tolist()) & train_eps
    np.testing.assert_array_equal(cols["reachable"] == 1, cols["route"] != 2)
    per_cell = {}
    for r, b, p in zip(cols["route"], cols["bucket"], cols["proximity"]):
        per_cell[(r, b, p)] = per_cell.get((r, b, p), 0) + 1
    assert max(per_cell.values()) <= 60
    assert sum(c["rows"] for c in s.counts["cells"]) == len(s)


def test_card_states_the_strata_and_the_caution(grid):
    text = grid["result"].card.read_text()
    assert text.startswith("# Held-out goal suite")
    assert "not a substitute for supervised trials on the machine" in text
    assert "neighbour joins within 0.5" in text
    for cell in grid["result"].counts["cells"]:
        assert f"| {cell['route']} | {cell['bucket']} | {cell['proximity']} | {cell['candidates']} | " \
               f"{cell['rows']} |" in text


def test_existing_outputs_and_inputs_are_never_overwritten(grid, tmp_path):
    with pytest.raises(OutputError, match="already exists; give --replace"):
        make_suite(grid["set"], grid["suite"], join_neighbours=64, per_cell=60)
    before = _sha(grid["set"])
    with pytest.raises(OutputError, match="refusing to write over an input"):
        make_suite(grid["set"], grid["set"], per_cell=5, replace=True)
    assert _sha(grid["set"]) == before
    logs = grid["folder"] / "grid-logs.h5"
    before_logs = _sha(logs)
    with pytest.raises(OutputError, match="refusing to write over an input: --out .* is the logs"):
        make_suite(grid["set"], logs, per_cell=5, replace=True)  # the set's logs are inputs too
    assert _sha(logs) == before_logs
    (tmp_path / "x.md").write_text("my notes")
    with pytest.raises(OutputError):
        make_suite(grid["set"], tmp_path / "x.h5", per_cell=5, replace=True)  # a foreign card is never replaced
    assert (tmp_path / "x.md").read_text() == "my notes" and not (tmp_path / "x.h5").exists()


def test_edited_suite_is_refused(grid, tmp_path):
    copy = tmp_path / "edited.h5"
    copy.write_bytes(grid["suite"].read_bytes())
    with h5py.File(copy, "r+") as f:
        f["horizon"][0] = 999
    with pytest.raises(DatasetError, match="columns_checksum"):
        read_suite(copy)


def test_suite_from_another_set_is_refused_by_checksum(grid):
    out = subprocess.run([*GOALKIT, "assess", str(grid["other_set"]), str(grid["suite"]), "--import-path",
                          str(grid["ck"]), "--policy", "gridck:bfs_policy"], capture_output=True, text=True)
    assert out.returncode == 2, out.stderr
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1 and "drawn from another set" in lines[0] and "Traceback" not in out.stderr


def test_suite_command_json_and_help(grid, tmp_path):
    out = subprocess.run([*GOALKIT, "suite", str(grid["set"]), "--out", str(tmp_path / "j.h5"), "--per-cell", "3",
                          "--join-neighbours", "64", "--json"], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    import json

    doc = json.loads(out.stdout)
    assert doc["rows"] == len(read_suite(tmp_path / "j.h5")) and doc["strata"]["join_radius"] == 0.5
    h = " ".join(subprocess.run([*GOALKIT, "suite", "--help"], capture_output=True, text=True).stdout.split())
    assert "[default: 4,16,64]" in h and "--quiet" in h

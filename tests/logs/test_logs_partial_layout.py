"""Detection synonyms, and the partial layout written when detection cannot decide."""

from __future__ import annotations

import tomllib

import h5py
import numpy as np
import pytest
from click.testing import CliRunner

from goalkit.cli import main as cli_main
from goalkit.logs import open_logs, parse_layout, propose_layout
from goalkit.logs.detect import partial_layout


def _flat(path, names, n_eps=3, T=4):
    """A flat HDF5 log of T+1 observation rows per episode with the given array names."""
    obs = np.arange(n_eps * (T + 1) * 2, dtype=np.float64).reshape(-1, 2)
    end = np.zeros(n_eps * T, bool)
    end[T - 1::T] = True
    arrays = {names["obs"]: obs, names["act"]: np.ones((n_eps * T, 3), np.float32),
              names["ids"]: np.repeat(np.arange(n_eps), T + 1)} if "ids" in names else {
        names["obs"]: obs[np.arange(len(obs)) % (T + 1) != T], names["next"]: obs[np.arange(len(obs)) % (T + 1) != 0],
        names["act"]: np.ones((n_eps * T, 3), np.float32), names["term"]: end & False, names["trunc"]: end}
    with h5py.File(path, "w") as f:
        for k, v in arrays.items():
            f[k] = v


@pytest.mark.parametrize("act", ["acts", "ctrl", "u", "Controls", "commands"])
def test_action_synonyms(tmp_path, act):
    _flat(tmp_path / "a.h5", {"obs": "obs", "act": act, "ids": "run_id"})
    lay = propose_layout(tmp_path / "a.h5")
    assert lay.keys.action == act and lay.boundaries.episode_id == "run_id"
    assert open_logs(tmp_path / "a.h5").lengths.tolist() == [4, 4, 4]


@pytest.mark.parametrize("term, trunc", [("term", "trunc"), ("terminated", "truncated"),
                                         ("terminals", "time_limits")])
def test_end_flag_synonyms_become_roles_and_boundaries(tmp_path, term, trunc):
    _flat(tmp_path / "g.h5", {"obs": "observations", "next": "next_observations", "act": "actions",
                              "term": term, "trunc": trunc})
    lay = propose_layout(tmp_path / "g.h5")
    assert lay.keys.termination == term and lay.keys.time_limit == trunc
    assert lay.boundaries.done == (term, trunc) and lay.boundaries.episode_id is None
    src = open_logs(tmp_path / "g.h5")
    assert src.lengths.tolist() == [4, 4, 4]
    es = src.read(0, 3)
    assert es.time_limits.tolist() == [False, False, False, True] * 3
    assert not es.terminations.any()


def _arm(path):
    rng = np.random.default_rng(0)
    with h5py.File(path, "w") as f:
        f["rec/q"] = rng.normal(size=(40, 23))
        f["rec/q_after"] = rng.normal(size=(40, 23))
        f["rec/ctrl"] = rng.normal(size=(40, 7)).astype(np.float32)
        f["rec/halt"] = np.zeros(40, bool)
        f["rec/cut"] = np.tile(np.eye(1, 10, 9, dtype=bool)[0], 4)
        f["rec/take"] = np.repeat(np.arange(4), 10)


def test_partial_layout_lists_every_array_and_guesses(tmp_path):
    _arm(tmp_path / "arm.h5")
    text = partial_layout(tmp_path / "arm.h5", reason="no observations")
    for key, shape, dtype in (("rec/q", "(40, 23)", "float64"), ("rec/q_after", "(40, 23)", "float64"),
                              ("rec/ctrl", "(40, 7)", "float32"), ("rec/halt", "(40,)", "bool"),
                              ("rec/cut", "(40,)", "bool"), ("rec/take", "(40,)", "int64")):
        line = next(x for x in text.splitlines() if x.startswith(f"#   {key} "))
        assert shape in line and dtype in line
    doc = tomllib.loads(text)
    assert doc["keys"] == {"observation": "rec/q", "action": "rec/ctrl"}
    assert doc["boundaries"] == {"episode_id": "rec/take"}
    assert "# termination = \"???\"" in text and "(no observations)" in text
    # confirmed as it is, the partial layout reads the logs (T observations per action here)
    src = open_logs(tmp_path / "arm.h5", parse_layout(doc))
    assert src.lengths.tolist() == [9, 9, 9, 9] and src.convention == "T"


def test_partial_layout_of_npz_and_grouped_logs(tmp_path):
    np.savez(tmp_path / "f.npz", pos=np.zeros((9, 2)), push=np.zeros((8, 2)), k=np.zeros(8, np.int32))
    doc = tomllib.loads(partial_layout(tmp_path / "f.npz"))
    assert doc["shape"] == "flat" and doc["keys"]["observation"] == "pos"
    with h5py.File(tmp_path / "g.h5", "w") as f:
        for i in range(3):
            f[f"runs/r{i}/act"] = np.zeros((3, 2))
            f[f"runs/r{i}/pos"] = np.zeros((4, 5))
            f[f"runs/r{i}/vel"] = np.zeros((4, 2))
    text = partial_layout(tmp_path / "g.h5")
    doc = tomllib.loads(text)
    assert doc["shape"] == "grouped" and doc["episode_groups"] == "runs/*"
    assert doc["keys"] == {"observation": "pos", "action": "act"}
    assert "#   vel  " in text and "boundaries" not in doc


def test_scan_writes_the_partial_layout_and_exits_2(tmp_path):
    _arm(tmp_path / "arm.h5")
    out = tmp_path / "arm-layout.toml"
    res = CliRunner().invoke(cli_main, ["scan", str(tmp_path / "arm.h5"), "--write-layout", str(out)])
    assert res.exit_code == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "could not find the observations" in lines[0]
    assert f"saved to {out}: finish it, then rerun with --layout {out}" in lines[0]
    assert tomllib.loads(out.read_text())["keys"]["action"] == "rec/ctrl"
    # an existing file is refused without --replace; a partial layout is ours to replace
    again = CliRunner().invoke(cli_main, ["scan", str(tmp_path / "arm.h5"), "--write-layout", str(out)])
    assert again.exit_code == 2 and "exists" in again.stderr
    again = CliRunner().invoke(cli_main, ["scan", str(tmp_path / "arm.h5"), "--write-layout", str(out),
                                          "--replace"])
    assert again.exit_code == 2 and "saved to" in again.stderr
    # the user confirms it: scan reads the logs with it
    ok = CliRunner().invoke(cli_main, ["scan", str(tmp_path / "arm.h5"), "--layout", str(out)])
    assert ok.exit_code == 0, ok.output
    assert "episodes:     4" in ok.output
    # without --write-layout the one error line says how to get the partial layout; stdout stays empty
    shown = CliRunner().invoke(cli_main, ["scan", str(tmp_path / "arm.h5")])
    assert shown.exit_code == 2 and shown.stdout == ""
    assert len(shown.stderr.strip().splitlines()) == 1
    assert "--write-layout FILE saves a partial layout listing every array" in shown.stderr
    # a folder without any log: nothing to list, no partial layout
    (tmp_path / "none").mkdir()
    none = CliRunner().invoke(cli_main, ["scan", str(tmp_path / "none"), "--write-layout", str(tmp_path / "n.toml")])
    assert none.exit_code == 2 and not (tmp_path / "n.toml").exists() and "partial layout" not in none.stderr

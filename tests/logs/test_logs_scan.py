"""scan_logs report values and the ``goalkit scan`` command (CliRunner and one real run)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
from click.testing import CliRunner

from goalkit.cli import main
from goalkit.logs import layout_to_toml, open_logs, parse_layout, propose_layout
from goalkit.logs.scan import scan_logs
from logs_testdata import make_episodes, truth, write_flat, write_grouped

LENGTHS = [3, 1, 6, 2, 5, 4, 1]


def test_report_values(tmp_path):
    eps = make_episodes(LENGTHS, seed=30)
    for e in eps:
        e["trays"][:, 1] = 0.25                   # a constant observation dimension
    table = write_grouped(tmp_path / "g.h5", eps, fields=True)
    src = open_logs(tmp_path / "g.h5", table)
    seen = []
    report = scan_logs(src, max_transitions=5, advance=seen.append)
    t = truth(eps)
    assert report["episodes"] == 7 and report["steps"] == sum(LENGTHS) == sum(seen)
    assert len(seen) > 3                          # read chunk by chunk
    assert report["lengths"] == {"min": 1, "median": float(np.median(LENGTHS)),
                                 "mean": float(np.mean(LENGTHS)), "max": 6}
    lo, hi = t["observations"].min(0), t["observations"].max(0)
    assert [d["min"] for d in report["observation_range"]] == pytest.approx(lo.tolist())
    assert [d["max"] for d in report["observation_range"]] == pytest.approx(hi.tolist())
    assert [d["field"] for d in report["observation_range"]] == [
        "head[0]", "head[1]", "head[2]", "trays[0]", "trays[1]"]
    # success: episode success = any flag; tasks are i % 3, even episodes succeed
    expected = {}
    for i, e in enumerate(eps):
        n, s = expected.get(e["task"], (0, 0))
        expected[e["task"]] = (n + 1, s + int(e["success"].any()))
    got = {r["task"]: (r["episodes"], r["succeeded"]) for r in report["success_by_task"]}
    assert got == expected
    for r in report["success_by_task"]:
        assert r["rate"] == pytest.approx(r["succeeded"] / r["episodes"])
    assert "2 episode(s) have a single transition" in report["problems"][0]
    assert any("dimension 4 (trays[1]) is constant (0.25)" in p for p in report["problems"])
    roles = {k["role"]: k for k in report["keys"]}
    assert roles["field head"]["shape"] == [4, 3] and roles["field head"]["dtype"] == "float32"
    assert roles["task"]["shape"] == "attribute"
    assert report["rewards"]["max"] == 1.0
    json.dumps(report)                            # JSON-able


def write_demo_like(tmp_path, nan_episode=None):
    eps = make_episodes(LENGTHS, seed=31)
    if nan_episode is not None:
        eps[nan_episode]["head"][1, 0] = np.nan
    table = write_grouped(tmp_path / "g.h5", eps)
    lay = tmp_path / "layout.toml"
    lay.write_text(layout_to_toml(parse_layout(table)))
    return tmp_path / "g.h5", lay


def run(*args):
    result = CliRunner().invoke(main, list(map(str, args)))
    return result


def test_cli_json_with_layout(tmp_path):
    logs, lay = write_demo_like(tmp_path)
    r = run("scan", logs, "--layout", lay, "--json")
    assert r.exit_code == 0, r.output
    report = json.loads(r.output)
    assert report["episodes"] == 7 and report["steps"] == sum(LENGTHS)
    assert report["layout_proposed"] is False


def test_cli_proposes_prints_and_writes_layout(tmp_path):
    logs, _ = write_demo_like(tmp_path)
    out = tmp_path / "proposed.toml"
    r = run("scan", logs, "--write-layout", out)
    assert r.exit_code == 0, r.output
    text = layout_to_toml(propose_layout(logs))
    assert out.read_text() == text
    assert "proposed layout (saved to" in r.output and 'episode_groups = "runs/*"' in r.output
    assert "episodes:     7" in r.output and f"transitions:  {sum(LENGTHS)}" in r.output
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []   # no temp file left
    r = run("scan", logs, "--quiet")
    assert r.exit_code == 0 and r.output == ""


def test_cli_skip_bad_episodes(tmp_path):
    logs, lay = write_demo_like(tmp_path, nan_episode=2)
    r = run("scan", logs, "--layout", lay)
    assert r.exit_code == 2
    assert r.output.count("\n") == 1 and "Traceback" not in r.output
    assert "episode 2: step 1: expected finite values" in r.output
    assert "(--skip-bad-episodes skips such episodes)" in r.output
    r = run("scan", logs, "--layout", lay, "--skip-bad-episodes", "--json")
    assert r.exit_code == 0
    report = json.loads(r.output)
    assert report["episodes"] == 6 and report["episodes_in_log"] == 7
    assert report["skipped"][0]["episode"] == 2 and "step 1" in report["skipped"][0]["reason"]
    assert report["steps"] == sum(LENGTHS) - LENGTHS[2]


def bad_inputs(tmp_path):
    logs, lay = write_demo_like(tmp_path)
    typo = tmp_path / "typo.toml"
    typo.write_text(lay.read_text().replace("episode_groups", "episode_group"))
    with h5py.File(tmp_path / "noid.h5", "w") as f:
        f["obs"], f["act"] = np.zeros((4, 2)), np.zeros((4, 2))
    (tmp_path / "text.h5").write_text("hello")
    return {
        "missing logs": (["scan", tmp_path / "missing.h5", "--layout", lay], "file not found"),
        "missing layout": (["scan", logs, "--layout", tmp_path / "nope.toml"], "nope.toml: file not found"),
        "misspelt key": (["scan", logs, "--layout", typo], "did you mean 'episode_groups'?"),
        "undecidable": (["scan", tmp_path / "noid.h5"], "could not find episode boundaries"),
        "not hdf5": (["scan", tmp_path / "text.h5", "--layout", lay], "not an HDF5 file"),
    }


def test_cli_bad_input_is_one_line_exit_2(tmp_path):
    for name, (args, expected) in bad_inputs(tmp_path).items():
        r = run(*args)
        assert r.exit_code == 2, (name, r.output)
        assert r.output.startswith("goalkit: error: ") and r.output.count("\n") == 1, (name, r.output)
        assert expected in r.output and "Traceback" not in r.output, (name, r.output)


def test_cli_debug_shows_the_exception(tmp_path):
    r = run("--debug", "scan", tmp_path / "missing.h5")
    # the traceback, then the one line; the exit status is the one without --debug
    assert r.exit_code == 2 and "Traceback" in r.stderr and "not found" in r.stderr.splitlines()[-1]


def test_cli_help_shows_defaults():
    r = run("scan", "--help")
    assert r.exit_code == 0
    assert "[default: 200000" in r.output and "--write-layout" in r.output
    assert "--skip-bad-episodes" in r.output


def test_real_subprocess(tmp_path):
    eps = make_episodes([2, 3, 4], seed=32)
    write_flat(tmp_path / "f.npz", eps, "pairs", "offsets", fmt="npz")
    exe = Path(sys.executable).with_name("goalkit")
    env = dict(os.environ, PYTHONWARNINGS="ignore")
    out = subprocess.run([str(exe), "scan", str(tmp_path / "f.npz"), "--json"], capture_output=True,
                         text=True, env=env, timeout=120)
    assert out.returncode == 0, out.stderr
    report = json.loads(out.stdout)
    assert (report["episodes"], report["steps"], report["convention"]) == (3, 9, "pairs")
    bad = subprocess.run([str(exe), "scan", str(tmp_path / "absent")], capture_output=True, text=True,
                         env=env, timeout=120)
    assert bad.returncode == 2 and "Traceback" not in bad.stderr
    assert bad.stderr.strip().endswith("absent: file not found")

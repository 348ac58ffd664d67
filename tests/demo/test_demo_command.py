"""`goalkit demo` through click's CliRunner and one real subprocess run."""

from __future__ import annotations

import json
import subprocess
import sys

import h5py
from click.testing import CliRunner

from goalkit.cli import main


def test_json_output_matches_the_files(tmp_path):
    out = tmp_path / "bench"
    res = CliRunner().invoke(main, ["demo", str(out), "--episodes", "12", "--seed", "3", "--json"])
    assert res.exit_code == 0, res.output
    info = json.loads(res.output)
    assert set(info) == {"logs", "layout", "recipe", "episodes", "steps"}
    assert info["logs"] == str(out / "gantry-logs.h5")
    assert info["layout"] == str(out / "gantry-layout.toml")
    assert info["recipe"] == str(out / "gantry-recipe.toml")
    assert info["episodes"] == 12
    with h5py.File(info["logs"]) as f:
        assert len(f["bench"]) == 12
        assert info["steps"] == sum(g["action"].shape[0] for g in f["bench"].values())
        assert int(f.attrs["seed"]) == 3
        assert "camera" not in f["bench/ep_00000"]


def test_frames_flag_and_summary(tmp_path):
    res = CliRunner().invoke(main, ["demo", str(tmp_path), "--episodes", "4", "--frames"])
    assert res.exit_code == 0, res.output
    assert "4 episodes" in res.output and "gantry-recipe.toml" in res.output
    assert "success by controller" in res.output
    with h5py.File(tmp_path / "gantry-logs.h5") as f:
        assert f["bench/ep_00000/camera"].shape[1:] == (32, 32)


def test_quiet_prints_nothing(tmp_path):
    res = CliRunner().invoke(main, ["demo", str(tmp_path), "--episodes", "2", "--quiet"])
    assert res.exit_code == 0
    assert res.output == ""
    assert (tmp_path / "gantry-logs.h5").is_file()


def test_directory_that_is_a_file_is_one_line_exit_2(tmp_path):
    target = tmp_path / "taken"
    target.write_text("x")
    res = CliRunner().invoke(main, ["demo", str(target), "--episodes", "2"])
    assert res.exit_code == 2
    lines = res.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("goalkit: error: ")
    assert "taken" in lines[0] and "expected a directory" in lines[0]
    assert "Traceback" not in res.output


def test_seed_out_of_range_is_one_line_exit_2(tmp_path):
    res = CliRunner().invoke(main, ["demo", str(tmp_path), "--seed", str(2**63)])
    assert res.exit_code == 2
    assert res.output.strip().splitlines() == [
        f"goalkit: error: key seed: expected an integer 0..{2**63 - 1}, got {2**63}"]


def test_bad_episode_count_is_a_usage_error(tmp_path):
    res = CliRunner().invoke(main, ["demo", str(tmp_path), "--episodes", "0"])
    assert res.exit_code == 2
    assert list(tmp_path.iterdir()) == []


def test_help_shows_defaults():
    res = CliRunner().invoke(main, ["demo", "--help"])
    assert res.exit_code == 0
    text = " ".join(res.output.split())  # help is wrapped to the terminal width
    assert "[default: 200; x>=1]" in text and "[default: 0; x>=0]" in text
    for option in ("--episodes", "--seed", "--frames", "--quiet", "--json"):
        assert option in res.output


def test_real_process(tmp_path):
    cmd = [sys.executable, "-m", "goalkit.cli", "demo", str(tmp_path), "--episodes", "3", "--json"]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout)["episodes"] == 3
    assert done.stderr == ""  # piped: no progress bar

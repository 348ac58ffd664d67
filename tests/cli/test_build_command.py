"""`goalkit build` from the command line: recipe errors, overrides, JSON, subprocess run."""

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

from goalkit.cli import main
from goalkit.demo import make_demo


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    d = tmp_path_factory.mktemp("demo")
    make_demo(d, episodes=20, seed=1)
    return d


def run(*args):
    return CliRunner().invoke(main, list(map(str, args)))


def write_recipe(demo, tmp_path, edit):
    text = (demo / "gantry-recipe.toml").read_text()
    text = text.replace('path = "gantry-logs.h5"', f'path = "{demo / "gantry-logs.h5"}"')
    text = text.replace('layout = "gantry-layout.toml"', f'layout = "{demo / "gantry-layout.toml"}"')
    p = tmp_path / "recipe.toml"
    p.write_text(edit(text))
    return p


@pytest.mark.parametrize("edit, expected", [
    (lambda t: t.replace("threshold = 0.04", "threshhold = 0.04"), "did you mean 'threshold'?"),
    (lambda t: t.replace("gamma = 0.9", "gamma = 1.5"), "relabel.gamma"),
    (lambda t: t.replace("future = 2", "futur = 2"), "futur"),
    (lambda t: t.replace("future = 2", "future = -2"), "future"),
    (lambda t: t.replace('distance = "euclidean"', 'distance = "manhatan"'), "manhatan"),
    (lambda t: t.replace('fields = ["head", "trays"]', 'fields = ["nozzle"]'), "goal field 'nozzle'"),
    (lambda t: t.replace('mode = "materialised"', 'mode = "copied"'), "materialised, indexed"),
    (lambda t: t.replace("[split]", "[splits]"), "unknown key 'splits'"),
    (lambda t: t + "\n[reward2]\n", "unknown key 'reward2'"),
    (lambda t: t.replace("threshold = 0.04", 'threshold = [0.1, 0.2]'), "threshold"),
    (lambda t: t.replace('distance = "euclidean"', 'distance = "box"').replace("threshold = 0.04", "threshold = [0.1, 0.2]"),
     "6"),
    (lambda t: t.replace("seed = 1", "seed = -4"), "seed"),
    (lambda t: t.replace("[output]", "[output]\nchunk_rows = 3\n[other]").replace("chunk_rows = 65536", ""),
     "other"),
])
def test_recipe_errors_are_one_line_exit_2(demo, tmp_path, edit, expected):
    recipe = write_recipe(demo, tmp_path, edit)
    res = run("build", recipe, "--quiet")
    assert res.exit_code == 2, res.output
    assert expected in res.output
    assert "Traceback" not in res.output
    assert len(res.output.strip().splitlines()) == 1
    assert not (tmp_path / "gantry-goals.h5").exists()
    assert [p.name for p in tmp_path.iterdir()] == ["recipe.toml"]


def test_missing_logs_and_recipe(demo, tmp_path):
    res = run("build", tmp_path / "nope.toml")
    assert res.exit_code == 2 and "nope.toml: file not found" in res.output
    recipe = write_recipe(demo, tmp_path, lambda t: t.replace(str(demo / "gantry-logs.h5"), str(tmp_path / "gone.h5")))
    res = run("build", recipe)
    assert res.exit_code == 2 and "gone.h5" in res.output and "Traceback" not in res.output


def test_debug_shows_the_traceback(demo, tmp_path):
    recipe = write_recipe(demo, tmp_path, lambda t: t.replace("gamma = 0.9", "gamma = 1.5"))
    res = CliRunner().invoke(main, ["--debug", "build", str(recipe)])
    # --debug adds the traceback and never changes the exit status (2, as without it)
    assert res.exit_code == 2, res.output
    assert "Traceback (most recent call last)" in res.stderr and "RecipeError" in res.stderr
    assert res.stderr.strip().splitlines()[-1].startswith("goalkit: error: ")
    assert res.stdout == ""


def test_json_summary_and_overrides(demo, tmp_path):
    recipe = write_recipe(demo, tmp_path, lambda t: t)
    out = tmp_path / "mine.h5"
    res = run("build", recipe, "--out", out, "--seed", 7, "--json", "--quiet")
    assert res.exit_code == 0, res.output
    summary = json.loads(res.output)
    assert summary["path"] == str(out.resolve())
    assert summary["rows"]["train"] > 0 and set(summary["strategies"]) == {"original", "final", "future", "geometric"}
    import h5py
    with h5py.File(out) as f:
        assert int(f.attrs["seed"]) == 7


def test_real_subprocess_demo_build_verify(tmp_path):
    exe = Path(sys.executable).with_name("goalkit")
    env = {**os.environ, "PYTHONWARNINGS": "ignore"}
    for args in (["demo", tmp_path / "d", "--episodes", "15"], ["build", tmp_path / "d" / "gantry-recipe.toml"],
                 ["verify", tmp_path / "d" / "gantry-goals.h5"]):
        proc = subprocess.run([str(exe), *map(str, args)], capture_output=True, text=True, env=env)
        assert proc.returncode == 0, proc.stderr
        assert proc.stderr == ""  # no progress bar when piped
    assert "consistent" in proc.stdout


def test_readme_and_ci_run_the_same_test_command():
    root = Path(__file__).resolve().parents[2]
    readme = (root / "README.md").read_text()
    ci = (root / ".ci" / "run").read_text()
    blocks = [b.split("```")[0].strip() for b in readme.split("```bash\n")[1:]]
    assert len(blocks) >= 2
    test_command = blocks[1]
    assert "pytest" in test_command
    assert test_command in ci.splitlines()


def test_full_disk_is_one_line_and_leaves_nothing(tmp_path):
    # a file-size limit makes writes fail as a full disk does (EFBIG instead of ENOSPC)
    import resource

    info = make_demo(tmp_path, episodes=60, seed=4)
    exe = Path(sys.executable).with_name("goalkit")

    def limit():
        resource.setrlimit(resource.RLIMIT_FSIZE, (200_000, 200_000))

    proc = subprocess.run([str(exe), "build", str(info["recipe"]), "--quiet"], capture_output=True, text=True,
                          preexec_fn=limit)
    assert proc.returncode == 2, proc.stderr
    assert proc.stderr.strip().endswith("cannot write the dataset (File too large)")
    assert len(proc.stderr.strip().splitlines()) == 1 and "Traceback" not in proc.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["gantry-layout.toml", "gantry-logs.h5",
                                                           "gantry-recipe.toml"]

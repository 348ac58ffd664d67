"""verify: a clean build passes; every kind of tampering is caught and named."""

import json
import shutil

import h5py
import numpy as np
import pytest
from click.testing import CliRunner

from goalkit.cli import main
from goalkit.demo import make_demo
from goalkit.pipeline.build import build
from goalkit.pipeline.recipe import load_recipe
from goalkit.write.verify import verify_set
from tamper_cases import tamper


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    d = tmp_path_factory.mktemp("demo")
    make_demo(d, episodes=30, seed=5)
    recipe = load_recipe(d / "gantry-recipe.toml")
    build(recipe)
    return d, recipe.output.path


@pytest.fixture
def copy(built, tmp_path):
    """A private copy of the demo folder (logs + built set) to tamper with."""
    d, _ = built
    target = tmp_path / "demo"
    shutil.copytree(d, target)
    # the stored provenance points at the original logs; rebuild in the copy instead
    build(load_recipe(target / "gantry-recipe.toml"), replace=True)
    return target, target / "gantry-goals.h5"


def test_clean_build_is_consistent(built):
    report = verify_set(built[1])
    assert report.ok, report.failures
    assert report.checked["rows"]["train"] > 0
    assert report.checked["source_files"] == 1


def test_changed_reward_is_caught(copy):
    _, path = copy
    tamper(path, "train", "reward", lambda r: r.__setitem__(3, 1.0 - r[3]))
    report = verify_set(path)
    assert not report.ok
    assert any("train row 3" in f and "reward" in f for f in report.failures), report.failures


def test_future_goal_before_the_transition_is_caught(copy):
    _, path = copy
    with h5py.File(path) as f:
        s = f["train"]["strategy"][:]
        t = f["train"]["source_step"][:]
    row = int(np.flatnonzero((s == 2) & (t > 0))[0])
    tamper(path, "train", "goal_step", lambda j: j.__setitem__(row, t[row]))
    report = verify_set(path)
    assert not report.ok
    text = "\n".join(report.failures)
    assert f"train row {row}" in text and "future goal" in text


def test_goal_not_phi_of_its_source_step_is_caught(copy):
    _, path = copy
    tamper(path, "validation", "goal", lambda g: g.__setitem__((0, 0), g[0, 0] + 0.5))
    report = verify_set(path)
    assert not report.ok
    assert any("validation row 0" in f and "goal" in f for f in report.failures), report.failures


def test_unsealed_edit_fails_the_manifest(copy):
    _, path = copy
    with h5py.File(path, "r+") as f:
        f["train"]["action"][0, 0] += 1.0
    report = verify_set(path)
    assert any("train/action: checksum" in f for f in report.failures), report.failures


def test_changed_log_file_is_caught(copy):
    d, path = copy
    with h5py.File(d / "gantry-logs.h5", "r+") as f:
        f.attrs["touched"] = 1
    report = verify_set(path)
    assert not report.ok
    assert "changed since the build" in report.failures[0]


def test_cli_exit_status(copy, tmp_path):
    _, path = copy
    runner = CliRunner()
    ok = runner.invoke(main, ["verify", str(path), "--json"])
    assert ok.exit_code == 0, ok.output
    assert json.loads(ok.output)["ok"] is True
    assert runner.invoke(main, ["verify", str(path), "--quiet"]).stdout == ""  # the status is the answer
    text = runner.invoke(main, ["verify", str(path)])
    assert text.exit_code == 0 and text.output.startswith(f"consistent: {path} (")
    assert "column checksums and 1 source file match)" in text.output  # one log file here
    tamper(path, "train", "reached", lambda r: r.__setitem__(0, 1 - r[0]))
    bad = runner.invoke(main, ["verify", str(path)])
    assert bad.exit_code == 1
    assert "NOT consistent" in bad.output and "reached" in bad.output
    other = tmp_path / "other.h5"
    with h5py.File(other, "w") as f:
        f["x"] = np.zeros(3)
    res = runner.invoke(main, ["verify", str(other)])
    assert res.exit_code == 2
    assert "not a goalkit set" in res.output and "Traceback" not in res.output
    junk = tmp_path / "junk.h5"
    junk.write_bytes(b"not hdf5 at all")
    res = runner.invoke(main, ["verify", str(junk)])
    assert res.exit_code == 2 and "not a readable HDF5 file" in res.output


def test_indexed_set_with_an_embedding_goal_map_verifies(tmp_path):
    from goalkit.goals import SFA, fit_on_logs
    from goalkit.logs import load_layout, open_logs
    from goalkit.write.reader import open_set

    make_demo(tmp_path, episodes=25, seed=9)
    source = open_logs(tmp_path / "gantry-logs.h5", load_layout(tmp_path / "gantry-layout.toml"))
    fit_on_logs(source, SFA(n_components=3)).save(tmp_path / "emb.npz")
    text = (tmp_path / "gantry-recipe.toml").read_text()
    text = text.replace('fields = ["head", "trays"]', 'embedding = "emb.npz"').replace("original = 1", "original = 0")
    text = text.replace('mode = "materialised"', 'mode = "indexed"').replace("gantry-goals.h5", "emb-goals.h5")
    (tmp_path / "emb-recipe.toml").write_text(text)
    build(load_recipe(tmp_path / "emb-recipe.toml"))
    report = verify_set(tmp_path / "emb-goals.h5")
    assert report.ok, report.failures
    with open_set(tmp_path / "emb-goals.h5") as gs:
        assert gs.mode == "indexed"
        r = gs.read("train", start=0, stop=50)       # observations resolved from the logs
        assert r["observation"].shape == (50, 9) and r["reached_goal"].shape == (50, 3)
        assert gs.provenance["embedding_files"][0]["path"].endswith("emb.npz")
    # a changed embedding file is caught
    fit_on_logs(source, SFA(n_components=3, degree=2)).save(tmp_path / "emb.npz", replace=True)
    report = verify_set(tmp_path / "emb-goals.h5")
    assert not report.ok and "emb.npz: changed since the build" in report.failures[0]

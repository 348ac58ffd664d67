"""The example scripts run as documented."""

import runpy
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def test_quickstart_example(tmp_path):
    mod = runpy.run_path(str(ROOT / "examples" / "gantry_quickstart.py"))
    out = mod["main"](tmp_path)
    assert out["ok"] is True
    with __import__("goalkit.write.reader", fromlist=["open_set"]).open_set(tmp_path / "gantry-goals.h5") as gs:
        assert out["rows"] == gs.rows("train")
    assert out["fresh"] == 256


def test_assess_example(tmp_path):
    mod = runpy.run_path(str(ROOT / "examples" / "gantry_assess.py"))
    report = mod["main"](tmp_path)
    pol = report["policy"]
    assert pol["checkpoints"] == ["gantry_toy_ck:bc_policy", "gantry_toy_ck:random_policy"]
    assert pol["overall"]["difference"]["high"] < 0  # the behaviour-cloning fit beats the random one
    assert "not a substitute for supervised trials" in report["caution"]
    assert sorted(p.name for p in (tmp_path / "assess-plots").iterdir()) == ["assess-action-error.png",
                                                                             "assess-value.png"]
    assert (tmp_path / "gantry-suite.md").read_text().startswith("# Held-out goal suite")


def test_partial_goals_example_recipe_builds_on_the_demo(tmp_path):
    """examples/gantry_partial_goals.toml next to `goalkit demo`'s files: builds, verifies, and
    its [mask] table is the demo's own per-task table (goalkit.demo.tasks.mask_table_text)."""
    import shutil

    import h5py
    import numpy as np

    import goalkit
    from goalkit.demo import make_demo
    from goalkit.demo.bench import GantryParams
    from goalkit.demo.tasks import mask_table_text

    example = ROOT / "examples" / "gantry_partial_goals.toml"
    text = example.read_text()
    assert mask_table_text(GantryParams(trays=3), random_share=0.2).splitlines()[1:] == [
        line.split("  #")[0].rstrip() for line in text.split("[mask]\n")[1].split("\n[split]")[0].splitlines()
        if line.strip()]
    make_demo(tmp_path, episodes=30, seed=0)
    shutil.copy(example, tmp_path / example.name)
    result = goalkit.build(tmp_path / example.name)
    with h5py.File(result.path, "r") as f:
        mask = f["train/goal_mask"][()]
    assert set(mask.sum(axis=1).tolist()) <= {1, 2, 3, 4, 5, 6} and (mask.sum(axis=1) >= 1).all()
    assert np.any(mask.sum(axis=1) == 3) and np.any(mask.sum(axis=1) == 1)
    assert goalkit.verify(result.path).ok

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

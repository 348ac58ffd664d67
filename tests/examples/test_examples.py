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

"""``goalkit build`` warns when the threshold rewards < 1 % or > 90 % of the rows.

The 1 % / 90 % bounds are goalkit's own rule of thumb (goalkit.pipeline.summary), not a
published value. The fraction is recomputed here from the built file's ``reached`` columns
with h5py, and the warning must appear exactly when that fraction is outside the bounds.
"""

import json

import h5py
import numpy as np
import pytest
from click.testing import CliRunner

from goalkit.cli import main
from goalkit.thresholds.recipe_edit import tuned_recipe_text


def _recipe(gantry, tmp_path, threshold, weights=None):
    text = (gantry / "gantry-recipe.toml").read_text()
    if weights is not None:
        start = text.index("[relabel.weights]")
        end = text.index("[reward]")
        text = text[:start] + "[relabel.weights]\n" + "".join(f"{k} = {v}\n" for k, v in weights.items()) \
            + "\n" + text[end:]
    text = tuned_recipe_text(text, threshold=threshold, source_dir=gantry, target_dir=tmp_path).text
    path = tmp_path / "r.toml"
    path.write_text(text)
    return path


def _reached_fraction(path) -> float:
    with h5py.File(path, "r") as f:
        r = np.concatenate([f[s]["reached"][()] for s in ("train", "validation")])
    return float(r.mean())


@pytest.mark.parametrize("threshold, weights, expect", [
    (1e-9, {"original": 1}, "below 1%"),          # task goals are essentially never hit exactly
    (10.0, None, "above 90%"),                    # larger than the whole bench: everything counts
    (0.04, None, None),                           # the demo's own watering radius
])
def test_build_warns_outside_the_reached_bounds(gantry, tmp_path, threshold, weights, expect):
    recipe = _recipe(gantry, tmp_path, threshold, weights)
    out = tmp_path / "g.h5"
    res = CliRunner().invoke(main, ["build", str(recipe), "--out", str(out), "--quiet"])
    assert res.exit_code == 0, res.output
    frac = _reached_fraction(out)
    # --quiet: no report on stdout, but warnings still reach stderr (docs/cli.md)
    assert res.stdout == ""
    warned = [line for line in res.stderr.splitlines() if line.startswith("goalkit: warning: ")]
    assert (frac < 0.01 or frac > 0.90) == (expect is not None)
    if expect is None:
        assert warned == []
    else:
        assert len(warned) == 1 and expect in warned[0] and "goalkit tune" in warned[0]
        assert f"{frac:.2%}" in warned[0]
    res = CliRunner().invoke(main, ["build", str(recipe), "--out", str(tmp_path / "g2.h5"), "--quiet", "--json"])
    summary = json.loads(res.stdout)
    assert summary["reached_fraction"] == pytest.approx(frac, rel=1e-12)
    assert len(summary["warnings"]) == (0 if expect is None else 1)

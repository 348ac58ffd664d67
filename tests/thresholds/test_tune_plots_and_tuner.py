"""Plots (fixed names, PNG files, same bytes on a rerun, no half-written file) and the tuner."""

import json

import numpy as np
import pytest

from goalkit.cli_support import _default
from goalkit.errors import GoalkitError, TuningError
from goalkit.goals.goalmap import IndexGoalMap
from goalkit.logs.episodes import EpisodeSet
from goalkit.reward import RewardRule
from goalkit.thresholds.diagnostics import diagnose, rewarded_fraction
from goalkit.thresholds.labels import LabelledPairs
from goalkit.thresholds.metrics import choose_threshold, sweep_thresholds
from goalkit.thresholds.plots import FILE_NAMES, plot_diagnostics, plot_labelled, save_png
from goalkit.thresholds.tuner import ThresholdTuner

PNG = b"\x89PNG\r\n\x1a\n"


def _pairs(seed=0, n_eps=40, box=False):
    # Invented irrigation-gantry pairs: nozzle head (x, y, z) against a watering target.
    r = np.random.default_rng(seed)
    sizes = r.integers(5, 15, n_eps)
    m = int(sizes.sum())
    goal = r.uniform(0, 1, size=(m, 3))
    y = r.random(m) < 0.4
    scale = np.where(y, 0.02, 0.12)[:, None] * (np.array([1.0, 1.0, 0.5]) if box else 1.0)
    achieved = goal + r.normal(size=(m, 3)) * scale
    return LabelledPairs(achieved, goal, y, np.repeat(np.arange(n_eps), sizes), True, "pairs.npz")


def test_labelled_plots_are_deterministic_pngs(tmp_path):
    p = _pairs()
    d = RewardRule("euclidean", 0.05).distance(p.achieved, p.goal)
    s = sweep_thresholds(d, p.reached)
    ch = choose_threshold(s)
    w1 = plot_labelled(s, ch, tmp_path, prefix="run-", current=s.at(0.05))
    assert sorted(x.name for x in w1.values()) == sorted("run-" + FILE_NAMES[k] for k in ("roc", "pr", "f1"))
    first = {k: v.read_bytes() for k, v in w1.items()}
    assert all(b.startswith(PNG) and len(b) > 5000 for b in first.values())
    with pytest.raises(GoalkitError, match="give --replace to replace it"):   # existing plots are kept
        plot_labelled(s, ch, tmp_path, prefix="run-", current=s.at(0.05))
    w2 = plot_labelled(s, ch, tmp_path, prefix="run-", current=s.at(0.05), replace=True)
    assert {k: v.read_bytes() for k, v in w2.items()} == first
    assert sorted(x.name for x in tmp_path.iterdir()) == sorted(x.name for x in w1.values())


def test_diagnostic_plots(tmp_path):
    r = np.random.default_rng(1)
    obs = np.cumsum(r.normal(0, 0.02, size=(6 * 11, 3)), axis=0)
    ep = EpisodeSet(observations=obs, actions=np.zeros((60, 1)), offsets=np.arange(7) * 10,
                    episode_ids=np.arange(6))
    rule = RewardRule("euclidean", 0.05)
    diag = diagnose(ep, IndexGoalMap((0, 1, 2)), rule, horizons=[1, 2, 4], sample=50)
    rf = rewarded_fraction(obs[:30], obs[30:60], np.repeat([0, 2], 15), rule, np.linspace(0, 0.5, 11))
    w = plot_diagnostics(diag, tmp_path, rewarded=rf, strategy_names={0: "original", 2: "future"})
    assert sorted(w) == ["horizon", "other", "rewarded", "step"]
    assert all(v.read_bytes().startswith(PNG) for v in w.values())


def test_failed_write_leaves_the_old_file_and_no_temporary(tmp_path):
    target = tmp_path / "threshold-roc.png"
    target.write_bytes(PNG + b"old")

    class Broken:
        def savefig(self, f, **kw):  # writes part of a file, then fails
            f.write(b"partial")
            raise OSError(28, "No space left on device")

    with pytest.raises(GoalkitError, match="No space left on device"):
        save_png(Broken(), target, replace=True)
    assert target.read_bytes() == PNG + b"old"
    assert [x.name for x in tmp_path.iterdir()] == ["threshold-roc.png"]
    target.write_bytes(b"not a picture")     # a file that is not a PNG is never replaced
    with pytest.raises(GoalkitError, match="not a plot written by goalkit"):
        save_png(Broken(), target, replace=True)
    assert target.read_bytes() == b"not a picture"


def test_tuner_on_separable_pairs_and_json_summary():
    p = _pairs()
    rule = RewardRule("euclidean", 0.05, form="sparse-negative")
    t = ThresholdTuner(rule, n_resamples=200, seed=3).fit(p)
    d = rule.distance(p.achieved, p.goal)
    assert t.choice_.threshold == choose_threshold(sweep_thresholds(d, p.reached)).threshold
    assert t.suggested_rule_.threshold == t.choice_.threshold
    assert t.suggested_rule_.form == "sparse-negative"        # only the threshold changes
    assert t.interval_.low <= t.choice_.threshold <= t.interval_.high
    assert t.interval_.n_groups == 40
    cur = t.current_
    assert cur["tp"] == int(np.sum((d <= 0.05) & p.reached))
    s = json.loads(json.dumps(t.summary(), default=_default))
    assert s["suggested_threshold"] == t.choice_.threshold and s["pairs"]["episodes"] == 40
    again = ThresholdTuner(rule, n_resamples=200, seed=3).fit(p)
    assert again.interval_.distribution.tobytes() == t.interval_.distribution.tobytes()


def test_tuner_box_rule_scales_the_tolerances():
    p = _pairs(box=True)
    rule = RewardRule("box", (0.05, 0.05, 0.025))
    t = ThresholdTuner(rule, n_resamples=0).fit(p)
    tol = np.array(rule.threshold) * t.choice_.threshold
    np.testing.assert_allclose(t.recipe_threshold(), tol, rtol=1e-15)
    assert t.interval_ is None and t.box_ is not None and len(t.box_.tolerances) == 3
    # the scaled box gives the chosen counts on the pairs
    inside = np.all(np.abs(p.achieved - p.goal) <= tol, axis=1)
    assert int(np.sum(inside & p.reached)) == t.choice_.tp


def test_tuner_refuses_one_label_only():
    p = _pairs()
    one = LabelledPairs(p.achieved, p.goal, np.ones_like(p.reached), p.groups, True, "pairs.npz")
    with pytest.raises(TuningError, match="pairs.npz: key reached: tuning needs pairs labelled both"):
        ThresholdTuner(RewardRule("euclidean", 0.05)).fit(one)

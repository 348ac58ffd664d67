"""``goalkit tune`` on the invented gantry demo, checked against scikit-learn, h5py and a build.

External references: scikit-learn's ``roc_auc_score``, ``average_precision_score``,
``precision_recall_curve``, ``f1_score``, ``precision_score`` and ``recall_score`` (the
metrics' definitions); the demo logs are read straight with h5py in ``conftest.py``, and the
rewarded fractions are compared with what ``goalkit build`` writes into its HDF5 file.
"""

import json
import shutil

import h5py
import numpy as np
import pytest
from click.testing import CliRunner
from sklearn.metrics import (average_precision_score, f1_score, precision_recall_curve,
                             precision_score, recall_score, roc_auc_score)

from goalkit.cli import main
from goalkit.pipeline.recipe import load_recipe
from goalkit.relabel import CODES
from goalkit.thresholds.plots import FILE_NAMES
from goalkit.thresholds.sample import sample_episodes


def run(*args):
    return CliRunner().invoke(main, ["tune", *map(str, args)])


def run_json(*args) -> dict:
    res = run(*args, "--json", "--quiet")
    assert res.exit_code == 0, res.output
    return json.loads(res.stdout)


def stored(x):
    """Goal vectors as the recipe stores them (dtype float32), back in float64."""
    return np.asarray(x, dtype=np.float64).astype(np.float32).astype(np.float64)


def best_f1(y, d):
    """Largest F1 of the rule d <= thr over all thresholds, from scikit-learn's PR curve."""
    p, r, _ = precision_recall_curve(y, -d)
    with np.errstate(invalid="ignore"):
        return float(np.nanmax(2 * p * r / (p + r)))


# ---- labels from the logs' success flags ----------------------------------------------------
def test_from_success_agrees_with_scikit_learn(gantry, raw_logs):
    out = run_json(gantry / "gantry-recipe.toml", "--from-success", "--distance", "euclidean,l1",
                   "--resamples", "50")
    y = raw_logs["success"]
    a, g = stored(raw_logs["achieved"]), stored(raw_logs["task_goal"])
    dist = {"euclidean": np.sqrt(np.sum((a - g) ** 2, axis=1)), "l1": np.sum(np.abs(a - g), axis=1)}
    assert out["mode"] == "success-flags" and out["labels_used"] is True
    assert [c["distance"] for c in out["candidates"]] == ["euclidean", "l1"]
    for c in out["candidates"]:
        d = dist[c["distance"]]
        assert c["pairs"]["pairs"] == y.size and c["pairs"]["reached"] == int(y.sum())
        assert c["pairs"]["episodes"] == 60
        assert c["roc_auc"] == pytest.approx(roc_auc_score(y, -d), rel=1e-12)
        assert c["average_precision"] == pytest.approx(average_precision_score(y, -d), rel=1e-12)
        pred = d <= c["choice"]["threshold"]
        assert c["choice"]["f1"] == pytest.approx(f1_score(y, pred), rel=1e-12)
        assert c["choice"]["precision"] == pytest.approx(precision_score(y, pred), rel=1e-12)
        assert c["choice"]["f1"] == pytest.approx(best_f1(y, d), rel=1e-12)  # max-f1 is the max
        iv = c["interval"]
        assert iv["n_resamples"] == 50 and iv["n_groups"] == 60 and iv["low"] <= iv["high"]
    cur = out["candidates"][0]["current"]            # the recipe's 0.04 (euclidean)
    pred = dist["euclidean"] <= 0.04
    assert cur["recall"] == pytest.approx(recall_score(y, pred), rel=1e-12)
    assert cur["precision"] == pytest.approx(precision_score(y, pred), rel=1e-12)
    assert out["candidates"][1]["current"] is None   # 0.04 means nothing on the l1 scale
    f1s = {c["distance"]: c["choice"]["f1"] for c in out["candidates"]}
    winner = "euclidean" if f1s["euclidean"] >= f1s["l1"] else "l1"
    assert out["chosen"]["distance"] == winner and out["chosen"]["score"] == f1s[winner]


def _offset_pairs(raw_logs, rule, radius, seed=0):
    """Labelled pairs whose label is exactly ``rule(offset) <= radius`` (perfectly separable)."""
    r = np.random.default_rng(seed)
    achieved = raw_logs["achieved"]
    m = achieved.shape[0]
    direction = r.normal(size=achieved.shape)
    direction /= np.linalg.norm(direction, axis=1, keepdims=True)
    offset = direction * r.uniform(0.0, 3 * radius, size=(m, 1))
    size = np.linalg.norm(offset, axis=1) if rule == "euclidean" else np.abs(offset).sum(axis=1)
    return achieved, achieved + offset, size <= radius, raw_logs["episode"], size


def test_labels_file_perfect_separation_closed_form(gantry, raw_logs, tmp_path):
    # Perfectly separable labels: AUC = AP = F1 = 1 (definitions), and max-f1 with midpoint
    # placement puts the threshold halfway between the largest reached distance and the
    # smallest not-reached one.
    a, g, y, ep, size = _offset_pairs(raw_logs, "euclidean", 0.03)
    np.savez(tmp_path / "pairs.npz", achieved=a, goal=g, reached=y, episode=ep)
    out = run_json(gantry / "gantry-recipe.toml", "--labels", tmp_path / "pairs.npz", "--resamples", "20")
    c = out["candidates"][0]
    d = np.sqrt(np.sum((a - g) ** 2, axis=1))
    hi_pos, lo_neg = d[y].max(), d[~y].min()
    assert c["roc_auc"] == 1.0 and c["average_precision"] == 1.0 and c["choice"]["f1"] == 1.0
    assert c["choice"]["threshold"] == pytest.approx((hi_pos + lo_neg) / 2, rel=1e-12)
    assert hi_pos <= 0.03 <= lo_neg
    assert out["mode"] == "labels-file" and out["labels_source"].endswith("pairs.npz")
    # the same pairs as .csv give the same answer
    cols = [f"achieved_{i}" for i in range(6)] + [f"goal_{i}" for i in range(6)] + ["reached", "episode"]
    table = np.column_stack([a, g, y.astype(int), ep])
    np.savetxt(tmp_path / "pairs.csv", table, delimiter=",", header=",".join(cols), comments="",
               fmt=["%.17g"] * 12 + ["%d", "%d"])
    out2 = run_json(gantry / "gantry-recipe.toml", "--labels", tmp_path / "pairs.csv", "--resamples", "20")
    assert out2["candidates"][0]["choice"]["threshold"] == c["choice"]["threshold"]


def test_other_distance_wins_and_tuned_recipe_round_trips(gantry, raw_logs, tmp_path):
    a, g, y, ep, _ = _offset_pairs(raw_logs, "l1", 0.05, seed=1)
    np.savez(tmp_path / "pairs.npz", achieved=a, goal=g, reached=y, episode=ep)
    target = tmp_path / "elsewhere" / "tuned.toml"
    target.parent.mkdir()
    recipe = gantry / "gantry-recipe.toml"
    out = run_json(recipe, "--labels", tmp_path / "pairs.npz", "--distance", "euclidean",
                   "--distance", "l1", "--resamples", "0", "--write-recipe", target)
    f1 = {c["distance"]: c["choice"]["f1"] for c in out["candidates"]}
    assert f1["l1"] == 1.0 and f1["euclidean"] < 1.0
    assert out["chosen"]["distance"] == "l1" and out["chosen"]["distance_changed"] is True
    assert out["written_recipe"]["kept_comments"] is True
    old, new = load_recipe(recipe), load_recipe(target)
    assert new.reward.distance_name == "l1"
    assert new.reward.threshold == out["chosen"]["threshold"]           # exactly, no rounding
    assert new.reward.replace(distance="euclidean", threshold=0.04) == old.reward
    assert (new.logs_path, new.layout_path, new.output.path) == (old.logs_path, old.layout_path,
                                                                 old.output.path)
    assert new.mixture.describe() == old.mixture.describe() and new.seed == old.seed
    assert new.goal == old.goal and new.validation == old.validation
    for line in old.text.splitlines():       # every comment survives
        if "#" in line:
            assert line.split("#", 1)[1] in new.text
    # building the tuned recipe rewards the share of rows tune predicted (whole log sampled)
    res = CliRunner().invoke(main, ["build", str(target), "--out", str(tmp_path / "tuned.h5"),
                                    "--json", "--quiet"])
    assert res.exit_code == 0, res.output
    built = json.loads(res.stdout)
    assert built["reached_fraction"] == pytest.approx(
        out["rewarded_fraction"]["all"]["fraction"]["suggested"], rel=1e-12)


# ---- without labels -------------------------------------------------------------------------
def test_no_labels_diagnostics_match_the_build_and_the_raw_logs(gantry, raw_logs, tmp_path):
    recipe = gantry / "gantry-recipe.toml"
    out = run_json(recipe)
    assert out["labels_used"] is False and out["chosen"] is None and out["candidates"] == []
    res = CliRunner().invoke(main, ["build", str(recipe), "--out", str(tmp_path / "g.h5"), "--quiet"])
    assert res.exit_code == 0, res.output
    rows, reached = np.zeros(16), np.zeros(16)
    with h5py.File(tmp_path / "g.h5", "r") as f:
        for split in ("train", "validation"):
            s, r = f[split]["strategy"][()], f[split]["reached"][()]
            rows += np.bincount(s, minlength=16)
            reached += np.bincount(s, weights=r, minlength=16)
    rf = out["rewarded_fraction"]
    assert rf["thresholds"]["recipe"] == 0.04
    for name, entry in rf["strategies"].items():
        code = CODES[name]
        assert entry["rows"] == rows[code]
        assert entry["fraction"]["recipe"] == pytest.approx(reached[code] / rows[code], rel=1e-12)
    # one-step goal change, straight from the raw logs
    step = np.linalg.norm(raw_logs["achieved"] - raw_logs["current"], axis=1)
    med = out["diagnostics"]["step_displacement"]["quantiles"]["0.5"]
    assert med == pytest.approx(np.median(step), rel=1e-12)
    assert out["suggested_range"]["low"] == pytest.approx(0.5 * np.median(step), rel=1e-12)
    text = run(recipe)
    assert text.exit_code == 0 and "NO LABELS USED" in text.stdout and "suggested:" not in text.stdout
    quiet = run(recipe, "--quiet")
    assert quiet.exit_code == 0 and quiet.stdout == ""


def test_json_has_one_object_with_the_documented_keys(gantry):
    out = run_json(gantry / "gantry-recipe.toml", "--from-success", "--resamples", "10")
    assert set(out) == {"recipe", "mode", "labels_used", "labels_source", "sample", "current_rule", "masks",
                        "candidates", "chosen", "box_suggestion", "diagnostics", "suggested_range",
                        "rewarded_fraction", "warnings", "notes", "plots", "written_recipe"}
    assert set(out["chosen"]) >= {"distance", "threshold", "interval", "precision", "recall", "f1",
                                  "roc_auc", "average_precision"}
    assert len(out["box_suggestion"]["tolerances"]) == 6


def test_plots_are_valid_pngs(gantry, tmp_path):
    from matplotlib.image import imread

    out = run_json(gantry / "gantry-recipe.toml", "--from-success", "--resamples", "10",
                   "--plots", tmp_path / "plots")
    names = sorted(p.name for p in (tmp_path / "plots").iterdir())
    assert names == sorted(FILE_NAMES.values())
    assert sorted(out["plots"]) == sorted(str(tmp_path / "plots" / n) for n in names)
    for n in names:
        img = imread(tmp_path / "plots" / n)               # decodes the whole PNG
        assert img.shape == (400, 500, 4) and img[..., :3].std() > 0.01
    out2 = run_json(gantry / "gantry-recipe.toml", "--from-success", "--resamples", "0",
                    "--distance", "euclidean,chebyshev", "--plots", tmp_path / "two")
    assert {p.rsplit("/", 1)[1] for p in out2["plots"]} >= {"euclidean-threshold-roc.png",
                                                           "chebyshev-threshold-roc.png"}


def test_max_transitions_samples_whole_episodes_deterministically(gantry, raw_logs):
    args = (gantry / "gantry-recipe.toml", "--from-success", "--resamples", "10",
            "--max-transitions", "600")
    out = run_json(*args)
    lengths = np.bincount(raw_logs["episode"])
    seed = load_recipe(gantry / "gantry-recipe.toml").seed
    pos = sample_episodes(np.arange(60), lengths, 600, seed=seed)
    s = out["sample"]
    assert s["episodes"] == pos.size < 60 and s["transitions"] == lengths[pos].sum() <= 600
    assert out["candidates"][0]["pairs"]["pairs"] == s["transitions"]
    assert s["whole_log"] is False and any("sample" in n for n in out["notes"])
    assert run(*args, "--json", "--quiet").stdout == run(*args, "--json", "--quiet").stdout


# ---- bad input: one line, exit 2, no traceback, nothing written -----------------------------
def _bad_npz(path):
    np.savez(path, achieved=np.zeros((5, 6)), goal=np.zeros((5, 6)), reached=np.ones(4))
    return path


def _wrong_dim(path):
    np.savez(path, achieved=np.zeros((5, 2)), goal=np.zeros((5, 2)), reached=np.array([1, 0, 1, 0, 1]))
    return path


@pytest.mark.parametrize("make_args, expected", [
    (lambda t, r: [r, "--labels", t / "missing.npz"], "missing.npz: file not found"),
    (lambda t, r: [r, "--labels", _bad_npz(t / "bad.npz")], "key reached: expected shape (5,)"),
    (lambda t, r: [r, "--labels", _wrong_dim(t / "dim.npz")], "expected pairs of goal dimension 6"),
    (lambda t, r: [r, "--from-success", "--distance", "euclidian"], "did you mean 'euclidean'"),
    (lambda t, r: [r, "--from-success", "--chooser", "best"], "unknown chooser 'best'"),
    (lambda t, r: [r, "--from-success", "--chooser", "target-precision"], "needs a target precision"),
    (lambda t, r: [r, "--from-success", "--labels", t / "x.npz"], "not both"),
    (lambda t, r: [r, "--write-recipe", t / "out.toml"], "needs labels"),
    (lambda t, r: [t / "nope.toml"], "nope.toml"),
])
def test_bad_input_is_one_line_exit_2(gantry, tmp_path, make_args, expected):
    res = run(*make_args(tmp_path, gantry / "gantry-recipe.toml"))
    assert res.exit_code == 2, res.output
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("goalkit: error: ") and expected in lines[0]
    assert "Traceback" not in res.output and not (tmp_path / "out.toml").exists()


def test_from_success_without_success_flags_in_the_layout(gantry, tmp_path):
    for name in ("gantry-logs.h5", "gantry-recipe.toml"):
        shutil.copy(gantry / name, tmp_path / name)
    layout = (gantry / "gantry-layout.toml").read_text()
    (tmp_path / "gantry-layout.toml").write_text(
        "\n".join(line for line in layout.splitlines() if not line.startswith("success")))
    res = run(tmp_path / "gantry-recipe.toml", "--from-success", "--write-recipe", tmp_path / "out.toml")
    assert res.exit_code == 2
    assert res.stderr.count("\n") == 1 and "key success: the logs carry no success flags" in res.stderr
    assert not (tmp_path / "out.toml").exists()


# ---- the other choosers, against scikit-learn's curves ---------------------------------------
def test_youden_and_target_precision_choosers(gantry, raw_logs):
    from sklearn.metrics import roc_curve

    y = raw_logs["success"]
    a, g = stored(raw_logs["achieved"]), stored(raw_logs["task_goal"])
    d = np.sqrt(np.sum((a - g) ** 2, axis=1))
    out = run_json(gantry / "gantry-recipe.toml", "--from-success", "--chooser", "youden",
                   "--resamples", "0")
    fpr, tpr, _ = roc_curve(y, -d)
    ch = out["chosen"]
    assert ch["criterion"] == "youden" and ch["interval"] is None
    assert ch["recall"] - ch["fpr"] == pytest.approx(np.max(tpr - fpr), rel=1e-12)   # Youden (1950)
    # target-precision: the largest threshold whose precision meets the target
    target = 0.5
    out = run_json(gantry / "gantry-recipe.toml", "--from-success", "--chooser", "target-precision",
                   "--target-precision", str(target), "--resamples", "0")
    thr = out["chosen"]["threshold"]
    assert precision_score(y, d <= thr) >= target
    larger = np.unique(d[d > thr])
    prec = np.array([precision_score(y, d <= t) for t in larger[:400]])  # the next 400 candidates
    assert np.all(prec < target)
    p, r, t = precision_recall_curve(y, -d)                       # all candidates at once
    ok = -t[p[:-1] >= target]
    assert thr >= ok.max() and out["chosen"]["recall"] == pytest.approx(recall_score(y, d <= thr))


def test_text_report_and_a_real_subprocess_run(gantry, tmp_path):
    import subprocess
    import sys

    a, g = np.zeros((4, 6)), np.zeros((4, 6))
    a[2:, 0] = 0.5
    np.savez(tmp_path / "p.npz", achieved=a, goal=g, reached=np.array([1, 1, 0, 0]),
             episode=np.array([0, 1, 2, 3]))
    res = run(gantry / "gantry-recipe.toml", "--labels", tmp_path / "p.npz", "--resamples", "10",
              "--write-recipe", tmp_path / "t.toml")
    assert res.exit_code == 0, res.output
    assert "labelled pairs from" in res.stdout and "euclidean *" in res.stdout
    assert "suggested:  [reward] distance = \"euclidean\", threshold = 0.25" in res.stdout
    assert "wrote:      " in res.stdout and load_recipe(tmp_path / "t.toml").reward.threshold == 0.25
    help_ = subprocess.run([sys.executable, "-m", "goalkit.cli", "tune", "--help"], capture_output=True,
                           text=True, check=True).stdout
    for default in ("[default: max-f1]", "[default: 1000]", "[default:", "200000]"):
        assert default in help_
    done = subprocess.run([sys.executable, "-m", "goalkit.cli", "tune", str(gantry / "gantry-recipe.toml"),
                           "--json"], capture_output=True, text=True)
    assert done.returncode == 0 and done.stderr == ""            # no bar when piped
    assert json.loads(done.stdout)["labels_used"] is False

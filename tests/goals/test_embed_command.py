"""``goalkit embed`` on the demo's HDF5 logs: CliRunner runs, one real subprocess, errors."""

import json
import subprocess
import sys

import numpy as np
import pytest
from click.testing import CliRunner

from goalkit.cli import main
from goalkit.goals import EmbeddingGoalMap, embedding_goal_map
from goalkit.logs import open_logs


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    from goalkit.demo.files import write_demo

    d = tmp_path_factory.mktemp("demo")
    rep = write_demo(d, episodes=12, seed=3, frames=True)
    return d, rep.logs, rep.layout


def _run(args):
    return CliRunner().invoke(main, ["embed", *map(str, args)])


def test_pca_json_summary_matches_the_saved_embedding(demo, tmp_path):
    _, logs, layout = demo
    out = tmp_path / "pca.npz"
    r = _run([logs, "--layout", layout, "--method", "pca", "--dims", "3", "--fields", "head,trays",
              "-o", out, "--json"])
    assert r.exit_code == 0, r.output
    s = json.loads(r.output)
    gm = EmbeddingGoalMap.load(out)
    src = open_logs(logs, layout)
    assert s["method"] == "pca" and s["dims"] == 3 and s["fields"] == ["head", "trays"]
    assert s["explained_variance_ratio"] == gm.embedding.explained_variance_ratio_.tolist()
    assert s["episodes"] == 12 and s["states"] == int(src.lengths.sum() + 12)
    assert s["fingerprint"] == gm.describe()["fingerprint"]
    # the saved map reproduces a PCA of the same columns read directly
    es = src.read(0, len(src.lengths))
    idx = list(gm.indices)
    from sklearn.decomposition import PCA as SkPCA
    ref = SkPCA(3, svd_solver="full").fit(es.observations[:, idx])
    np.testing.assert_allclose(gm.embedding.explained_variance_, ref.explained_variance_, rtol=1e-8)
    assert embedding_goal_map(out, src).indices == gm.indices


def test_sfa_on_frames_and_quadratic_sfa(demo, tmp_path):
    _, logs, layout = demo
    r = _run([logs, "--layout", layout, "--method", "sfa", "--dims", "2", "--input", "frame", "--block", "4",
              "-o", tmp_path / "f.npz", "--json"])
    assert r.exit_code == 0, r.output
    s = json.loads(r.output)
    assert s["input"] == "frame" and s["method"] == "sfa" and len(s["delta"]) == 2
    assert s["frames"]["pixels"] == 64 and s["delta"] == sorted(s["delta"])
    r = _run([logs, "--layout", layout, "--method", "sfa", "--degree", "2", "--dims", "2", "--fields", "head",
              "-o", tmp_path / "q.npz"])
    assert r.exit_code == 0 and "slowness (delta, slowest first)" in r.output


def test_precomputed_values(demo, tmp_path):
    _, logs, layout = demo
    src = open_logs(logs, layout)
    values = np.random.default_rng(0).normal(size=(int(src.lengths.sum() + len(src.lengths)), 4))
    np.save(tmp_path / "v.npy", values)
    r = _run([logs, "--layout", layout, "--method", "precomputed", "--values", tmp_path / "v.npy",
              "-o", tmp_path / "p.npz", "--quiet"])
    assert r.exit_code == 0 and r.output == ""
    gm = embedding_goal_map(tmp_path / "p.npz", src)
    es = src.read(2, 4)
    np.testing.assert_array_equal(gm(es, np.array([0])), values[[int(src.lengths[:2].sum() + 2)]])


@pytest.mark.parametrize("args, message", [
    (["--method", "raw", "--dims", "2"], "--dims applies to pca and sfa"),
    (["--method", "sfa", "--whiten"], "--whiten applies to pca"),
    (["--method", "pca", "--degree", "2"], "--degree applies to sfa"),
    (["--method", "precomputed"], "needs --values"),
    (["--method", "pca", "--fields", "nozzle"], "goal field 'nozzle'"),
    (["--method", "pca", "--input", "frame", "--fields", "head"], "does not apply to --input frame"),
    (["--method", "pca", "--dims", "40"], "n_components an integer in 1.."),
])
def test_bad_options_are_one_line_errors_and_write_nothing(demo, tmp_path, args, message):
    _, logs, layout = demo
    out = tmp_path / "e.npz"
    r = _run([logs, "--layout", layout, *args, "-o", out])
    assert r.exit_code == 2
    assert r.output.count("\n") == 1 and message in r.output and "Traceback" not in r.output
    assert not out.exists() and list(tmp_path.iterdir()) == []


def test_frames_missing_from_logs(tmp_path):
    from goalkit.demo.files import write_demo

    rep = write_demo(tmp_path / "nof", episodes=3, seed=1, frames=False)
    r = _run([rep.logs, "--layout", rep.layout, "--method", "pca", "--input", "frame", "-o", tmp_path / "x.npz"])
    assert r.exit_code == 2 and "no frame key" in r.output and not (tmp_path / "x.npz").exists()


def test_real_subprocess_run_and_help(demo, tmp_path):
    _, logs, layout = demo
    out = tmp_path / "s.npz"
    p = subprocess.run([sys.executable, "-m", "goalkit.cli", "embed", str(logs), "--layout", str(layout),
                        "--method", "standardised", "-o", str(out), "--json"], capture_output=True, text=True)
    assert p.returncode == 0, p.stderr
    assert json.loads(p.stdout)["method"] == "standardised" and out.exists()
    h = _run(["--help"])
    flat = " ".join(h.output.split())
    assert "[default: observation]" in flat and "[default: 2; x>=1]" in flat and "[default: 200000; x>=1]" in flat
    p = subprocess.run([sys.executable, "-m", "goalkit.cli", "embed", str(logs), "--layout", str(layout),
                        "--method", "pca", "--dims", "99", "-o", str(out) + "2"], capture_output=True, text=True)
    assert p.returncode == 2 and p.stderr.startswith("goalkit: error:") and p.stderr.count("\n") == 1

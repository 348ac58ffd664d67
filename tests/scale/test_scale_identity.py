"""Sharded builds (local worker processes, Dask) against the single-process build: same bytes.

The reference is the single-process build of the same recipe; files are compared by SHA-256
(FIPS 180-4) of their whole bytes, the same identity the chunk-size test of tests/pipeline uses.
"""

import json

import h5py
import pytest
from click.testing import CliRunner

from goalkit.cli import main
from goalkit.pipeline import workers as workers_mod
from goalkit.pipeline.build import build
from goalkit.pipeline.buildfolder import folder_of
from goalkit.pipeline.recipe import load_recipe

from conftest import sha256


def _attrs(path):
    with h5py.File(path, "r") as f:
        return {k: f.attrs[k] for k in ("summary", "provenance", "manifest", "recipe")}


def test_two_local_workers_match_one_process(gantry, reference, tmp_path, monkeypatch):
    ref, ref_digest = reference
    # spill even this small goal table, so the workers read it memory-mapped from the build folder
    monkeypatch.setattr(workers_mod, "SPILL_BYTES", 0)
    out = tmp_path / "scale-goals.h5"
    seen = []
    recipe = load_recipe(gantry / "scale-recipe.toml").with_overrides(out=out)
    result = build(recipe, workers=2, max_rows_per_chunk=4000, progress=lambda n, total: seen.append((n, total)))
    assert sha256(out) == ref_digest
    assert _attrs(out) == _attrs(ref)
    assert result.shards["total"] == result.shards["computed"] > 2 and result.shards["reused"] == 0
    # progress covers every transition exactly once, in shard-sized steps
    total = json.loads(_attrs(ref)["provenance"])["transitions"]
    assert sum(n for n, _ in seen) == total and {t for _, t in seen} == {total}
    assert len(seen) == result.shards["total"]
    assert not folder_of(out).exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["scale-goals.h5", "scale-goals.h5.card-goals.png",
                                                          "scale-goals.h5.card.md"]  # the set and its card


def test_dask_local_cluster_matches_one_process(gantry, reference, tmp_path):
    distributed = pytest.importorskip("distributed")
    ref, ref_digest = reference
    out = tmp_path / "scale-goals.h5"
    recipe = load_recipe(gantry / "scale-recipe.toml").with_overrides(out=out)
    with distributed.LocalCluster(processes=False, n_workers=1, threads_per_worker=2,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        result = build(recipe, client=client, max_rows_per_chunk=3000)
        assert result.shards["computed"] == result.shards["total"] > 3
        assert sha256(out) == ref_digest
        assert _attrs(out) == _attrs(ref)
        # the CLI's --scheduler option against the same (in-process) scheduler
        out2 = tmp_path / "cli.h5"
        res = CliRunner().invoke(main, ["build", str(gantry / "scale-recipe.toml"), "--out", str(out2),
                                        "--scheduler", cluster.scheduler_address, "--chunk-rows", "5000",
                                        "--json", "--quiet"])
        assert res.exit_code == 0, res.output
        report = json.loads(res.output)
        assert report["shards"]["runner"].startswith("Dask scheduler")
        assert sha256(out2) == ref_digest


def test_workers_and_scheduler_together_are_refused(gantry, tmp_path):
    res = CliRunner().invoke(main, ["build", str(gantry / "scale-recipe.toml"), "--out", str(tmp_path / "x.h5"),
                                    "--workers", "2", "--scheduler", "tcp://127.0.0.1:1"])
    assert res.exit_code == 2
    assert "give --workers or --scheduler, not both" in res.output
    assert not (tmp_path / "x.h5").exists()


def test_neighbour_goals_on_workers_match_one_process(gantry, tmp_path):
    # neighbour goals need the plan's faiss index: it travels once per worker with the payload
    text = (gantry / "scale-recipe.toml").read_text().replace("other_episode = 1", "neighbour = 2\nnear_miss = 1")
    recipe_file = gantry / "neighbour-recipe.toml"
    recipe_file.write_text(text, encoding="utf-8")
    one, two = tmp_path / "one.h5", tmp_path / "two.h5"
    recipe = load_recipe(recipe_file)
    single = build(recipe.with_overrides(out=one))
    sharded = build(recipe.with_overrides(out=two), workers=2, max_rows_per_chunk=6000)
    assert sha256(one) == sha256(two)
    assert single.summary == sharded.summary
    assert single.summary["strategies"]["neighbour"]["rows"] > 0
    assert "neighbour_index" in sharded.summary


def test_skipped_episodes_stay_skipped_on_workers(gantry, tmp_path):
    # the opened log's skip decisions travel with the payload: workers read the same kept episodes
    import shutil

    import numpy as np

    for name in ("gantry-logs.h5", "gantry-layout.toml"):
        shutil.copy(gantry / name, tmp_path / name)
    with h5py.File(tmp_path / "gantry-logs.h5", "r+") as f:
        f["bench/ep_00007/head"][3, 1] = np.nan
        f["bench/ep_00200/trays"][0, 0] = np.inf
    text = (gantry / "scale-recipe.toml").read_text().replace('layout = "gantry-layout.toml"',
                                                              'layout = "gantry-layout.toml"\nskip_bad_episodes = true')
    (tmp_path / "r.toml").write_text(text, encoding="utf-8")
    recipe = load_recipe(tmp_path / "r.toml")
    one, two = tmp_path / "one.h5", tmp_path / "two.h5"
    single = build(recipe.with_overrides(out=one))
    build(recipe.with_overrides(out=two), workers=2, max_rows_per_chunk=8000)
    assert sha256(one) == sha256(two)
    assert single.summary["skipped_episodes"] == 2
    with h5py.File(two, "r") as f:
        ids = np.union1d(f["train/source_episode"][()], f["validation/source_episode"][()])
    assert 7 not in ids and 200 not in ids and len(ids) == 238


def test_scheduler_option_from_another_process(gantry, reference, tmp_path):
    # `goalkit build --scheduler` in its own process has no default Dask client; waiting for
    # the shards must use the runner's own client (this once failed with "No clients found")
    import subprocess
    import sys

    distributed = pytest.importorskip("distributed")
    _, ref_digest = reference
    out = tmp_path / "sub.h5"
    with distributed.LocalCluster(processes=False, protocol="tcp", n_workers=1, threads_per_worker=2,
                                  dashboard_address=None) as cluster:
        res = subprocess.run([sys.executable, "-m", "goalkit.cli", "build", str(gantry / "scale-recipe.toml"),
                              "--out", str(out), "--scheduler", cluster.scheduler_address, "--chunk-rows", "5000",
                              "--quiet"], capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr
    assert sha256(out) == ref_digest

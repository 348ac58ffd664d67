"""Builds with the neighbour, library and near_miss strategies: bytes, verify, tampering, reports, errors.

Checks against outside references: library matches against ``scipy.spatial.distance.cdist``
(SciPy 1.0, Virtanen et al. 2020) on the goal vectors read back with h5py; recall@k is
measured by goalkit against exact search and only its presence and range are asserted here.
Logs are the invented irrigation-gantry demo.
"""

import hashlib
import shutil

import h5py
import numpy as np
import pytest
from scipy.spatial.distance import cdist

from goalkit.demo import make_demo
from goalkit.errors import RecipeError
from goalkit.pipeline.build import build
from goalkit.pipeline.plan import goal_table, make_plan
from goalkit.pipeline.recipe import load_recipe, parse_recipe
from goalkit.write.reader import open_set
from goalkit.write.verify import verify_set
from tamper_cases import tamper

RELABEL = '''[relabel]
goals_per_transition = 4
neighbours = 4
library = "targets.npy"
{extra}
[relabel.weights]
future = 1
neighbour = 2
library = 1
near_miss = 1
'''


def digest(path):
    return hashlib.sha256(open(path, "rb").read()).hexdigest()


def write_recipe(d, extra="", name="joined-recipe.toml", out="joined-goals.h5", goal=None):
    text = (d / "gantry-recipe.toml").read_text()
    head, rest = text.split("[relabel]", 1)
    rest = rest[rest.index("[reward]"):]
    text = head + RELABEL.format(extra=extra) + "\n" + rest
    text = text.replace("gantry-goals.h5", out)
    if goal is not None:
        text = text.replace('fields = ["head", "trays"]', goal)
    (d / name).write_text(text)
    return d / name


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    d = tmp_path_factory.mktemp("joined")
    make_demo(d, episodes=40, seed=3)
    plan, source = make_plan(load_recipe(d / "gantry-recipe.toml"))
    table = goal_table(source, plan.goal_map, np.dtype("float32"), 10_000)
    np.save(d / "targets.npy", np.concatenate([table[[4, 90, 300, 800]], np.full((1, table.shape[1]), 7.0)]))
    recipe = load_recipe(write_recipe(d))
    result = build(recipe)
    return d, recipe, result


def test_byte_identical_for_two_chunk_sizes_and_verify_passes(demo):
    d, recipe, result = demo
    first = digest(result.path)
    build(recipe, max_rows_per_chunk=1000, replace=True)   # rebuild over the first set
    assert digest(result.path) == first
    report = verify_set(result.path)
    assert report.ok, report.failures
    with open_set(result.path) as gs:
        s = gs.read("train", ["strategy"])["strategy"]
        assert {6, 7, 8} <= set(np.unique(s).tolist())


def test_summary_and_provenance_report_recall_and_library(demo):
    d, recipe, result = demo
    with open_set(result.path) as gs:
        summary, prov = gs.summary, gs.provenance
    for split in ("train", "validation"):
        r = summary["neighbour_index"][split]
        assert r["method"] == "exact" and r["recall"] == 1.0 and r["k"] == 4
        assert prov["neighbour_index"][split]["index"]["method"] == "exact"
    lib = summary["library"]
    assert lib["targets"] == 5 and lib["unreached"] == [4] and len(lib["match_counts"]) == 5
    assert prov["library"]["files"][0]["path"].endswith("targets.npy")
    assert any("library targets are reached by no logged state: 4" in w for w in summary["warnings"])


def test_library_matches_against_cdist(demo):
    d, recipe, result = demo
    plan, source = make_plan(recipe)
    lib = plan.context.library
    ref = cdist(plan.goal_table.astype(np.float64), lib.targets) <= recipe.reward.threshold
    assert np.array_equal(lib.counts, ref.sum(axis=0))
    assert lib.counts[4] == 0 and np.all(lib.counts[:4] >= 1)


def test_near_miss_goals_lie_beyond_the_threshold_of_their_join_state(demo):
    d, recipe, result = demo
    with open_set(result.path) as gs:
        r = gs.read("train", ["strategy", "source_episode", "join_step", "goal", "hop_episode", "source_step"])
    plan, _ = make_plan(recipe)
    nm = (r["strategy"] == 8) & (r["hop_episode"] >= 0)
    assert nm.sum() > 50
    at = plan.goal_table[plan.global_state_rows(r["source_episode"][nm], r["join_step"][nm])].astype(np.float64)
    d_nm = np.linalg.norm(at - r["goal"][nm].astype(np.float64), axis=1)
    assert np.all(d_nm > recipe.reward.threshold)
    assert np.all(r["join_step"][nm] > r["source_step"][nm])


@pytest.mark.parametrize("code,column,expect", [
    (6, "hop_episode", "neighbour goal must be a state s_m of the hop episode"),
    (7, "join_step", "library goal must be external, joined at a later step"),
    (8, "hop_step", "near-miss goal must be the hop state"),
    (7, "goal", "library goal must be one of the library's targets"),
    (8, "goal", "near-miss goal must lie beyond the threshold of the join state"),
])
def test_tampering_is_caught_per_strategy(demo, tmp_path, code, column, expect):
    d, recipe, result = demo
    copy = tmp_path / "set.h5"
    shutil.copy(result.path, copy)
    with h5py.File(copy) as f:
        s = f["train"]["strategy"][:]
        src, t, join = f["train"]["source_episode"][:], f["train"]["source_step"][:], f["train"]["join_step"][:]
        hop = f["train"]["hop_episode"][:]
    pick = (s == code) & (join >= 0) & ((hop >= 0) if code != 7 else True)
    row = int(np.flatnonzero(pick)[0])
    if column == "hop_episode":      # neighbour joined through its own episode
        tamper(copy, "train", column, lambda a: a.__setitem__(row, src[row]))
    elif column == "join_step":      # library match at the transition itself
        tamper(copy, "train", column, lambda a: a.__setitem__(row, t[row]))
    elif column == "goal" and code == 7:   # a library goal that is no target
        tamper(copy, "train", column, lambda g: g.__setitem__((row, 0), g[row, 0] + 0.25))
    elif column == "goal":           # a near-miss goal moved onto its join state
        plan, _ = make_plan(recipe)
        at = plan.goal_table[plan.global_state_rows(src[row:row + 1], join[row:row + 1])][0]
        tamper(copy, "train", column, lambda g: g.__setitem__(row, at))
    else:                            # near-miss hop step no longer the goal's step
        tamper(copy, "train", column, lambda a: a.__setitem__(row, a[row] + 1))
    report = verify_set(copy)
    assert not report.ok
    text = "\n".join(report.failures)
    assert f"train row {row}" in text and expect in text, text


def test_ivf_index_recall_is_reported(demo, tmp_path):
    d, recipe, result = demo
    path = write_recipe(d, extra='index = "ivf"\nrecall = 0.9', name="ivf-recipe.toml", out="ivf-goals.h5")
    res = build(load_recipe(path))
    for split in ("train",):
        r = res.summary["neighbour_index"][split]
        assert r["method"] == "ivf" and 0.0 < r["recall"] <= 1.0 and r["recall_queries"] > 0
        # either the target is met (lower bound) or the summary says it is not
        assert r["recall_lower"] >= 0.9 or any("neighbour index" in w for w in res.summary["warnings"])
    assert verify_set(res.path).ok


def test_embedding_goal_map_and_frame_library(tmp_path):
    from goalkit.goals import PCA, fit_on_logs
    from goalkit.logs import load_layout, open_logs

    make_demo(tmp_path, episodes=24, seed=4, frames=True)
    source = open_logs(tmp_path / "gantry-logs.h5", load_layout(tmp_path / "gantry-layout.toml"))
    phi = fit_on_logs(source, PCA(n_components=3), input="frame", block=4)
    phi.save(tmp_path / "cam.npz")
    chunk = source.read(0, 2)
    np.save(tmp_path / "targets.npy", chunk.frames[[3, 20]])    # camera frames as library targets
    path = write_recipe(tmp_path, goal='embedding = "cam.npz"', out="cam-goals.h5")
    text = path.read_text().replace("original = 1", "original = 0")
    path.write_text(text)
    recipe = load_recipe(path)
    res = build(recipe)
    assert verify_set(res.path).ok
    plan, _ = make_plan(recipe)
    want = phi(chunk, np.array([3, 20])).astype(np.float32).astype(np.float64)
    np.testing.assert_array_equal(plan.context.library.targets, want)
    assert np.all(plan.context.library.counts >= 1)   # each frame's own state matches it


def test_recipe_errors_name_file_and_key(demo, tmp_path):
    d, recipe, _ = demo
    base = (d / "joined-recipe.toml").read_text()

    def err(text, **kw):
        with pytest.raises(RecipeError) as info:
            r = parse_recipe(text, file="r.toml", base=d)
            make_plan(r)
        return info.value

    e = err(base.replace('library = "targets.npy"', 'library = "nowhere.npy"'))
    assert e.key == "relabel.library" and "nowhere.npy" in e.message and e.file == "r.toml"
    np.save(tmp_path / "wide.npy", np.zeros((3, 99)))
    e = err(base.replace('library = "targets.npy"', f'library = "{tmp_path / "wide.npy"}"'))
    assert e.key == "relabel.library" and e.file.endswith("wide.npy") and "width" in e.message
    e = err(base.replace("neighbours = 4", "neighbors = 4"))
    assert "did you mean 'neighbours'" in e.message
    e = err(base.replace("neighbours = 4", 'neighbours = 4\nindex = "flat"'))
    assert e.key == "relabel.index"
    e = err(base.replace("neighbours = 4", "neighbours = 4\nrecall = 1.5"))
    assert e.key == "relabel.recall"
    e = err(base.replace("neighbours = 4", "neighbours = 0"))
    assert e.key == "relabel.neighbours"


def test_worker_processes_give_the_same_bytes(demo, tmp_path):
    # the goal search and the library ride to the workers inside the plan (faiss index serialised)
    d, recipe, result = demo
    single = digest(result.path)
    out = build(recipe, workers=2, max_rows_per_chunk=3000, replace=True)  # over the single-process set
    assert out.shards["computed"] >= 2
    assert digest(out.path) == single


def test_changed_library_file_is_caught(demo, tmp_path):
    d, _, _ = demo
    target = tmp_path / "copy"
    shutil.copytree(d, target, ignore=shutil.ignore_patterns("*.h5.shards"))
    res = build(load_recipe(target / "joined-recipe.toml"), replace=True)  # over the copied set
    assert verify_set(res.path).ok
    targets = np.load(target / "targets.npy")
    np.save(target / "targets.npy", targets[::-1])
    report = verify_set(res.path)
    assert not report.ok and "targets.npy: changed since the build" in report.failures[0]

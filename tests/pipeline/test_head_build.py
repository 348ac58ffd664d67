"""Goal heads in a built set ([output] goals = "heads"): one row per transition, one column group
per head, checked against published figures, byte-identical across chunk sizes, workers and Dask,
re-derived by verify and audited independently.

Published figures (each source beside its check):
- HIQL value goals: the current state with probability 0.2, a geometric later state of the same
  trajectory with 0.5, a random dataset state with 0.3; subgoals at k = 25 steps (Park et al.,
  2023, HIQL, NeurIPS; the value-goal shares and k from the paper's hyperparameter table, from
  memory).
- Return to goal of reward -1 per step over d = 10 steps at gamma = 0.99: -(1 - 0.99**10) / 0.01
  = -9.5618 (closed form of the geometric series).
- WGCSL discounted relabelling weight gamma**(j - t) at offset 10, gamma = 0.98: 0.817 (Yang et
  al., 2022, WGCSL, ICLR).
"""

import hashlib
from pathlib import Path

import h5py
import numpy as np
import pytest
from click.testing import CliRunner
from scipy import stats

import goalkit
from goalkit.audit import audit_set
from goalkit.cli import main
from goalkit.demo import make_demo
from goalkit.demo.bench import GantryParams
from goalkit.demo.tasks import mask_table_text
from goalkit.errors import RecipeError
from goalkit.pipeline.recipe import load_recipe
from goalkit.reward import score
from goalkit.rows import HEAD_FIELDS, HEAD_MASK_FIELD, head_column
from goalkit.write.card import card_paths

HEADS = """
[heads.value]
weights = {current = 0.2, geometric = 0.5, random = 0.3}
gamma = 0.99

[heads.policy]
weights = {geometric = 1}
gamma = 0.99
past_end = "renormalise"

[heads.subgoal]
weights = {subgoal = 1}
steps = 25

[heads.mixed]
weights = {future = 1, final = 1, episode = 1}
gamma = 0.98
"""
NAMES = ("value", "policy", "subgoal", "mixed")


def _sha(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def heads_recipe(folder: Path, name: str = "heads", heads: str = HEADS, output_extra: str = 'goals = "heads"',
                 relabel_gpt: str = "goals_per_transition = 1") -> Path:
    text = (folder / "gantry-recipe.toml").read_text()
    text = text.replace("goals_per_transition = 5", relabel_gpt)
    text = text.replace('path = "gantry-goals.h5"', f'path = "{name}.h5"')
    text = text.replace("chunk_rows = 65536", "chunk_rows = 4096\n" + output_extra)
    path = folder / f"{name}.toml"
    path.write_text(text + heads)
    return path


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    d = tmp_path_factory.mktemp("headsdemo")
    make_demo(d, episodes=60, seed=5)
    recipe = heads_recipe(d)
    result = goalkit.build(recipe)
    with h5py.File(result.path, "r") as f:
        cols = {k: f["train"][k][()] for k in f["train"]}
    return d, recipe, result.path, cols


def test_one_row_per_transition_and_a_column_group_per_head(demo):
    d, recipe, path, c = demo
    with h5py.File(path, "r") as f:
        rows = sum(int(f[s].attrs["rows"]) for s in ("train", "validation"))
    plan_rows = int(goalkit.open_logs(d / "gantry-logs.h5").lengths.sum())
    assert rows == plan_rows   # rows = transitions in head mode
    assert (c["slot"] == 0).all()
    ep, t = c["source_episode"], c["source_step"]
    assert np.all((ep[1:] > ep[:-1]) | ((ep[1:] == ep[:-1]) & (t[1:] == t[:-1] + 1)))
    for name in NAMES:
        for field in HEAD_FIELDS.values():
            col = c[head_column(field.name, name)]
            assert len(col) == len(ep)
            if field.dtype != "goal":
                assert col.dtype == np.dtype(field.dtype), (name, field.name)
        assert c[head_column("goal", name)].shape == c["goal"].shape


def test_hiql_value_shares(demo):
    # value goals: current 0.2, geometric 0.5, random 0.3 (Park et al., 2023, HIQL, NeurIPS)
    *_, c = demo
    src = c["source@value"]
    n = len(src)
    for code, p in ((0, 0.2), (2, 0.5), (3, 0.3)):
        k = int(np.count_nonzero(src == code))
        assert stats.binomtest(k, n, p).pvalue > 1e-3, (code, k, n)
    assert np.isin(src, (0, 2, 3)).all()
    cur = src == 0
    assert np.array_equal(c["goal_step@value"][cur], c["source_step"][cur])
    assert (c["steps_to_goal@value"][cur] == 0).all() and (c["discount_weight@value"][cur] == 1).all()


def test_subgoal_k25_and_the_head_rules(demo):
    d, _, _, c = demo
    source = goalkit.open_logs(d / "gantry-logs.h5")
    T = dict(zip(source.episode_ids.tolist(), source.lengths.tolist()))
    ep, t = c["source_episode"], c["source_step"]
    TT = np.array([T[e] for e in ep.tolist()])
    # subgoals at k = 25 steps, min(t + k, T) (Park et al., 2023, HIQL, NeurIPS)
    assert np.array_equal(c["goal_step@subgoal"], np.minimum(t + 25, TT))
    assert (c["goal_step@subgoal"] == t + 25).any() and (c["goal_step@subgoal"] == TT).any()
    # renormalised geometric: always a later state, never past T
    j = c["goal_step@policy"]
    assert ((j > t) & (j <= TT)).all() and (c["goal_episode@policy"] == ep).all()
    src, jm = c["source@mixed"], c["goal_step@mixed"]
    assert np.array_equal(jm[src == 5], TT[src == 5])
    fut = src == 1
    assert ((jm[fut] > t[fut]) & (jm[fut] <= TT[fut])).all()


def test_geometric_clip_mean_and_final_share_on_built_columns(demo):
    # clipped at L remaining steps: E[min(K, L)] = (1 - gamma**L) / (1 - gamma), P(K >= L) = gamma**(L-1)
    # (closed forms of the geometric law on {1, 2, ...}); compared through a z-score per row
    d, _, _, c = demo
    source = goalkit.open_logs(d / "gantry-logs.h5")
    T = dict(zip(source.episode_ids.tolist(), source.lengths.tolist()))
    geo = c["source@value"] == 2
    t = c["source_step"][geo]
    L = np.array([T[e] for e in c["source_episode"][geo].tolist()]) - t
    k = c["goal_step@value"][geo] - t
    g = 0.99
    mean = (1 - g ** L) / (1 - g)
    # E[min(K, L)**2] = sum over n = 1 .. L of (2n - 1) P(min(K, L) >= n), P(min(K, L) >= n) = gamma**(n-1)
    var = np.array([sum((2 * n - 1) * g ** (n - 1) for n in range(1, int(l) + 1)) for l in L]) - mean ** 2
    z = (k.sum() - mean.sum()) / np.sqrt(var.sum())
    assert abs(z) < 4.5
    share_final = np.mean(k == L)
    expect = np.mean(g ** (L - 1))
    assert abs(share_final - expect) < 4.5 * np.sqrt(expect * (1 - expect) / len(L))


def test_published_labels_on_the_built_columns(demo):
    *_, c = demo
    # return to goal at d = 10, gamma = 0.99: -9.5618 (closed form)
    d = c["steps_to_goal@value"]
    at = d == 10
    assert at.any()
    assert np.all(np.round(c["return_to_goal@value"][at].astype(np.float64), 4) == -9.5618)
    # WGCSL weight at offset 10 with gamma = 0.98: 0.817 (Yang et al., 2022, ICLR)
    dm = c["steps_to_goal@mixed"]
    assert (dm == 10).any()
    assert np.all(np.round(c["discount_weight@mixed"][dm == 10].astype(np.float64), 3) == 0.817)
    # random states of other episodes: no path, weight 0, return -1 / (1 - gamma)
    other = c["goal_episode@value"] != c["source_episode"]
    assert other.any() and (d[other] == -1).all() and (c["discount_weight@value"][other] == 0).all()
    assert np.allclose(c["return_to_goal@value"][other], -100.0)


def test_rewards_recompute_from_the_stored_head_goals(demo):
    d, recipe, _, c = demo
    rule = load_recipe(recipe).reward
    for name in NAMES:
        s = score(rule, c["reached_goal"], c[f"goal@{name}"])
        assert np.array_equal(s.reward, c[f"reward@{name}"])
        assert np.array_equal(s.reached.astype(np.uint8), c[f"reached@{name}"])


def test_bytes_across_chunk_sizes_workers_and_dask(demo, tmp_path):
    d, recipe, path, _ = demo
    first = _sha(path)
    r = load_recipe(recipe)
    assert _sha(goalkit.build(r, out=tmp_path / "a.h5", max_rows_per_chunk=613, card=False).path) == first
    assert _sha(goalkit.build(r, out=tmp_path / "w.h5", runner=goalkit.LocalWorkers(2),
                              max_rows_per_chunk=1500, card=False).path) == first
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(processes=False, protocol="tcp", n_workers=1, threads_per_worker=2,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        out = goalkit.build(r, out=tmp_path / "dask.h5", runner=goalkit.DaskCluster(client), card=False)
    assert _sha(out.path) == first


def test_verify_and_audit_pass_and_catch_an_edited_head_column(demo, tmp_path):
    _, _, path, c = demo
    report = goalkit.verify(path)
    assert report.ok, report.failures
    audit = report.checked["audit"]
    names = [ch["name"] for ch in audit["checks"]]
    assert "head value: share of random" in names and "law of head policy: geometric offset" in names
    for col, value, words in (("goal_step@subgoal", None, "head subgoal: subgoal"),
                              ("return_to_goal@mixed", -1.5, "head mixed: return_to_goal")):
        bad = tmp_path / f"{col.replace('@', '_')}.h5"
        bad.write_bytes(Path(path).read_bytes())
        with h5py.File(bad, "r+") as f:
            ds = f["train"][col]
            v = ds[:50]
            ds[:50] = v - 1 if value is None else value
        a = audit_set(bad)
        assert not a.ok and any(words in line for line in a.failures), a.failures
        assert not goalkit.verify(bad).ok


def test_reader_batches_and_adapters_return_head_columns(demo):
    _, _, path, c = demo
    with goalkit.open_set(path) as gs:
        assert "goal@value" in gs.columns("train")
        block = gs.read("train", ["goal@value", "reward@subgoal"], start=0, stop=10)
        assert np.array_equal(block["goal@value"], c["goal@value"][:10])
        batch = next(iter(gs.batches("train", 64, ["source_step", "goal@policy", "steps_to_goal@policy"],
                                     shuffle=True, seed=1)))
        assert batch["goal@policy"].shape == (64, c["goal"].shape[1])
    it = goalkit.NumpyBatches(path, "train", 32, ["goal@value", "reward@value", "bootstrap_mask@value"], seed=0)
    b = next(iter(it))
    assert b["goal@value"].dtype == np.float32 and b["reward@value"].dtype == np.float32
    assert b["bootstrap_mask@value"].dtype == np.uint8
    # a head column takes its field's cast unless named itself
    it = goalkit.NumpyBatches(path, "train", 32, ["goal", "goal@value", "goal@policy"], seed=0,
                              dtypes={"goal": "float64", "goal@policy": "float32"})
    b = next(iter(it))
    assert b["goal@value"].dtype == np.float64 and b["goal@policy"].dtype == np.float32


def test_summary_info_and_card_list_the_heads(demo):
    _, _, path, _ = demo
    with goalkit.open_set(path) as gs:
        heads = gs.summary["heads"]
    assert [h["name"] for h in heads] == list(NAMES)   # in the recipe's order: a head's slot
    value = heads[0]
    assert set(value["sources"]) == {"current", "geometric", "random"}
    assert sum(s["rows"] for s in value["sources"].values()) == sum(
        goalkit.open_set(path).rows(s) for s in ("train", "validation"))
    res = CliRunner().invoke(main, ["info", str(path)])
    assert res.exit_code == 0 and "heads" in res.output and "subgoal" in res.output, res.output
    card = card_paths(path)[0].read_text()
    assert "| value | random |" in card and "| subgoal | subgoal |" in card


@pytest.mark.parametrize("heads, extra, gpt, key", [
    (HEADS.replace("subgoal = 1}", "subgoal = 1, negative = 1}"), 'goals = "heads"', "goals_per_transition = 1",
     "heads.subgoal.weights.negative"),
    (HEADS, 'goals = "heads"', "goals_per_transition = 3", "relabel.goals_per_transition"),
    ("", 'goals = "heads"', "goals_per_transition = 1", "output.goals"),
    (HEADS, 'goals = "head"', "goals_per_transition = 1", "output.goals"),
])
def test_bad_head_builds_one_line_naming_file_and_key(demo, tmp_path, heads, extra, gpt, key):
    d = demo[0]
    recipe = heads_recipe(d, "bad", heads=heads, output_extra=extra, relabel_gpt=gpt)
    with pytest.raises(RecipeError) as exc:
        load_recipe(recipe)
    assert key in str(exc.value)
    res = CliRunner().invoke(main, ["build", str(recipe)])
    assert res.exit_code == 2, res.output
    lines = [line for line in res.output.splitlines() if line.strip()]
    assert len(lines) == 1 and str(recipe) in lines[0] and key in lines[0] and "Traceback" not in res.output


def test_slots_layout_ignores_heads_and_is_unchanged(demo, tmp_path):
    d = demo[0]
    plain = goalkit.build(d / "gantry-recipe.toml", out=tmp_path / "plain.h5", card=False)
    recipe = heads_recipe(d, "slots", output_extra="", relabel_gpt="goals_per_transition = 5")
    text = recipe.read_text().replace("chunk_rows = 4096", "chunk_rows = 65536")
    recipe.write_text(text)
    with_heads = goalkit.build(recipe, out=tmp_path / "slots.h5", card=False)
    with h5py.File(plain.path, "r") as a, h5py.File(with_heads.path, "r") as b:
        assert set(a["train"]) == set(b["train"])
        assert a.attrs["manifest"] == b.attrs["manifest"]


DOC = Path(__file__).resolve().parents[2] / "docs" / "dataset.md"


def test_docs_head_column_table_is_the_schema():
    lines = DOC.read_text(encoding="utf-8").splitlines()
    start = lines.index("| head column | dtype | shape | meaning |") + 2
    documented = {}
    for line in lines[start:]:
        if not line.startswith("|"):
            break
        name, dtype, shape, meaning = (c.strip() for c in line.strip().strip("|").split(" | "))
        documented[name] = (dtype, shape, meaning)
    schema = {f"`{f.name}@NAME`": (f.dtype_text, f.shape_text, f.meaning)
              for f in list(HEAD_FIELDS.values()) + [HEAD_MASK_FIELD]}
    assert documented == schema


def test_random_goals_never_cross_the_split(demo):
    _, _, path, _ = demo
    with h5py.File(path, "r") as f:
        for split, other in (("train", "validation"), ("validation", "train")):
            rnd = f[split]["source@value"][()] == 3
            goals = f[split]["goal_episode@value"][()][rnd]
            assert rnd.any()
            assert np.isin(goals, f[split]["source_episode"][()]).all()
            assert not np.isin(goals, f[other]["source_episode"][()]).any()


def test_heads_with_goal_masks(tmp_path):
    make_demo(tmp_path, episodes=24, seed=8, trays=3)
    recipe = heads_recipe(tmp_path, heads=mask_table_text(GantryParams(trays=3), random_share=0.5) + HEADS)
    path = goalkit.build(recipe, card=False).path
    with h5py.File(path, "r") as f:
        g = f["train"]
        masks = {n: g[f"goal_mask@{n}"][()] for n in NAMES}
        own = g["goal_mask"][()]
        rule = load_recipe(recipe).reward
        s = score(rule, g["reached_goal"][()], g["goal@value"][()], masks["value"])
        assert np.array_equal(s.reward, g["reward@value"][()])
    # each head draws its own random masks (goal slot 65536 + h)
    assert not np.array_equal(masks["value"], masks["policy"]) and not np.array_equal(masks["value"], own)
    assert _sha(goalkit.build(recipe, out=tmp_path / "b.h5", max_rows_per_chunk=301, card=False).path) == _sha(path)
    report = goalkit.verify(path)
    assert report.ok, report.failures

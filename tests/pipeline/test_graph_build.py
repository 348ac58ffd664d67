"""Builds with a [graph] table: the graph_steps column, the neighbour guard, bytes, verify, errors.

Outside reference: graph distances of sampled rows are recomputed with
scipy.sparse.csgraph.shortest_path (unweighted: breadth-first search; scipy documentation) on a
graph built here by brute force (logged transitions + every cross-episode pair within the join
radius, scipy.spatial.distance.cdist). Logs are the invented irrigation-gantry demo.
"""

import hashlib

import h5py
import numpy as np
import pytest
from click.testing import CliRunner
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import shortest_path
from scipy.spatial.distance import cdist

from goalkit.audit.run import audit_set
from goalkit.cli import main
from goalkit.demo import make_demo
from goalkit.pipeline.build import build
from goalkit.pipeline.plan import make_plan
from goalkit.pipeline.recipe import load_recipe
from goalkit.write.graphplot import plot_graph_distance, read_graph_columns
from goalkit.write.verify import verify_set

RADIUS = 0.15
HORIZON = 60
GRAPH = f'''
[graph]
join_radius = {RADIUS}
join_neighbours = 400
horizon = {HORIZON}
goal_share = 1.0
guard_neighbours = true
index = "exact"
'''
WEIGHTS = '''[relabel.weights]
future = 1
neighbour = 2
'''


def digest(path):
    return hashlib.sha256(open(path, "rb").read()).hexdigest()


def write_recipe(d, graph=GRAPH, out="graph-goals.h5", name="graph-recipe.toml"):
    text = (d / "gantry-recipe.toml").read_text()
    head, rest = text.split("[relabel.weights]", 1)
    rest = rest[rest.index("[reward]"):]
    text = head + WEIGHTS + "\n" + rest + graph
    text = text.replace("gantry-goals.h5", out)
    (d / name).write_text(text)
    return d / name


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    d = tmp_path_factory.mktemp("graph")
    make_demo(d, episodes=24, seed=3)
    recipe = load_recipe(write_recipe(d))
    return d, recipe, build(recipe, max_rows_per_chunk=5000)


def read(path, split="train"):
    with h5py.File(path, "r") as f:
        return {k: f[split][k][()] for k in ("source_episode", "source_step", "strategy", "goal_episode",
                                             "goal_step", "hop_episode", "join_step", "steps_to_goal",
                                             "graph_steps")}


def test_graph_steps_against_scipy_bfs_on_a_brute_force_graph(demo):
    d, recipe, result = demo
    plan, _ = make_plan(recipe)
    x = plan.goal_table.astype(np.float64)
    off = plan.transition_offsets
    ep = np.repeat(np.arange(len(off) - 1), np.diff(off) + 1)
    tails = np.arange(off[-1]) + np.repeat(np.arange(len(off) - 1), np.diff(off))
    near = (cdist(x, x) <= RADIUS) & (ep[:, None] != ep[None, :])
    u, v = np.nonzero(near)
    rows = np.concatenate([tails, u])
    cols = np.concatenate([tails + 1, v])
    n = len(x)
    g = coo_matrix((np.ones(len(rows)), (rows, cols)), shape=(n, n)).tocsr()
    c = read(result.path)
    sample = np.random.default_rng(0).choice(len(c["strategy"]), 300, replace=False)
    pos = np.searchsorted(plan.episode_ids, c["source_episode"][sample])
    src = off[pos] + pos + c["source_step"][sample] + 1
    gpos = np.searchsorted(plan.episode_ids, c["goal_episode"][sample])
    tgt = off[gpos] + gpos + c["goal_step"][sample]
    ref = shortest_path(g, method="D", unweighted=True, indices=np.unique(src))
    dref = ref[np.searchsorted(np.unique(src), src), tgt]
    expect = np.where(dref <= HORIZON, dref, -2).astype(np.int64)
    np.testing.assert_array_equal(c["graph_steps"][sample], expect)


def test_every_neighbour_goal_is_connected_and_drops_are_counted(demo):
    d, recipe, result = demo
    c = read(result.path)
    nb = c["strategy"] == 6
    kept = nb & (c["hop_episode"] >= 0)
    dropped = nb & (c["hop_episode"] < 0)
    assert kept.sum() > 100
    assert ((c["graph_steps"][kept] >= 0) & (c["graph_steps"][kept] <= HORIZON)).all()
    # a dropped goal falls back to its join state s_j: a future goal, steps j - t
    assert (c["goal_episode"][dropped] == c["source_episode"][dropped]).all()
    assert (c["steps_to_goal"][dropped] == c["join_step"][dropped] - c["source_step"][dropped]).all()
    summary = result.summary["graph"]
    assert summary["neighbour_dropped"]["train"] == int(dropped.sum())
    assert summary["neighbour_kept"]["train"] == int(kept.sum())
    # same-episode goals: the logs' own path bounds the graph distance
    fut = c["strategy"] == 2
    gs = c["graph_steps"][fut]
    ok = gs >= 0
    assert (gs[ok] <= c["steps_to_goal"][fut][ok] - 1).all()   # from s_t+1: one step fewer
    assert (gs[~ok] == -2).all() and (c["steps_to_goal"][fut][~ok] - 1 > HORIZON).all()
    both = {k: np.concatenate([c[k], read(result.path, "validation")[k]]) for k in c}
    fut, gs = both["strategy"] == 2, both["graph_steps"]
    share = float(np.mean(gs[fut & (gs >= 0)] == both["steps_to_goal"][fut & (gs >= 0)] - 1))
    assert summary["strategies"]["future"]["agree_with_steps_to_goal"] == pytest.approx(share, abs=1e-12)
    assert 0.2 < share < 1.0  # joins give shortcuts for some rows, not for all


def test_bytes_across_chunk_sizes_and_workers_and_verify(demo, tmp_path):
    d, recipe, result = demo
    first = digest(result.path)
    assert digest(build(recipe.with_overrides(out=tmp_path / "b.h5"), max_rows_per_chunk=700).path) == first
    assert digest(build(recipe.with_overrides(out=tmp_path / "w.h5"), workers=2,
                        max_rows_per_chunk=3000).path) == first
    report = verify_set(result.path)
    assert report.ok, report.failures


def test_dask_gives_the_same_bytes(demo, tmp_path):
    distributed = pytest.importorskip("distributed")
    d, recipe, result = demo
    with distributed.LocalCluster(processes=False, protocol="tcp", n_workers=1, threads_per_worker=2,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        out = build(recipe.with_overrides(out=tmp_path / "dask.h5"), client=client)
    assert digest(out.path) == digest(result.path)


def test_tampered_graph_steps_fail_verify(demo, tmp_path):
    d, recipe, result = demo
    copy = tmp_path / "t.h5"
    copy.write_bytes(result.path.read_bytes())
    with h5py.File(copy, "r+") as f:
        col = f["train"]["graph_steps"]
        v = col[:40]
        col[:40] = np.where(v > 0, 0, v)   # shortcuts the logs do not show
        assert (v > 0).sum() >= 5
    report = verify_set(copy)
    assert not report.ok
    assert any("graph_steps" in m for m in report.failures)
    # the independent audit alone (its own graph and forward search) catches it too
    audit = audit_set(copy)
    assert not audit.ok
    assert any("contradicted by the audit's own search" in m for m in audit.failures), audit.failures


def test_the_audit_passes_the_built_set(demo):
    d, recipe, result = demo
    audit = audit_set(result.path)
    assert audit.ok, audit.failures


def test_without_a_graph_table_no_column(demo):
    d, recipe, result = demo
    plain = load_recipe(write_recipe(d, graph="", out="plain.h5", name="plain.toml"))
    out = build(plain)
    with h5py.File(out.path, "r") as f:
        assert "graph_steps" not in f["train"]


@pytest.mark.parametrize("value", ["-0.1", "nan", "inf"])
def test_bad_join_radius_one_line_exit_2(demo, value):
    d, recipe, result = demo
    path = write_recipe(d, graph=GRAPH.replace(f"join_radius = {RADIUS}", f"join_radius = {value}"),
                        name="bad-graph.toml")
    r = CliRunner().invoke(main, ["build", str(path)])
    assert r.exit_code == 2
    lines = [ln for ln in r.output.splitlines() if ln.strip()]
    assert len(lines) == 1, r.output
    assert "bad-graph.toml" in lines[0] and "graph.join_radius" in lines[0] and "Traceback" not in r.output


def test_graph_distance_png(demo, tmp_path):
    d, recipe, result = demo
    out = plot_graph_distance(result.path, tmp_path / "graph.png")
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948, 5.2)
    cols = read_graph_columns(result.path)
    assert set(np.unique(cols["strategy"]).tolist()) == {2, 6}
    with pytest.raises(Exception):
        plot_graph_distance(result.path, tmp_path / "graph.png")   # never over an existing file


def test_the_card_of_a_graph_set_links_its_graph_plot(demo):
    # a set built with [graph] gets NAME.card-graph.png beside it, linked from its card
    d, recipe, result = demo
    png = result.path.with_name(f"{result.path.name}.card-graph.png")
    card = result.path.with_name(f"{result.path.name}.card.md")
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"   # PNG signature (ISO/IEC 15948, 5.2)
    text = card.read_text()
    assert "## Graph distances" in text and f"]({png.name})" in text

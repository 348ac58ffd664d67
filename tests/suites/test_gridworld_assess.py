"""Assessment on gridworld logs against breadth-first search, an answer from outside goalkit.

The reference is scipy.sparse.csgraph.shortest_path (unweighted: breadth-first search) on the
comb grid (tests/suites/gridworld.py): its next move has zero action error wherever the log
reaches the goal (each logged episode walks the unique shortest path of a tree), and negative
BFS distance ranks the held-out pairs exactly as their steps-to-goal (Spearman 1).
"""

import numpy as np
import pytest

from goalkit.scoring.run import assess_suite
from goalkit.suites.fileformat import read_suite
from goalkit.suites.strata import EPISODE, STITCHED

import gridworld

CHANCE_ERROR = (2 * np.sqrt(2) + 2) / 4  # random unit move vs logged unit move: 0, sqrt 2 (twice), 2


@pytest.fixture(scope="module")
def scored(grid):
    return assess_suite(grid["set"], grid["suite"], import_path=grid["ck"],
                        policies=["gridck:bfs_policy", "gridck:random_policy"],
                        values=["gridck:bfs_value", "gridck:random_value"], resamples=500, seed=3)


def test_suite_has_every_route_kind_and_horizons_equal_bfs_distance(grid):
    s = read_suite(grid["suite"]).columns
    assert {EPISODE, STITCHED} <= set(s["route"].tolist())
    bfs = gridworld.BFSPolicy()
    reach = s["reachable"] == 1
    d = bfs.dist[bfs.cell(s["state"][reach]), bfs.cell(s["goal"][reach])]
    np.testing.assert_array_equal(s["horizon"][reach], d.astype(np.int64))
    assert (s["horizon"][~reach] == -1).all()


def test_bfs_policy_scores_zero_action_error_on_reachable_pairs(scored):
    pol = scored.report["policy"]
    assert pol["rows"] > 50
    for b in pol["by_bucket"]:
        assert b["scores"][0] == {"estimate": 0.0, "low": 0.0, "high": 0.0, "n_undefined": 0}
    assert pol["overall"]["scores"][0]["estimate"] == 0.0


def test_random_policy_scores_chance_within_its_interval(scored):
    o = scored.report["policy"]["overall"]
    rnd = o["scores"][1]
    assert rnd["low"] <= CHANCE_ERROR <= rnd["high"]
    assert o["difference"]["high"] < 0  # BFS better than random, the difference's interval excludes 0


def test_exact_value_has_spearman_one_and_random_value_is_at_chance(scored):
    v = scored.report["value"]
    assert v["spearman"]["scores"][0]["estimate"] == pytest.approx(1.0, abs=1e-12)
    assert v["spearman"]["scores"][0]["low"] == pytest.approx(1.0, abs=1e-12)
    rnd = v["spearman"]["scores"][1]
    assert rnd["low"] <= 0.0 <= rnd["high"]
    # (ROC AUC at chance is checked on many unreachable pairs in test_metrics_reference.py: a
    # comb this small leaves few pairs that no logged path joins)
    assert v["roc_auc"]["positives"] < v["roc_auc"]["rows"]
    assert v["spearman"]["difference"]["low"] > 0


def test_json_report_names_the_caution(scored):
    assert "not a substitute for supervised trials on the machine" in scored.report["caution"]
    assert "not a substitute for supervised trials on the machine" in scored.render()

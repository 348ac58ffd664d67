"""A new same-episode strategy is one function plus one entry in the strategy table.

This module adds ``midpoint`` (goal ``s_j`` with ``j = (t + 1 + T) // 2``, the state halfway
between the next state and the episode's end) in a test-only way: the function and its
``register`` call below are the whole change; no goalkit file is edited. A set built with it is
checked against the demo logs read straight with h5py, verified (replay and the table's row
rules; the audit is left out because it deliberately keeps its own, independent statement of the
strategies it knows, and ``midpoint`` is not one of them), and a tampered midpoint row is
caught by the rule given in the table entry. Logs are the invented irrigation-gantry demo.
"""

import json
import shutil

import h5py
import numpy as np
import pytest

from goalkit.demo import make_demo
from goalkit.errors import RecipeError
from goalkit.pipeline.build import build
from goalkit.pipeline.recipe import load_recipe
from goalkit.relabel import CODES, STRATEGIES, StrategyGoals, locate, register, unregister
from goalkit.write.reader import open_set
from goalkit.write.verify import verify_set
from tamper_cases import tamper

MIDPOINT_CODE = 200


# ---- the new strategy: one function ...
def midpoint(chunk, transitions, slots, seed, context=None):
    """The state halfway from s_{t+1} to the episode's last state: ``j = (t + 1 + T) // 2``."""
    _, eid, t, length = locate(chunk, transitions)
    return StrategyGoals(eid, (t + 1 + length) // 2)


# ---- ... and one table entry (registered only while a test runs)
@pytest.fixture
def with_midpoint():
    register("midpoint", midpoint, MIDPOINT_CODE, rules=[
        ("a midpoint goal must be s_j of the same episode with j = (t + 1 + T) // 2",
         lambda r: r.same & (r.j == (r.t + 1 + r.T) // 2))])
    yield
    unregister("midpoint")


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    d = tmp_path_factory.mktemp("midpoint")
    make_demo(d, episodes=30, seed=5)
    text = (d / "gantry-recipe.toml").read_text()
    head, rest = text.split("[relabel.weights]", 1)
    rest = rest[rest.index("[reward]"):]
    (d / "midpoint-recipe.toml").write_text(head + "[relabel.weights]\nmidpoint = 2\nfuture = 1\n\n" + rest)
    return d


def _raw_states(d):
    """(head, trays) state of every episode, read with h5py in the log's group order."""
    with h5py.File(d / "gantry-logs.h5", "r") as f:
        return [np.concatenate([f["bench"][n]["head"][()], f["bench"][n]["trays"][()]], axis=1)
                for n in sorted(f["bench"])]


def test_the_table_is_back_to_the_shipped_strategies_after_a_test(with_midpoint):
    assert STRATEGIES["midpoint"].code == CODES["midpoint"] == MIDPOINT_CODE


def test_a_registered_strategy_builds_and_verifies(demo, with_midpoint, tmp_path):
    recipe = load_recipe(demo / "midpoint-recipe.toml")
    result = build(recipe, replace=True)
    with open_set(result.path) as gs:
        r = gs.read("train", ["strategy", "source_episode", "source_step", "goal_episode", "goal_step",
                              "steps_to_goal", "goal", "reached_goal", "reached", "reward"])
        codes = json.loads(gs.file["train"]["strategy"].attrs["codes"])
    mid = r["strategy"] == MIDPOINT_CODE
    assert 0.5 < mid.mean() < 0.85   # weight 2 of 3 (expected 2/3)
    assert set(np.unique(r["strategy"][~mid]).tolist()) == {CODES["future"]}
    states = _raw_states(demo)
    lengths = np.array([len(s) - 1 for s in states])
    e, t = r["source_episode"][mid], r["source_step"][mid]
    j = (t + 1 + lengths[e]) // 2
    assert np.array_equal(r["goal_episode"][mid], e) and np.array_equal(r["goal_step"][mid], j)
    assert np.array_equal(r["steps_to_goal"][mid], j - t)
    expect_goal = np.stack([states[a][b] for a, b in zip(e.tolist(), j.tolist())]).astype(np.float32)
    assert np.array_equal(r["goal"][mid], expect_goal)
    # the demo recipe's rule: euclidean, threshold 0.04 inclusive, sparse reward (1 if reached)
    d = np.linalg.norm(r["reached_goal"].astype(np.float64) - r["goal"].astype(np.float64), axis=1)
    assert np.array_equal(r["reached"].astype(bool), d <= 0.04)
    assert np.array_equal(r["reward"], (d <= 0.04).astype(np.float32))
    assert codes[str(MIDPOINT_CODE)] == "midpoint" and codes["2"] == "future"
    report = verify_set(result.path, audit=False)
    assert report.ok, report.failures
    # a midpoint row moved one step later: the table entry's rule names it
    copy = tmp_path / "tampered.h5"
    shutil.copy(result.path, copy)
    row = int(np.flatnonzero(mid & (r["goal_step"] < lengths[r["source_episode"]]))[0])
    tamper(copy, "train", "goal_step", lambda a: a.__setitem__(row, a[row] + 1))
    report = verify_set(copy, audit=False)
    assert not report.ok
    text = "\n".join(report.failures)
    assert f"train row {row}" in text and "a midpoint goal must be s_j of the same episode" in text, text


def test_unregistered_again_the_name_is_unknown(demo):
    assert "midpoint" not in STRATEGIES and "midpoint" not in CODES
    with pytest.raises(RecipeError, match="unknown strategy 'midpoint'"):
        load_recipe(demo / "midpoint-recipe.toml")


def test_a_code_is_never_given_to_two_strategies():
    with pytest.raises(ValueError, match="code 2 belongs to strategy 'future'"):
        register("midpoint", midpoint, CODES["future"])
    assert "midpoint" not in STRATEGIES

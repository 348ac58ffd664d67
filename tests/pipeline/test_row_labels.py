"""Training labels of a built set: discount weight, return to goal, bootstrap mask.

Checked against closed forms and published figures (sources beside each), re-derived by verify
and recomputed by the independent audit.
"""

import h5py
import numpy as np
import pytest

from goalkit.audit import audit_set
from goalkit.demo import make_demo
from goalkit.pipeline.build import build
from goalkit.pipeline.chunk import row_labels
from goalkit.pipeline.recipe import load_recipe
from goalkit.write.verify import verify_set

GAMMA = 0.98


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    d = tmp_path_factory.mktemp("labels")
    make_demo(d, episodes=30, seed=4)
    path = d / "gantry-recipe.toml"
    text = path.read_text()
    text = text.replace("gamma = 0.9", f"gamma = {GAMMA}").replace("end_on_reach = false", "end_on_reach = true")
    assert f"gamma = {GAMMA}" in text and "end_on_reach = true" in text
    path.write_text(text)
    result = build(load_recipe(path))
    with h5py.File(result.path, "r") as f:
        cols = {k: f["train"][k][()] for k in ("steps_to_goal", "discount_weight", "return_to_goal",
                                               "bootstrap_mask", "terminal", "reached", "source_step",
                                               "source_episode", "strategy")}
    return result.path, cols


def test_labels_follow_the_closed_forms(built):
    _, c = built
    d = c["steps_to_goal"]
    known = d >= 1
    assert known.any() and (~known).any()
    # discounted relabelling weight gamma**(j - t) (Yang et al., 2022, WGCSL, ICLR)
    np.testing.assert_allclose(c["discount_weight"][known], GAMMA ** d[known], rtol=1e-6)
    # return of reward -1 per step over d steps: the geometric series sum_{k<d} -gamma**k
    series = np.array([-sum(GAMMA ** k for k in range(n)) for n in d[known]])
    np.testing.assert_allclose(c["return_to_goal"][known], series, rtol=1e-6)
    # the stated rule for rows without a path: weight 0, return -1 / (1 - gamma)
    assert np.all(c["discount_weight"][~known] == 0)
    np.testing.assert_allclose(c["return_to_goal"][~known], -1 / (1 - GAMMA), rtol=1e-6)
    # reaching the goal ends the episode (end_on_reach = true): mask 0 exactly there
    np.testing.assert_array_equal(c["bootstrap_mask"], 1 - c["terminal"])
    np.testing.assert_array_equal(c["terminal"], c["reached"])
    assert c["bootstrap_mask"].dtype == np.uint8 and c["return_to_goal"].dtype == np.float32


def test_a_time_limit_never_clears_the_mask(built):
    # the last logged transition of an episode is a time limit, not a termination: unreached rows
    # there keep bootstrap mask 1 (final goals of the last transition are reached or not by the rule)
    _, c = built
    ep, t = c["source_episode"], c["source_step"]
    starts = np.r_[0, np.flatnonzero(ep[1:] != ep[:-1]) + 1]   # rows are sorted by (episode, step)
    last_step = np.maximum.reduceat(t, starts)                   # T - 1 of each episode
    last = t == np.repeat(last_step, np.diff(np.r_[starts, len(t)]))
    unreached_last = last & (c["reached"] == 0)
    assert unreached_last.any()
    assert np.all(c["bootstrap_mask"][unreached_last] == 1)


def test_published_label_values():
    # return at d = 10, gamma = 0.99: -(1 - 0.99**10) / (1 - 0.99) = -9.5618 (closed form)
    cols = row_labels(np.array([10]), 0.99, np.array([0]))
    assert round(float(cols["return_to_goal"][0]), 4) == -9.5618
    # WGCSL weight at offset 10, gamma = 0.98: 0.98**10 = 0.817 (Yang et al., 2022, ICLR)
    cols = row_labels(np.array([10]), 0.98, np.array([1]))
    assert round(float(cols["discount_weight"][0]), 3) == 0.817 and cols["bootstrap_mask"][0] == 0


def test_verify_and_the_audit_catch_an_edited_label(built, tmp_path):
    path, c = built
    assert verify_set(path).ok
    assert audit_set(path).ok
    for name, value in (("discount_weight", 0.5), ("return_to_goal", -1.0), ("bootstrap_mask", 0)):
        bad = tmp_path / f"{name}.h5"
        bad.write_bytes(path.read_bytes())
        row = int(np.flatnonzero((c["steps_to_goal"] >= 3) & (c["bootstrap_mask"] == 1))[0])
        with h5py.File(bad, "r+") as f:
            f["train"][name][row] = value
        report = audit_set(bad)
        assert not report.ok and any(name in line for line in report.failures), report.failures
        assert not verify_set(bad).ok

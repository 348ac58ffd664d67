"""The multi-head sampler against published goal-sampling figures and closed forms.

Sources named beside each check. Figures marked "from memory" were recalled, not re-read.
"""

from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

import goalkit
from goalkit.demo import make_demo
from goalkit.errors import ParameterError, RecipeError
from goalkit.logs.episodes import EpisodeSet
from goalkit.pipeline.recipe import load_recipe, parse_recipe
from goalkit.relabel import Mixture, RelabelContext
from goalkit.heads import SOURCE_CODES, GoalHead, heads_from_table
from goalkit.reward import RewardRule, score
from goalkit.write.headsampler import HeadSampler, head_labels

RULE = RewardRule("euclidean", 0.05, form="sparse-negative", end_on_reach=True)


def _episodes(lengths, seed=0, dim=2):
    """Flat offsets and random goal vectors of every state for episodes of ``lengths``."""
    lengths = np.asarray(lengths, dtype=np.int64)
    offsets = np.concatenate([[0], np.cumsum(lengths)])
    goals = np.random.default_rng(seed).random((int(offsets[-1]) + len(lengths), dim)).astype(np.float32)
    return offsets, goals


def _draw(sampler, head, batches, size=4096):
    cols = ("source", "steps_to_goal", "goal_step", "goal_episode")
    parts = [sampler.batch(size, k) for k in range(batches)]
    out = {c: np.concatenate([p[head][c] for p in parts]) for c in cols}
    out["t"] = np.concatenate([p["source_step"] for p in parts])
    out["e"] = np.concatenate([p["source_episode"] for p in parts])
    return out


# ---- shares of the sources -------------------------------------------------------------
def test_value_goal_shares_are_the_published_ones():
    # Park et al., 2023, HIQL (NeurIPS), value-goal sampling: the current state with probability
    # 0.2, a later state of the same trajectory (geometric) with 0.5, a random dataset state with
    # 0.3 (the published code's defaults, from memory). Exact binomial tests (scipy.stats.binomtest).
    offsets, goals = _episodes([200] * 50)
    head = GoalHead("value", {"current": 0.2, "geometric": 0.5, "random": 0.3}, gamma=0.99)
    d = _draw(HeadSampler.from_arrays(goals, offsets, RULE, [head], seed=11), "value", 10)
    n = len(d["source"])
    for name, p in (("current", 0.2), ("geometric", 0.5), ("random", 0.3)):
        k = int(np.sum(d["source"] == SOURCE_CODES[name]))
        assert stats.binomtest(k, n, p).pvalue > 0.001, (name, k / n)
    assert set(np.unique(d["source"]).tolist()) == {0, 2, 3}


def test_her_future_with_k_4_relabels_four_fifths():
    # Andrychowicz et al., 2017, Hindsight Experience Replay (NeurIPS), "future" strategy with
    # k = 4 relabelled goals per original goal: relabelled share k / (k + 1) = 0.8. Drawn by the
    # one-head mixture (original : future = 1 : 4); exact binomial test.
    n_t = 400
    ep = EpisodeSet(observations=np.zeros((n_t + 1, 2)), actions=np.zeros((n_t, 1)),
                    offsets=np.array([0, n_t]), episode_ids=np.array([0]),
                    task_goals=np.ones((n_t, 2)))
    rows = Mixture({"original": 1, "future": 4}, goals_per_transition=50).assign(
        ep, 5, RelabelContext.from_lengths([n_t]))
    relabelled = int(np.sum(rows.strategy == 2))
    assert stats.binomtest(relabelled, len(rows), 0.8).pvalue > 0.001
    assert np.all(rows.goal_episode[rows.strategy == 0] == -1)


# ---- geometric offsets -----------------------------------------------------------------
def test_geometric_offsets_follow_the_geometric_law():
    # P(K <= n) = 1 - gamma**n for K ~ Geometric(1 - gamma) on {1, 2, ...} (closed form;
    # scipy.stats.geom is that law). One long episode, rows far from its end (no clipping).
    gamma = 0.9
    offsets, goals = _episodes([200_000])
    head = GoalHead("g", {"geometric": 1}, gamma=gamma)
    d = _draw(HeadSampler.from_arrays(goals, offsets, RULE, [head], seed=3), "g", 10)
    keep = d["t"] < 200_000 - 400
    k = d["steps_to_goal"][keep]
    ks = stats.kstest(k, stats.geom(1 - gamma).cdf)
    # a discrete law: compare the empirical CDF at the support points directly as well
    for n in (1, 2, 5, 10, 20, 40):
        assert abs(np.mean(k <= n) - (1 - gamma ** n)) < 4 * np.sqrt(0.25 / len(k)), n
    bins = np.arange(1, 41)
    observed = np.array([np.sum(k == b) for b in bins] + [np.sum(k > 40)])
    expected = np.array([(1 - gamma) * gamma ** (b - 1) for b in bins] + [gamma ** 40]) * len(k)
    assert stats.chisquare(observed, expected).pvalue > 0.001
    # for a discrete law the KS statistic is at least the first jump, P(K = 1) = 1 - gamma = 0.1;
    # a wrong law (e.g. offsets from 0, or uniform) puts it far above
    assert ks.statistic < 0.12


def test_clipped_geometric_at_50_remaining_steps():
    # Clipped at the episode's end with L = 50 remaining steps and gamma = 0.99 (closed forms):
    # E[min(K, L)] = sum_{n<L} gamma**n = (1 - gamma**L) / (1 - gamma) = 39.50, and the share
    # landing on the final state P(K >= L) = gamma**(L - 1) = 0.611 (the figures of the issue;
    # both recomputed here).
    gamma, L = 0.99, 50
    mean_closed = (1 - gamma ** L) / (1 - gamma)
    assert round(mean_closed, 2) == 39.50 and round(gamma ** (L - 1), 3) == 0.611
    offsets, goals = _episodes([L] * 400)
    head = GoalHead("g", {"geometric": 1}, gamma=gamma, past_end="clip")
    d = _draw(HeadSampler.from_arrays(goals, offsets, RULE, [head], seed=4), "g", 60)
    first = d["t"] == 0
    k = d["steps_to_goal"][first]
    assert len(k) > 3000
    # the law's standard deviation, from its exact probabilities
    p = np.array([(1 - gamma) * gamma ** (n - 1) for n in range(1, L)] + [gamma ** (L - 1)])
    sd = np.sqrt(np.sum(p * (np.arange(1, L + 1) - mean_closed) ** 2))
    assert abs(k.mean() - mean_closed) < 4 * sd / np.sqrt(len(k))
    assert stats.binomtest(int(np.sum(k == L)), len(k), gamma ** (L - 1)).pvalue > 0.001
    assert k.max() == L and k.min() >= 1


def test_renormalised_geometric_within_50_steps_is_the_contrastive_law():
    # Renormalised within L = 50 steps: P(K = k) = (1 - gamma) gamma**(k-1) / (1 - gamma**L) on
    # {1..L}, i.e. a strictly later state with probability proportional to gamma**(j - t),
    # renormalised within the episode (Eysenbach et al., 2022, Contrastive RL, NeurIPS).
    # Mean, derived: E[K] = sum_{k<=L} k (1-g) g**(k-1) / (1 - g**L); with
    # sum_{k<=L} k g**(k-1) = (1 - (L+1) g**L + L g**(L+1)) / (1-g)**2 this is
    # E[K] = 1/(1 - g) - L g**L / (1 - g**L), which at g = 0.99, L = 50 is 23.42.
    g, L = 0.99, 50
    ks = np.arange(1, L + 1)
    pk = (1 - g) * g ** (ks - 1) / (1 - g ** L)
    direct = float(np.sum(ks * pk))
    closed = 1 / (1 - g) - L * g ** L / (1 - g ** L)
    assert abs(direct - closed) < 1e-9 and round(closed, 2) == 23.42
    offsets, goals = _episodes([L] * 400)
    head = GoalHead("c", {"geometric": 1}, gamma=g, past_end="renormalise")
    d = _draw(HeadSampler.from_arrays(goals, offsets, RULE, [head], seed=5), "c", 60)
    k = d["steps_to_goal"][d["t"] == 0]
    sd = np.sqrt(np.sum(pk * (ks - closed) ** 2))
    assert abs(k.mean() - closed) < 4 * sd / np.sqrt(len(k))
    # the shape of the law, with a steeper gamma so that every bin is well filled
    g2 = 0.95
    head2 = GoalHead("c", {"geometric": 1}, gamma=g2, past_end="renormalise")
    d2 = _draw(HeadSampler.from_arrays(goals, offsets, RULE, [head2], seed=6), "c", 60)
    k2 = d2["steps_to_goal"][d2["t"] == 0]
    p2 = (1 - g2) * g2 ** (ks - 1) / (1 - g2 ** L)
    observed = np.bincount(k2, minlength=L + 1)[1:]
    assert stats.chisquare(observed, p2 * len(k2)).pvalue > 0.001
    assert k2.min() >= 1 and k2.max() <= L


# ---- labels ----------------------------------------------------------------------------
def test_return_and_weight_match_the_published_figures():
    # Monte-Carlo return of reward -1 per step over d = 10 steps, gamma = 0.99:
    # -(1 - 0.99**10) / (1 - 0.99) = -9.5618 (geometric series; the issue's figure).
    w, r = head_labels(np.array([10]), 0.99)
    assert round(float(r[0]), 4) == -9.5618
    # WGCSL discounted relabelling weight gamma**(i - t) at offset 10, gamma = 0.98: 0.817
    # (Yang et al., 2022, Rethinking Goal-Conditioned Supervised Learning, ICLR).
    w, _ = head_labels(np.array([10]), 0.98)
    assert round(float(w[0]), 3) == 0.817
    # no path to the goal: weight 0, return -1 / (1 - gamma) (the limits as d grows)
    w, r = head_labels(np.array([-1, 0]), 0.98)
    assert w.tolist() == [0.0, 1.0] and r[0] == pytest.approx(-50.0) and r[1] == 0.0


def test_batch_labels_follow_the_formulas_and_the_scorer():
    offsets, goals = _episodes(np.random.default_rng(1).integers(1, 120, 300))
    heads = [GoalHead("value", {"current": 0.2, "geometric": 0.5, "random": 0.3}, gamma=0.98),
             GoalHead("sub", {"subgoal": 1}, gamma=0.99, steps=10),
             GoalHead("neg", {"negative": 1}, gamma=0.9)]
    s = HeadSampler.from_arrays(goals, offsets, RULE, heads, seed=8)
    b = s.batch(2048, 3)
    for head in heads:
        h = b[head.name]
        sc = score(RULE, b["reached_goal"], h["goal"])
        np.testing.assert_array_equal(h["reward"], sc.reward)
        np.testing.assert_array_equal(h["reached"], sc.reached.astype(np.uint8))
        np.testing.assert_array_equal(h["terminal"], sc.terminal.astype(np.uint8))
        np.testing.assert_array_equal(h["bootstrap_mask"], 1 - h["terminal"])
        d = h["steps_to_goal"]
        expect_w = np.where(d >= 0, head.gamma ** np.maximum(d, 0), 0.0)
        np.testing.assert_allclose(h["discount_weight"], expect_w, rtol=1e-6)
        np.testing.assert_allclose(h["return_to_goal"], -(1 - expect_w) / (1 - head.gamma), rtol=1e-5, atol=1e-5)
        np.testing.assert_array_equal(h["goal"], goals[offsets[h["goal_episode"]] + h["goal_episode"]
                                                       + h["goal_step"]])
    sub = b["sub"]
    at10 = sub["steps_to_goal"] == 10
    assert at10.any()
    np.testing.assert_allclose(sub["return_to_goal"][at10], -9.5618, atol=1e-4)   # as above
    # current-state goals are 0 steps away: weight 1, return 0
    cur = b["value"]["source"] == SOURCE_CODES["current"]
    assert np.all(b["value"]["steps_to_goal"][cur] == 0) and np.all(b["value"]["discount_weight"][cur] == 1)
    # a time limit is never terminal: with end_on_reach off the mask is 1 everywhere
    s2 = HeadSampler.from_arrays(goals, offsets, RULE.replace(end_on_reach=False), heads, seed=8)
    assert all(np.all(s2.batch(512, 0)[h.name]["bootstrap_mask"] == 1) for h in heads)


def test_in_batch_negatives_are_other_rows_geometric_goals():
    offsets, goals = _episodes([30] * 500)
    heads = [GoalHead("pos", {"geometric": 1}, gamma=0.9, past_end="renormalise"),
             GoalHead("neg", {"negative": 1}, gamma=0.9, past_end="renormalise")]
    b = HeadSampler.from_arrays(goals, offsets, RULE, heads, seed=2).batch(1024, 0)
    neg = b["neg"]
    # each negative is the goal of another row: from one of the batch's episodes, mostly not the own
    other = neg["goal_episode"] != b["source_episode"]
    assert other.mean() > 0.95
    assert np.all(np.isin(neg["goal_episode"], b["source_episode"]))
    assert np.all(neg["steps_to_goal"][other] == -1) and np.all(neg["discount_weight"][other] == 0)


# ---- indexing properties ---------------------------------------------------------------
@settings(max_examples=60, deadline=None)
@given(lengths=st.lists(st.integers(1, 40), min_size=1, max_size=12), seed=st.integers(0, 2 ** 32),
       k=st.integers(1, 50), gamma=st.floats(0.05, 0.995), index=st.integers(0, 10 ** 6),
       past_end=st.sampled_from(["clip", "renormalise"]))
def test_future_goals_stay_in_their_episode(lengths, seed, k, gamma, index, past_end):
    offsets, goals = _episodes(lengths, seed % 1000)
    heads = [GoalHead("fut", {"future": 1, "geometric": 2, "final": 1}, gamma=gamma, past_end=past_end),
             GoalHead("sub", {"subgoal": 1}, steps=k), GoalHead("cur", {"current": 1, "episode": 1})]
    b = HeadSampler.from_arrays(goals, offsets, RULE, heads, seed=seed).batch(64, index)
    t, e = b["source_step"], b["source_episode"]
    T = np.diff(offsets)[e]
    assert np.all((t >= 0) & (t < T))
    fut = b["fut"]
    assert np.all(fut["goal_episode"] == e)
    assert np.all((fut["goal_step"] > t) & (fut["goal_step"] <= T))
    assert np.all(fut["steps_to_goal"] == fut["goal_step"] - t)
    fin = fut["source"] == SOURCE_CODES["final"]
    assert np.all(fut["goal_step"][fin] == T[fin])
    sub = b["sub"]
    assert np.all(sub["goal_episode"] == e) and np.all(sub["goal_step"] == np.minimum(t + k, T))
    cur = b["cur"]
    assert np.all(cur["goal_episode"] == e) and np.all((cur["goal_step"] >= 0) & (cur["goal_step"] <= T))
    at_t = cur["source"] == SOURCE_CODES["current"]
    assert np.all(cur["goal_step"][at_t] == t[at_t])


def test_batches_are_replayable_per_seed_and_index():
    offsets, goals = _episodes([25] * 40)
    heads = [GoalHead("value", {"current": 0.2, "geometric": 0.5, "random": 0.3}), GoalHead("n", {"negative": 1})]
    a = HeadSampler.from_arrays(goals, offsets, RULE, heads, seed=9)
    b = HeadSampler.from_arrays(goals, offsets, RULE, heads, seed=9)
    x = [a.batch(128, i) for i in (0, 1, 2)]
    y = b.batch(128, 1)  # batch 1 without drawing batch 0 first
    for key in ("source_episode", "source_step"):
        np.testing.assert_array_equal(x[1][key], y[key])
    for key in x[1]["value"]:
        np.testing.assert_array_equal(x[1]["value"][key], y["value"][key])
    assert not np.array_equal(x[0]["source_step"], x[1]["source_step"])
    c = HeadSampler.from_arrays(goals, offsets, RULE, heads, seed=10).batch(128, 1)
    assert not np.array_equal(c["source_step"], y["source_step"])


# ---- configuration ---------------------------------------------------------------------
def test_recipe_heads_table_and_errors(tmp_path):
    make_demo(tmp_path, episodes=12, seed=2)
    path = tmp_path / "gantry-recipe.toml"
    text = path.read_text() + """
[heads.value]
weights = { current = 0.2, geometric = 0.5, random = 0.3 }
gamma = 0.99
[heads.policy]
weights = { geometric = 1 }
[heads.subgoal]
weights = { subgoal = 1 }
steps = 25
"""
    path.write_text(text)
    recipe = load_recipe(path)
    assert [h.name for h in recipe.heads] == ["value", "policy", "subgoal"]
    assert recipe.heads[2].steps == 25 and recipe.heads[0].probabilities()["random"] == pytest.approx(0.3)
    s = HeadSampler(recipe)
    b = s.batch(256, 0)
    assert {"observation", "action", "next_observation", "value", "policy", "subgoal"} <= set(b)
    np.testing.assert_array_equal(b["reached_goal"][:, :3], b["next_observation"][:, :3].astype(b["reached_goal"].dtype))
    assert np.all(b["subgoal"]["steps_to_goal"] <= 25)
    with pytest.raises(RecipeError) as err:
        parse_recipe(text.replace("subgoal = 1 }", "subgaol = 1 }"), file="r.toml", base=tmp_path)
    assert err.value.key == "heads.subgoal.weights.subgaol" and "subgoal" in str(err.value)
    with pytest.raises(RecipeError) as err:
        heads_from_table({"v": {"gamma": 1.5}}, file="r.toml")
    assert err.value.key == "heads.v.gamma" and err.value.file == "r.toml"
    with pytest.raises(RecipeError) as err:
        heads_from_table({"v": {"past_end": "trunc"}})
    assert err.value.key == "heads.v.past_end"
    with pytest.raises(RecipeError) as err:
        heads_from_table({"termination": {}}, file="r.toml")
    assert err.value.key == "heads.termination" and "reserved" in err.value.message


@pytest.mark.parametrize("kwargs, parameter, words", [
    (dict(name="observation"), "name", "shared column"),
    (dict(name="source"), "name", "shared column"),
    (dict(name="2x"), "name", "letters, digits"),
    (dict(name="v", weights={}), "weights", "source -> weight"),
    (dict(name="v", weights={"futur": 1}), "weights.futur", "did you mean 'future'"),
    (dict(name="v", weights={"future": -1}), "weights.future", ">= 0"),
    (dict(name="v", weights={"future": 0}), "weights", "all source weights are zero"),
    (dict(name="v", gamma=1.0), "gamma", "strictly between 0 and 1"),
    (dict(name="v", past_end="trunc"), "past_end", "unknown past_end"),
    (dict(name="v", steps=0), "steps", ">= 1"),
])
def test_goal_head_raises_parameter_errors_naming_itself(kwargs, parameter, words):
    # a domain object names its own parameter, never a recipe file or key (goalkit.errors)
    with pytest.raises(ParameterError) as err:
        GoalHead(**kwargs)
    assert err.value.owner == "GoalHead" and err.value.parameter == parameter and words in err.value.message
    assert str(err.value).startswith(f"GoalHead {parameter}: ") and not isinstance(err.value, RecipeError)
    mapped = err.value.in_recipe("r.toml", "heads.v")
    assert isinstance(mapped, RecipeError) and mapped.key == f"heads.v.{parameter}" and mapped.file == "r.toml"


def test_public_names():
    assert goalkit.HeadSampler is HeadSampler and goalkit.GoalHead is GoalHead
    assert {"HeadSampler", "GoalHead"} <= set(goalkit.__all__)


def test_the_readme_training_loop_runs(tmp_path, monkeypatch):
    # the README's multi-head training loop, executed as written on the demo logs
    text = (Path(__file__).resolve().parents[2] / "README.md").read_text(encoding="utf-8")
    section = text[text.index("### Training with several goal heads"):]
    code = section[section.index("```python") + len("```python"):]
    code = code[:code.index("```")]
    make_demo(tmp_path / "gantry-demo", episodes=20, seed=1)
    monkeypatch.chdir(tmp_path)
    names = {}
    exec(compile(code, "README.md", "exec"), names)
    for w in ("w_value", "w_policy", "w_subgoal"):
        assert np.all(np.isfinite(names[w])) and np.any(names[w] != 0), w
    # the subgoal regression learns something: its error is below that of predicting zero
    b = names["sampler"].batch(1024, index=10 ** 6)
    xp = names["features"](b["observation"], b["policy"]["goal"])
    err = np.mean((xp @ names["w_subgoal"] - b["subgoal"]["goal"]) ** 2)
    assert err < np.mean(b["subgoal"]["goal"].astype(np.float64) ** 2)

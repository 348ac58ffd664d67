"""End-to-end build on in-memory episodes: row values, split, determinism, outside checks."""

import hashlib

import h5py
import numpy as np
import pytest
from scipy import stats

from goalkit.logs.memory import MemorySource
from goalkit.pipeline.build import build
from goalkit.pipeline.recipe import parse_recipe
from goalkit.pipeline.split import split_codes
from goalkit.write.reader import open_set

from pipeline_cases import make_episodes, recipe_text
from published_fetch_reward import fetch_reward_and_success, fetch_threshold


def digest(path):
    return hashlib.sha256(open(path, "rb").read()).hexdigest()


@pytest.mark.parametrize("compression", ["gzip", "none"])
def test_rows_match_a_direct_computation(tmp_path, episodes, source, compression):
    out = tmp_path / "set.h5"
    recipe = parse_recipe(recipe_text(out, weights="future = 1\nfinal = 1\nepisode = 1\noriginal = 1",
                                      compression=compression))
    build(recipe, source=source)
    so = episodes.state_offsets()
    with open_set(out) as gs:
        for split in ("train", "validation"):
            r = gs.read(split)
            e, t = r["source_episode"], r["source_step"]
            # observation and action are the logged s_t, a_t, s_t+1
            np.testing.assert_array_equal(r["observation"], episodes.observations[so[e] + t])
            np.testing.assert_array_equal(r["next_observation"], episodes.observations[so[e] + t + 1])
            np.testing.assert_array_equal(r["action"], episodes.actions[episodes.offsets[e] + t])
            # the goal reached by transition t is phi(s_t+1): the head field, columns 0..2
            np.testing.assert_array_equal(r["reached_goal"], episodes.observations[so[e] + t + 1, :3])
            internal = r["goal_episode"] >= 0
            ge, gj = r["goal_episode"][internal], r["goal_step"][internal]
            np.testing.assert_array_equal(r["goal"][internal], episodes.observations[so[ge] + gj, :3])
            ext = ~internal
            np.testing.assert_array_equal(
                r["goal"][ext], episodes.task_goals[episodes.offsets[e[ext]] + t[ext]].astype(np.float32))
            # reward recomputes from the stored goal vectors (euclidean, inclusive 0.05, sparse)
            d = np.linalg.norm(r["reached_goal"].astype(np.float64) - r["goal"].astype(np.float64), axis=1)
            np.testing.assert_array_equal(r["reward"], (d <= 0.05).astype(np.float32))
            np.testing.assert_allclose(r["goal_distance"], d, rtol=1e-6)
            # rows sorted by (episode, step, slot)
            key = (e * 10_000 + t) * 16 + r["slot"]
            assert np.all(np.diff(key) > 0)


@pytest.mark.parametrize("compression", ["gzip", "none"])
def test_byte_identical_whatever_the_chunk_size(tmp_path, source, compression):
    # the recipe's text (with its output path) is stored, so build every variant to one path;
    # "none" writes whole chunks raw, gzip through HDF5's filter pipeline
    same = tmp_path / "same.h5"
    recipe = parse_recipe(recipe_text(same, weights="future = 2\nother_episode = 1\ngeometric = 1\noriginal = 1",
                                      compression=compression))
    digests = set()
    for rows in (1000, 4321, 1_000_000):   # each build replaces the previous one (replace=True)
        build(recipe, source=source, max_rows_per_chunk=rows, replace=True)
        digests.add(digest(same))
    assert len(digests) == 1
    # a different seed gives a different file
    build(recipe.with_overrides(seed=99), source=source, replace=True)
    assert digest(same) not in digests


def test_split_is_by_episode_and_no_goal_crosses_it(tmp_path, episodes, source):
    out = tmp_path / "set.h5"
    recipe = parse_recipe(recipe_text(out, weights="other_episode = 1\nfuture = 1", validation=0.3))
    build(recipe, source=source)
    codes = split_codes(episodes.episode_ids, 0.3)
    with open_set(out) as gs:
        for code, split in enumerate(("train", "validation")):
            r = gs.read(split, ["source_episode", "goal_episode"])
            assert np.all(codes[r["source_episode"]] == code)
            assert np.all(codes[r["goal_episode"]] == code)
            assert gs.file[split].attrs["episodes"] == int(np.sum(codes == code))


def test_her_future_k4_share_of_relabelled_rows(tmp_path):
    # HER's best setting, "future" with k = 4 (Andrychowicz et al., 2017, arXiv:1707.01495,
    # sec. 4.5): 4 relabelled goals per original one, i.e. a relabelled share of k / (k + 1) = 0.8.
    # Each goal slot draws its strategy independently, so the count of relabelled rows is
    # Binomial(rows, 0.8); check it with scipy's exact binomial test.
    eps = make_episodes(n_episodes=120, seed=4)
    out = tmp_path / "her.h5"
    recipe = parse_recipe(recipe_text(out, gpt=5, weights="original = 1\nfuture = 4", validation=0.0))
    build(recipe, source=MemorySource(eps))
    with open_set(out) as gs:
        s = gs.read("train", ["strategy"])["strategy"]
    relabelled = int(np.sum(s != 0))
    assert stats.binomtest(relabelled, len(s), 0.8).pvalue > 0.01
    # and the test has power: the same counts reject a share of 0.75
    assert stats.binomtest(relabelled, len(s), 0.75).pvalue < 1e-6


@pytest.mark.parametrize("inclusive", [True, False])
def test_sparse_negative_5cm_rule_end_to_end(tmp_path, inclusive):
    # The multi-goal robotics environments of Plappert et al. (2018, arXiv:1802.09464, sec. 1):
    # reward -1 unless the achieved goal is within the 5 cm threshold. Their published code
    # (from memory; see published_fetch_reward.py) rewards -(d > threshold), inclusive, and
    # flags success with d < threshold, strict. A set built with inclusive = true must carry their reward;
    # with inclusive = false its reached flag must be their success flag. Goals are placed at
    # known distances from s_t+1.
    from goalkit.logs.episodes import EpisodeSet

    threshold = fetch_threshold()
    d = np.array([0.0, 0.049, 0.05, 0.051, 0.2])
    n = len(d)
    obs = np.zeros((2 * n, 3), np.float64)          # n one-step episodes: s_0 = 0, s_1 = 0
    goals = np.zeros((n, 3))
    goals[:, 0] = d                                  # the log's own goal at distance d from s_1
    their_reward, their_success = fetch_reward_and_success(np.zeros((n, 3)), goals, threshold)
    eps = EpisodeSet(observations=obs, actions=np.zeros((n, 1)), offsets=np.arange(n + 1),
                     episode_ids=np.arange(n), task_goals=goals, fields={"head": (0, 3)})
    out = tmp_path / "five-cm.h5"
    text = recipe_text(out, gpt=1, weights="original = 1", threshold=threshold, validation=0.0,
                       reward_extra=f'form = "sparse-negative"\ninclusive = {str(inclusive).lower()}').replace(
        'fields = ["head"]', 'fields = ["head"]\ndtype = "float64"')
    build(parse_recipe(text), source=MemorySource(eps))
    with open_set(out) as gs:
        r = gs.read("train", ["reward", "reached"])
    if inclusive:
        np.testing.assert_array_equal(r["reward"], their_reward)
        np.testing.assert_array_equal(r["reward"], [0, 0, 0, -1, -1])
    else:
        np.testing.assert_array_equal(r["reached"].astype(bool), their_success)
        np.testing.assert_array_equal(r["reached"], [1, 1, 0, 0, 0])


def test_indexed_mode_resolves_like_materialised(tmp_path, episodes, source):
    from goalkit.write.format import MATERIAL_COLUMNS

    out = tmp_path / "idx.h5"
    build(parse_recipe(recipe_text(out, mode="indexed")), source=source)
    with h5py.File(out) as f:
        assert "observation" not in f["train"] and "goal" in f["train"]
    mat = tmp_path / "mat.h5"
    build(parse_recipe(recipe_text(mat)), source=source)
    with h5py.File(out) as fi, h5py.File(mat) as fm:
        for name in fi["train"]:
            np.testing.assert_array_equal(fi["train"][name][:], fm["train"][name][:])
        assert set(fm["train"]) - set(fi["train"]) == set(MATERIAL_COLUMNS)


def test_summary_counts_and_warning(tmp_path, source):
    out = tmp_path / "set.h5"
    result = build(parse_recipe(recipe_text(out, threshold=1e-9, weights="other_episode = 1")), source=source)
    s = result.summary
    with open_set(out) as gs:
        n = gs.rows("train") + gs.rows("validation")
        assert s["rows"]["train"] == gs.rows("train")
        reached = sum(int(gs.read(sp, ["reached"])["reached"].sum()) for sp in ("train", "validation"))
    assert s["strategies"]["other_episode"]["rows"] == n
    assert s["reached_fraction"] == pytest.approx(reached / n)
    assert any("too tight" in w for w in s["warnings"])


def test_original_without_task_goals_is_refused(tmp_path):
    from goalkit.errors import RecipeError

    eps = make_episodes(task_goals=False)
    recipe = parse_recipe(recipe_text(tmp_path / "x.h5"))
    with pytest.raises(RecipeError, match="task_goal"):
        build(recipe, source=MemorySource(eps))
    assert list(tmp_path.iterdir()) == []


def test_original_needs_task_goals_in_goal_space(tmp_path):
    from goalkit.errors import RecipeError

    eps = make_episodes()  # task goals have 3 columns
    text = recipe_text(tmp_path / "x.h5").replace('fields = ["head"]', "indices = [0, 1]")
    with pytest.raises(RecipeError, match="3 columns and the goal map gives 2"):
        build(parse_recipe(text), source=MemorySource(eps))


def test_skipped_episodes_are_reported(tmp_path):
    import h5py

    from goalkit.demo import make_demo
    from goalkit.pipeline.recipe import load_recipe

    info = make_demo(tmp_path, episodes=12, seed=2)
    with h5py.File(info["logs"], "r+") as f:
        d = f["bench/ep_00004/head"]
        x = d[:]
        x[2, 0] = np.nan
        d[...] = x
    text = open(info["recipe"]).read().replace("skip_bad_episodes = false", "skip_bad_episodes = true")
    open(info["recipe"], "w").write(text)
    result = build(load_recipe(info["recipe"]))
    assert result.summary["skipped_episodes"] == 1
    assert any("episode 4" in w for w in result.summary["warnings"])
    with open_set(result.path) as gs:
        assert 4 not in set(gs.read("train", ["source_episode"])["source_episode"].tolist())
        assert gs.provenance["skipped_episodes"][0][0] == 4


def test_a_build_leaves_the_interpreter_switch_interval_alone(tmp_path, source):
    import sys

    seen = []
    before = sys.getswitchinterval()
    recipe = parse_recipe(recipe_text(tmp_path / "s.h5"))
    build(recipe, source=source, max_rows_per_chunk=1000,
          progress=lambda done, total: seen.append(sys.getswitchinterval()))
    assert seen and set(seen) == {before}   # a library call does not retune the host program's threads


def test_a_build_into_a_missing_folder_fails_in_one_line(tmp_path, source):
    from goalkit.errors import DatasetError

    bad = parse_recipe(recipe_text(tmp_path / "missing" / "s.h5"))
    with pytest.raises(DatasetError, match="output folder does not exist"):
        build(bad, source=source)

"""Builds with goal masks: the demo's tasks with per-task masks, random masks of relabelled rows,
byte-identical files across chunk sizes and workers, verify re-deriving the masks, and sets
without a [mask] table unchanged."""

import hashlib
import re
from pathlib import Path

import h5py
import numpy as np
import pytest
from scipy import stats

import goalkit
from goalkit.demo import make_demo
from goalkit.demo.bench import GantryParams
from goalkit.demo.tasks import mask_table_text
from goalkit.errors import RecipeError
from goalkit.pipeline.recipe import load_recipe
from goalkit.reward import RewardRule, score

EPISODES, TRAYS = 40, 3


def _sha(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    d = tmp_path_factory.mktemp("maskdemo")
    return make_demo(d, episodes=EPISODES, seed=3, trays=TRAYS)


def _recipe(demo, tmp_path, name, mask_text="", out=None):
    text = Path(demo["recipe"]).read_text()
    text = text.replace('path = "gantry-goals.h5"', f'path = "{out or name + ".h5"}"')
    p = Path(demo["recipe"]).parent / f"{name}.toml"
    p.write_text(text + "\n" + mask_text)
    return p


def _columns(path):
    with h5py.File(path, "r") as f:
        return {k: f["train"][k][()] for k in f["train"]}


def test_demo_tasks_build_with_per_task_masks_and_verify(demo, tmp_path):
    recipe = _recipe(demo, tmp_path, "masked", mask_table_text(GantryParams(trays=TRAYS)))
    res = goalkit.build(recipe, replace=True)
    cols = _columns(res.path)
    mask = cols["goal_mask"]
    assert mask.shape == cols["goal"].shape and mask.dtype == np.uint8
    with h5py.File(demo["logs"], "r") as f:
        tasks = {int(re.findall(r"\d+", k)[-1]): int(g.attrs["task"]) for k, g in f[list(f)[0]].items()}
    task = np.array([tasks[e] for e in cols["source_episode"]])
    water = task < TRAYS
    # a watering task constrains the head (goal dims 0-2), a sliding task its own tray (3 + k)
    assert (mask[water][:, :3] == 1).all() and (mask[water][:, 3:] == 0).all()
    slide = np.flatnonzero(~water)
    assert len(slide) > 0 and (mask[slide].sum(axis=1) == 1).all()
    assert (mask[slide, 3 + task[slide] - TRAYS] == 1).all()
    # the stored reward is the masked rule on the stored columns (materialised set)
    rule = load_recipe(recipe).reward
    s = score(rule, cols["reached_goal"], cols["goal"], mask)
    assert np.array_equal(s.reward, cols["reward"]) and np.array_equal(s.reached.astype(np.uint8), cols["reached"])
    unmasked = score(rule, cols["reached_goal"], cols["goal"])
    assert (unmasked.reached <= s.reached).all() and s.reached.sum() > unmasked.reached.sum()
    report = goalkit.verify(res.path)
    assert report.ok, report.failures


def test_verify_catches_a_changed_mask(demo, tmp_path):
    recipe = _recipe(demo, tmp_path, "masked_tamper", mask_table_text(GantryParams(trays=TRAYS)))
    res = goalkit.build(recipe, replace=True)
    copy = tmp_path / "tampered.h5"
    copy.write_bytes(Path(res.path).read_bytes())
    with h5py.File(copy, "r+") as f:
        m = f["train/goal_mask"]
        row = m[5]
        row[:] = 1
        m[5] = row
    report = goalkit.verify(copy)
    assert not report.ok


def test_random_masks_are_byte_identical_across_chunk_sizes_and_workers(demo, tmp_path):
    text = mask_table_text(GantryParams(trays=TRAYS), random_share=0.5)
    recipe = _recipe(demo, tmp_path, "random", text)
    hashes = []
    for kw in (dict(max_rows_per_chunk=997), dict(max_rows_per_chunk=50_000),
               dict(runner=goalkit.LocalWorkers(2), max_rows_per_chunk=3001)):
        path = goalkit.build(recipe, replace=True, **kw).path
        hashes.append(_sha(path))
    assert len(set(hashes)) == 1
    assert goalkit.verify(path).ok


def test_random_mask_law(demo, tmp_path):
    """Relabelled rows: a random mask with probability random_share, uniform over the 2**K - 1
    non-empty subsets of the K groups (chi-square goodness of fit, scipy.stats.chisquare)."""
    share = 0.6
    text = ("[mask]\ngroups = { head = [0, 1, 2], tray0 = [3], tray1 = [4], tray2 = [5] }\n"
            f"random_share = {share}\n")
    recipe = _recipe(demo, tmp_path, "law", text)
    cols = _columns(goalkit.build(recipe, replace=True).path)
    relabelled = cols["strategy"] != 0
    mask = cols["goal_mask"]
    assert (mask[~relabelled] == 1).all()  # original goals never get random masks
    m = mask[relabelled]
    # group k = head (dims 0-2) or tray k-1 (dim 3 + k - 1): subset code from the mask
    bits = np.stack([m[:, 0], m[:, 3], m[:, 4], m[:, 5]], axis=1).astype(np.int64)
    code = bits @ (1 << np.arange(4))
    full = code == 15
    n = len(code)
    # P(full mask) = (1 - share) + share / 15; every other non-empty subset share / 15
    expected = np.array([share / 15] * 14 + [(1 - share) + share / 15]) * n
    observed = np.array([(code == c).sum() for c in range(1, 15)] + [full.sum()])
    assert observed.sum() == n and (code > 0).all()
    assert stats.chisquare(observed, expected).pvalue > 1e-3


def test_no_mask_table_stores_no_mask_column(demo, tmp_path):
    recipe = _recipe(demo, tmp_path, "plain")
    cols = _columns(goalkit.build(recipe, replace=True).path)
    assert "goal_mask" not in cols


@pytest.mark.parametrize("text, key, words", [
    ('[mask]\ntasks = { "99" = ["head"] }\n', "mask.tasks.99", "task 99 is not in the logs"),
    ('[mask]\ntasks = { "0" = ["nozzle"] }\n', "mask.tasks.0", "unknown goal dimension group 'nozzle'"),
    ('[mask]\ntasks = { "0" = [17] }\n', "mask.tasks.0", "goal dimension 17 does not exist"),
    ('[mask]\ntasks = { "0" = [] }\n', "mask.tasks.0", "empty mask"),
    ('[mask]\ngroups = { a = [] }\n', "mask.groups.a", "empty group"),
    ('[mask]\nrandom_share = 1.5\n', "mask.random_share", "probability"),
    ('[mask]\ntask = {}\n', "mask.task", "did you mean 'tasks'"),
])
def test_bad_mask_tables_one_line_naming_file_and_key(demo, tmp_path, text, key, words):
    recipe = _recipe(demo, tmp_path, "bad", text)
    with pytest.raises(RecipeError) as info:
        goalkit.build(recipe, replace=True)
    assert info.value.file == str(recipe) and words in info.value.message
    assert info.value.key is not None and info.value.key.startswith(key)
    assert "\n" not in str(info.value)


def test_sampler_scores_with_the_recipe_masks(demo, tmp_path):
    from goalkit.write.sampler import GoalSampler

    recipe = _recipe(demo, tmp_path, "sampled", mask_table_text(GantryParams(trays=TRAYS)))
    b = GoalSampler(load_recipe(recipe)).batch(512, 0)
    assert b["goal_mask"].shape == b["goal"].shape
    rule = load_recipe(recipe).reward
    s = score(rule, b["reached_goal"], b["goal"], b["goal_mask"])
    assert np.array_equal(s.reward, b["reward"])
    assert set(b["goal_mask"].sum(axis=1).tolist()) <= {1, 3}


def test_audit_law_of_random_masks_fails_when_the_masks_are_not_random(demo, tmp_path):
    """The audit's chi-square test of the random-mask law (goalkit.audit.maskrules) passes on a
    built set and fails when every relabelled mask is the head group (each still a valid union
    of groups, so only the law can catch it)."""
    from goalkit.audit.run import audit_set

    text = ("[mask]\ngroups = { head = [0, 1, 2], tray0 = [3], tray1 = [4], tray2 = [5] }\n"
            "random_share = 0.5\n")
    path = goalkit.build(_recipe(demo, tmp_path, "lawaudit", text), replace=True).path
    good = audit_set(path)
    law = [c for c in good.checks if c.name == "law of random goal masks"]
    assert len(law) == 1 and law[0].passed and good.ok, good.failures
    bad = tmp_path / "biased.h5"
    bad.write_bytes(Path(path).read_bytes())
    with h5py.File(bad, "r+") as f:
        m = f["train/goal_mask"][()]
        relabelled = f["train/strategy"][()] != 0
        m[relabelled] = np.array([1, 1, 1, 0, 0, 0], np.uint8)
        f["train/goal_mask"][...] = m
    report = audit_set(bad)
    law = [c for c in report.checks if c.name == "law of random goal masks"]
    assert len(law) == 1 and not law[0].passed


@pytest.mark.parametrize("extra, key", [
    ('[mask]\ntasks = { "99" = ["head"] }\n', "key mask.tasks.99"),
    ("", "key reward.lower"),
])
def test_cli_build_bad_mask_or_region_exits_2_with_one_line(demo, tmp_path, extra, key):
    from click.testing import CliRunner

    from goalkit.cli import main

    recipe = _recipe(demo, tmp_path, "badcli", extra)
    if not extra:  # a region whose lower bound lies above its upper bound
        text = recipe.read_text().replace('distance = "euclidean"', 'distance = "region"\nlower = [0.5, 0, 0, 0, 0, 0]\n'
                                          'upper = [0.1, 1, 1, 1, 1, 1]').replace("threshold = 0.04", "")
        recipe.write_text(text)
    res = CliRunner().invoke(main, ["build", str(recipe)])
    assert res.exit_code == 2, res.output
    lines = [line for line in res.output.splitlines() if line.strip()]
    assert len(lines) == 1 and str(recipe) in lines[0] and key in lines[0] and "Traceback" not in res.output


@pytest.mark.parametrize("table, parameter, words", [
    ({"task": {}}, "task", "did you mean 'tasks'"),
    ({"groups": {"a": []}}, "groups.a", "empty group"),
    ({"groups": {"a": [-1]}}, "groups.a", "dimension numbers"),
    ({"tasks": {"x": ["a"]}}, "tasks.x", "whole number"),
    ({"tasks": {"0": []}}, "tasks.0", "empty mask"),
    ({"others": "head"}, "others", "list of group names"),
    ({"random_share": 1.5}, "random_share", "probability"),
    ("head", None, "expected a table"),
])
def test_mask_spec_raises_parameter_errors_naming_itself(table, parameter, words):
    # the domain object names its own key, never a recipe file; the loader maps it to mask.<key>
    from goalkit.errors import ParameterError
    from goalkit.masks import MaskSpec

    with pytest.raises(ParameterError) as info:
        MaskSpec.from_table(table)
    err = info.value
    assert err.owner == "MaskSpec" and err.parameter == parameter and words in err.message
    assert not isinstance(err, RecipeError)
    mapped = err.in_recipe("r.toml", "mask")
    assert mapped.file == "r.toml" and mapped.key == ("mask" if parameter is None else f"mask.{parameter}")


def test_mask_spec_resolve_raises_parameter_errors():
    from goalkit.errors import ParameterError
    from goalkit.masks import MaskSpec

    spec = MaskSpec.from_table({"groups": {"head": [0, 1, 2], "tray": [3, 4]}, "tasks": {"0": ["head"], "1": [9]}})
    for tasks, parameter, words in (([0, 1], "tasks.1", "goal dimension 9 does not exist"),
                                    ([0], "tasks.1", "task 1 is not in the logs"),
                                    (None, "tasks.0", "no task ids")):
        with pytest.raises(ParameterError) as info:
            spec.resolve(6, task_ids=tasks)
        assert (info.value.owner, info.value.parameter) == ("MaskSpec", parameter) and words in info.value.message
    with pytest.raises(ParameterError) as info:
        MaskSpec.from_table({"groups": {"tray": [3, 7]}}).resolve(6)
    assert info.value.parameter == "groups.tray"
    masks = MaskSpec.from_table({"groups": {"head": [0, 1, 2], "tray": [3, 4]}, "tasks": {"0": ["head"]}}).resolve(
        6, task_ids=[0, 1])
    np.testing.assert_array_equal(masks.task_mask([0, 1]), [[1, 1, 1, 0, 0, 0], [1, 1, 1, 1, 1, 1]])

"""The tuned copy of a recipe: minimal text edits, checked with the standard TOML parser.

Reference: Python's ``tomllib`` (TOML 1.0, the open standard the recipe is written in) reads
every edited text; it must give exactly the old document with the new values.
"""

import shutil
import tomllib

import h5py
import numpy as np
import pytest
import tomlkit
from hypothesis import given, settings
from hypothesis import strategies as st

from goalkit.errors import GoalkitError
from goalkit.pipeline.build import build
from goalkit.pipeline.recipe import PATH_KEYS, load_recipe
from goalkit.thresholds.recipe_edit import tuned_recipe_text, write_tuned_recipe
from goalkit.write.reader import open_set

REWARD = '''# a recipe of the gantry bench
version = 1
seed = 4

[logs]
path = "logs/gantry-logs.h5"   # the bench's logs
layout = "gantry-layout.toml"

[goal]
fields = ["head", "trays"]

[relabel]
goals_per_transition = 2
[relabel.weights]
future = 1

[reward]
distance = "euclidean"   # nozzle-to-target distance
threshold = 0.04         # metres: watering radius
form = "sparse"

[output]
path = "out/goals.h5"
'''


def _changed_lines(old: str, new: str) -> list[tuple[str, str]]:
    o, n = old.splitlines(), [l for l in new.splitlines() if not l.startswith("# tuned")]
    assert len(o) == len(n)
    return [(a, b) for a, b in zip(o, n) if a != b]


def test_only_the_threshold_value_changes_and_a_note_is_added():
    e = tuned_recipe_text(REWARD, threshold=0.0251, note="tuned by test")
    assert e.kept_comments and "# tuned by test\nthreshold = 0.0251" in e.text
    assert _changed_lines(REWARD, e.text) == [("threshold = 0.04         # metres: watering radius",
                                               "threshold = 0.0251         # metres: watering radius")]
    want = tomllib.loads(REWARD)
    want["reward"]["threshold"] = 0.0251
    assert tomllib.loads(e.text) == want


@settings(max_examples=200, deadline=None)
@given(thr=st.floats(min_value=0.0, max_value=1e6, allow_nan=False, allow_infinity=False))
def test_any_threshold_reads_back_exactly(thr):
    e = tuned_recipe_text(REWARD, threshold=thr)
    doc = tomllib.loads(e.text)
    assert doc["reward"]["threshold"] == thr
    assert {k: v for k, v in doc.items() if k != "reward"} == {
        k: v for k, v in tomllib.loads(REWARD).items() if k != "reward"}


def test_switch_to_box_replaces_a_multiline_list_and_drops_weights():
    text = REWARD.replace('threshold = 0.04         # metres: watering radius',
                          'weights = [1.0, 1.0, 1.0, 2.0, 2.0, 2.0]\nthreshold = [\n  0.04,\n  0.04,\n]  # per axis')
    e = tuned_recipe_text(text, threshold=[0.01, 0.02, 0.03, 0.04, 0.05, 0.06], distance="box")
    doc = tomllib.loads(e.text)
    assert e.kept_comments and "# per axis" in e.text and "# nozzle-to-target distance" in e.text
    assert doc["reward"] == {"distance": "box", "threshold": [0.01, 0.02, 0.03, 0.04, 0.05, 0.06],
                             "form": "sparse"}
    assert "# removed by goalkit tune: weights" in e.text


def test_distance_is_added_when_the_recipe_left_it_out():
    text = REWARD.replace('distance = "euclidean"   # nozzle-to-target distance\n', "")
    e = tuned_recipe_text(text, threshold=0.1, distance="l1")
    assert e.kept_comments and tomllib.loads(e.text)["reward"]["distance"] == "l1"


def test_dotted_keys_are_edited_in_place():
    text = 'version = 1\nreward.distance = "euclidean"\nreward.threshold = 0.05  # m\n'
    e = tuned_recipe_text(text, threshold=0.2, distance="chebyshev")
    assert e.kept_comments and "reward.threshold = 0.2  # m" in e.text
    assert tomllib.loads(e.text)["reward"] == {"distance": "chebyshev", "threshold": 0.2}


def test_inline_reward_table_is_edited_in_place():
    text = REWARD.replace('[reward]\ndistance = "euclidean"   # nozzle-to-target distance\n'
                          'threshold = 0.04         # metres: watering radius\nform = "sparse"\n', "")
    text = text.replace("seed = 4\n", 'seed = 4\nreward = { distance = "euclidean", threshold = 0.04 }\n')
    e = tuned_recipe_text(text, threshold=0.03)
    want = tomllib.loads(text)
    want["reward"]["threshold"] = 0.03
    assert e.kept_comments and tomllib.loads(e.text) == want
    assert "# a recipe of the gantry bench" in e.text and "# the bench's logs" in e.text


def test_paths_follow_the_copy_to_another_folder(tmp_path):
    (tmp_path / "a").mkdir()
    (tmp_path / "b" / "c").mkdir(parents=True)
    (tmp_path / "a" / "r.toml").write_text(REWARD)
    old = load_recipe(tmp_path / "a" / "r.toml")
    e = write_tuned_recipe(old, tmp_path / "b" / "c" / "r.toml", threshold=0.03, note="tuned x")
    new = load_recipe(tmp_path / "b" / "c" / "r.toml")
    assert (new.logs_path, new.layout_path, new.output.path) == (old.logs_path, old.layout_path,
                                                                 old.output.path)
    assert 'path = "../../a/logs/gantry-logs.h5"   # the bench\'s logs' in new.text
    assert new.reward.threshold == 0.03 and e.kept_comments
    assert sorted(p.name for p in (tmp_path / "b" / "c").iterdir()) == ["r.toml"]   # no temporary


def test_refuses_a_folder_or_a_missing_folder(tmp_path):
    (tmp_path / "r.toml").write_text(REWARD)
    rec = load_recipe(tmp_path / "r.toml")
    with pytest.raises(GoalkitError, match="got a folder"):
        write_tuned_recipe(rec, tmp_path, threshold=0.03)
    with pytest.raises(GoalkitError, match="does not exist"):
        write_tuned_recipe(rec, tmp_path / "no" / "r.toml", threshold=0.03)
    assert (tmp_path / "r.toml").read_text() == REWARD


def test_every_path_key_of_the_loader_is_rebased():
    # the loader's own list (pipeline/recipe.py) names every key it resolves against the folder
    import ast
    import goalkit.pipeline.recipe as recipe_module

    tree = ast.parse(open(recipe_module.__file__).read())
    keys = {node.args[3].value for node in ast.walk(tree)
            if isinstance(node, ast.Call) and getattr(node.func, "id", None) == "_path"
            and len(node.args) > 3 and isinstance(node.args[3], ast.Constant)}
    assert keys == set(PATH_KEYS) == {"logs.path", "logs.layout", "goal.embedding", "relabel.library",
                                      "output.path"}


def _columns(path):
    with h5py.File(path, "r") as f:
        return {f"{s}/{k}": f[s][k][()] for s in ("train", "validation") for k in f[s]
                if isinstance(f[s][k], h5py.Dataset)}


def test_a_tuned_copy_in_another_folder_builds_the_same_rows(gantry, tmp_path):
    # the library file is found from the copy's folder too (relabel.library is rebased)
    a = tmp_path / "a"
    shutil.copytree(gantry, a)
    with h5py.File(a / "gantry-logs.h5", "r") as f:   # targets: logged (head, trays) states, by h5py
        g = f["bench"][sorted(f["bench"])[0]]
        states = np.concatenate([g["head"][()], g["trays"][()]], axis=1)
    np.save(a / "targets.npy", states[[3, 10, 17]])
    text = (a / "gantry-recipe.toml").read_text()
    doc = tomlkit.parse(text)
    doc["relabel"]["library"] = "targets.npy"
    doc["relabel"]["weights"]["library"] = 1
    (a / "lib-recipe.toml").write_text(tomlkit.dumps(doc))
    old = load_recipe(a / "lib-recipe.toml")
    (tmp_path / "b" / "c").mkdir(parents=True)
    e = write_tuned_recipe(old, tmp_path / "b" / "c" / "r.toml", threshold=old.reward.threshold)
    assert "relabel.library rewritten relative to the new folder" in e.changes
    assert 'library = "../../a/targets.npy"' in e.text
    new = load_recipe(tmp_path / "b" / "c" / "r.toml")
    assert new.mixture.library == old.mixture.library and new.inputs()[1:] == old.inputs()[1:]
    first = build(old).path
    second = build(new.with_overrides(out=tmp_path / "b" / "copy.h5")).path
    a_cols, b_cols = _columns(first), _columns(second)
    assert a_cols.keys() == b_cols.keys() and "train/goal" in a_cols
    for k in a_cols:
        assert np.array_equal(a_cols[k], b_cols[k]), k
    with open_set(second) as gs:
        assert gs.summary["library"]["targets"] == 3 and sum(gs.summary["library"]["match_counts"]) >= 3

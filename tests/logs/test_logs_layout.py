"""The layout file: parsing, validation messages, TOML round trip."""

from __future__ import annotations

import tomllib

import pytest

from goalkit.errors import LayoutError
from goalkit.logs.layout import Layout, layout_to_toml, load_layout, parse_layout

GROUPED = {"version": 1, "shape": "grouped", "episode_groups": "bench/*",
           "keys": {"action": "action", "reward": "reward", "success": "success", "task": "task",
                    "frame": "camera", "task_goal": "task_goal"},
           "fields": {"head": "head", "head_velocity": "head_velocity", "trays": "trays"}}
FLAT = {"shape": "flat", "keys": {"observation": "obs", "next_observation": "next_obs", "action": "act"},
        "boundaries": {"done": "done"}}
PER_FILE = {"shape": "per-file", "file_pattern": "ep_*.npz", "keys": {"observation": "o", "action": "a"}}


def test_parse_grouped_keeps_field_order():
    lay = parse_layout(GROUPED, "lay.toml")
    assert isinstance(lay, Layout)
    assert lay.shape == "grouped" and lay.episode_groups == "bench/*"
    assert [n for n, _ in lay.fields] == ["head", "head_velocity", "trays"]
    assert lay.observation_keys() == ["head", "head_velocity", "trays"]
    assert lay.keys.frame == "camera" and lay.keys.observation is None
    with pytest.raises(Exception):
        lay.shape = "flat"                      # frozen


@pytest.mark.parametrize("doc", [GROUPED, FLAT, PER_FILE])
def test_toml_round_trip(doc, tmp_path):
    lay = parse_layout(doc)
    text = layout_to_toml(lay)
    assert parse_layout(tomllib.loads(text)) == lay
    (tmp_path / "l.toml").write_text(text)
    assert load_layout(tmp_path / "l.toml") == lay


def test_odd_names_survive_round_trip():
    doc = {"shape": "grouped", "episode_groups": "runs \"a\"/*",
           "keys": {"action": "act/ion", "task": "tâche"}, "fields": {"head xyz": "h", "b.c": "bc"}}
    lay = parse_layout(doc)
    assert parse_layout(tomllib.loads(layout_to_toml(lay))) == lay


def test_per_file_default_pattern():
    lay = parse_layout({"shape": "per-file", "keys": {"observation": "o", "action": "a"}})
    assert lay.file_pattern == "*.npz"


def err(doc) -> str:
    with pytest.raises(LayoutError) as info:
        parse_layout(doc, "lay.toml")
    msg = str(info.value)
    assert msg.startswith("lay.toml: ") and "\n" not in msg
    return msg


def with_(base, **changes):
    doc = {k: (dict(v) if isinstance(v, dict) else v) for k, v in base.items()}
    for k, v in changes.items():
        if v is None:
            doc.pop(k, None)
        else:
            doc[k] = v
    return doc


@pytest.mark.parametrize("doc, closest, section", [
    (with_(GROUPED, episode_group="runs/*"), "episode_groups", "top level"),
    (with_(GROUPED, keys={"action": "a", "obsrvation": "o"}), "observation", "[keys]"),
    (with_(FLAT, boundaries={"episode_ids": "ep"}), "episode_id", "[boundaries]"),
    (with_(FLAT, keys={"observation": "o", "actoin": "a"}), "action", "[keys]"),
])
def test_misspelt_keys_name_the_closest_and_list_valid(doc, closest, section):
    msg = err(doc)
    assert f"did you mean '{closest}'" in msg
    assert "valid keys:" in msg and section in msg


@pytest.mark.parametrize("doc, expected", [
    (with_(FLAT, shape="flattened"), "expected one of grouped, flat, per-file, bag, table, got 'flattened'"),
    (with_(FLAT, shape=None), "missing 'shape'"),
    (with_(FLAT, version=2), "expected version = 1"),
    (with_(FLAT, boundaries={}), "expected at least one of episode_id, done, offsets in [boundaries]"),
    (with_(FLAT, boundaries=None), "expected at least one of episode_id, done, offsets"),
    (with_(FLAT, boundaries={"done": []}), "expected a key or a non-empty list of keys, got []"),
    (with_(FLAT, boundaries={"done": ["t", "t"]}), "expected each done key once"),
    (with_(FLAT, boundaries={"done": 3}), "key boundaries.done"),
    (with_(FLAT, boundaries={"offsets": ["o"]}), "key boundaries.offsets"),
    (with_(FLAT, keys={"action": "a", "observation": "o", "termination": 5}), "key keys.termination"),
    (with_(FLAT, episode_groups="runs/*"), "'episode_groups' is only for shape = \"grouped\""),
    (with_(GROUPED, boundaries={"done": "d"}), "'boundaries' is only for shape = \"flat\""),
    (with_(GROUPED, file_pattern="*.npz"), "'file_pattern' is only for shape = \"per-file\""),
    (with_(GROUPED, episode_groups=None), "missing 'episode_groups'"),
    (with_(GROUPED, episode_groups="runs"), "with '*' components"),
    (with_(GROUPED, episode_groups="runs//*"), "with '*' components"),
    (with_(PER_FILE, file_pattern="sub/*.npz"), "without '/'"),
    (with_(FLAT, keys={"observation": "o"}), "missing the action key"),
    (with_(FLAT, keys={"action": "a"}), "no observations"),
    (with_(GROUPED, keys={"action": "a", "observation": "o"}), "either [keys] observation or a [fields] table"),
    (with_(GROUPED, keys={"action": "a", "next_observation": "n"}),
     "next_observation with [fields] needs every field to take its columns from one array"),
    (with_(FLAT, keys={"action": "a", "observation": {"key": "s"}}), "expected a table with exactly 'key' and 'columns'"),
    (with_(FLAT, keys={"action": "a", "observation": {"key": "s", "columns": []}}),
     "key keys.observation.columns: expected a non-empty list of column indices"),
    (with_(FLAT, keys={"action": "a", "observation": {"key": "s", "columns": [-1]}}), "indices >= 0"),
    (with_(FLAT, keys={"action": "a", "observation": {"key": "s", "columns": "3:3"}}), "start < stop"),
    (with_(FLAT, keys={"action": {"key": "s", "columns": [0]}, "observation": "o"}),
     "key keys.action: expected a key name (a string)"),
    (with_(FLAT, keys={"action": "a", "observation": {"key": "s", "columns": [0, 1]},
                       "next_observation": {"key": "n", "columns": [0]}}), "selects 1 columns, observation selects 2"),
    (with_(FLAT, keys={"action": "a", "next_observation": {"key": "n", "columns": [0]}},
           fields={"x": {"key": "s", "columns": [0]}}), "give next_observation as the array's key"),
    (with_(FLAT, keys={"observation": "", "action": "a"}), "expected a non-empty string"),
    (with_(FLAT, keys={"observation": 3, "action": "a"}), "key keys.observation: expected a non-empty string, got 3"),
    (with_(FLAT, keys="obs"), "expected a table [keys]"),
])
def test_invalid_layouts(doc, expected):
    assert expected in err(doc)


def test_load_layout_file_errors(tmp_path):
    with pytest.raises(LayoutError, match="file not found"):
        load_layout(tmp_path / "missing.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("shape = grouped\n")
    with pytest.raises(LayoutError, match="not valid TOML"):
        load_layout(bad)


def test_every_example_in_the_user_docs_parses():
    import re
    from pathlib import Path

    text = (Path(__file__).resolve().parents[2] / "docs" / "layout.md").read_text()
    blocks = re.findall(r"```toml\n(.*?)```", text, flags=re.S)
    assert len(blocks) >= 5
    for block in blocks:
        doc = tomllib.loads(block)
        if "shape" not in doc:                  # a fragment ([fields] only)
            continue
        lay = parse_layout(doc, "docs/layout.md")
        assert parse_layout(tomllib.loads(layout_to_toml(lay))) == lay


def test_column_keys_parse_and_round_trip():
    from goalkit.logs.columns import ColumnKey

    doc = {"shape": "flat", "keys": {"action": "act", "next_observation": "next_state",
                                     "task_goal": {"key": "target", "columns": "1:3"}},
           "fields": {"tip": {"key": "state", "columns": [8, 9]}, "rest": {"key": "state", "columns": "0:8"},
                      "joint": "state"},
           "boundaries": {"done": ["term", "trunc"], "episode_id": "run"}}
    lay = parse_layout(doc, "lay.toml")
    assert lay.fields[0] == ("tip", ColumnKey("state", [8, 9]))
    assert lay.fields[1][1].columns == tuple(range(8))
    assert lay.keys.task_goal == ColumnKey("target", [1, 2])
    assert lay.keys.task_goal != "target" and ColumnKey("s", [0]) != ColumnKey("s", [1])
    assert lay.next_observation_keys() == [ColumnKey("next_state", [8, 9]), ColumnKey("next_state", range(8)),
                                           "next_state"]
    text = layout_to_toml(lay)
    assert 'tip = {key = "state", columns = [8, 9]}' in text and 'done = ["term", "trunc"]' in text
    assert parse_layout(tomllib.loads(text), "again.toml") == lay

"""Fields from columns: ``{key = "state", columns = [...]}`` for fields, observation, next_observation
and task goals, in every shape that reads them; an index out of range is one line, exit 2."""

from __future__ import annotations

import h5py
import numpy as np
import pytest
from click.testing import CliRunner

from goalkit.cli import main as cli_main
from goalkit.errors import LogError
from goalkit.logs import iter_chunks, open_logs
from goalkit.logs.layout import layout_to_toml, parse_layout

RNG = np.random.default_rng(7)
LENGTHS = [5, 3, 7]
STATES = [RNG.normal(size=(n + 1, 6)) for n in LENGTHS]       # T+1 rows of a 6-column state
ACTS = [RNG.normal(size=(n, 2)) for n in LENGTHS]
TARGET = [np.repeat(RNG.normal(size=(1, 4)), n, axis=0) for n in LENGTHS]

FIELDS = {"tip": {"key": "state", "columns": [4, 5]}, "joints": {"key": "state", "columns": "0:3"}}
WANT_OBS = np.concatenate([np.concatenate([s[:, 4:6], s[:, 0:3]], axis=1) for s in STATES])
WANT_GOAL = np.concatenate([t[:, [3, 1]] for t in TARGET])


def _all(src):
    chunks = list(iter_chunks(src, max_transitions=6))
    return (np.concatenate([c.observations for c in chunks]), np.concatenate([c.task_goals for c in chunks]),
            src)


def stores(tmp_path):
    goal = {"key": "target", "columns": [3, 1]}
    with h5py.File(tmp_path / "grouped.h5", "w") as f:
        for i in range(len(LENGTHS)):
            g = f.create_group(f"runs/r{i}")
            g["state"], g["u"], g["target"] = STATES[i], ACTS[i], TARGET[i]
    yield "grouped", tmp_path / "grouped.h5", {"shape": "grouped", "episode_groups": "runs/*",
                                               "keys": {"action": "u", "task_goal": goal}, "fields": FIELDS}
    (tmp_path / "files").mkdir()
    for i in range(len(LENGTHS)):
        np.savez(tmp_path / "files" / f"e{i}.npz", state=STATES[i], u=ACTS[i], target=TARGET[i])
    yield "per-file", tmp_path / "files", {"shape": "per-file", "keys": {"action": "u", "task_goal": goal},
                                           "fields": FIELDS}
    flat = {"state": np.concatenate([s[:-1] for s in STATES]), "state2": np.concatenate([s[1:] for s in STATES]),
            "u": np.concatenate(ACTS), "target": np.concatenate(TARGET),
            "run": np.repeat(np.arange(3), LENGTHS)}
    np.savez(tmp_path / "flat.npz", **flat)
    yield "flat pairs, fields", tmp_path / "flat.npz", {
        "shape": "flat", "keys": {"action": "u", "next_observation": "state2", "task_goal": goal},
        "fields": FIELDS, "boundaries": {"episode_id": "run"}}
    with h5py.File(tmp_path / "flat.h5", "w") as f:
        for k, v in flat.items():
            f[k] = v
    yield "flat pairs, observation columns", tmp_path / "flat.h5", {
        "shape": "flat", "keys": {"action": "u", "observation": {"key": "state", "columns": [4, 5, 0, 1, 2]},
                                  "next_observation": "state2", "task_goal": goal},
        "boundaries": {"episode_id": "run"}}


def test_columns_are_read_in_every_shape(tmp_path):
    names = []
    for name, path, layout in stores(tmp_path):
        obs, goals, src = _all(open_logs(path, layout))
        assert src.lengths.tolist() == LENGTHS, name
        np.testing.assert_array_equal(obs, WANT_OBS, err_msg=name)
        np.testing.assert_array_equal(goals, WANT_GOAL, err_msg=name)
        if "fields" in layout:
            assert src.fields == {"tip": (0, 2), "joints": (2, 5)}, name
        # the layout written back reads the same
        again = parse_layout(__import__("tomllib").loads(layout_to_toml(parse_layout(layout))))
        np.testing.assert_array_equal(_all(open_logs(path, again))[0], WANT_OBS, err_msg=name)
        names.append(name)
    assert len(names) == 4


def test_a_broken_pair_names_the_next_observation_key(tmp_path):
    flat = {"state": np.concatenate([s[:-1] for s in STATES]), "state2": np.concatenate([s[1:] for s in STATES]),
            "u": np.concatenate(ACTS), "run": np.repeat(np.arange(3), LENGTHS)}
    flat["state2"][1, 5] += 1.0                   # column 5 (field tip) of episode 0, step 1
    np.savez(tmp_path / "broken.npz", **flat)
    layout = {"shape": "flat", "keys": {"action": "u", "next_observation": "state2"}, "fields": FIELDS,
              "boundaries": {"episode_id": "run"}}
    with pytest.raises(LogError, match=r"key state2: episode 0: step 1: next_observation at step 1 differs"):
        list(iter_chunks(open_logs(tmp_path / "broken.npz", layout)))
    layout["fields"] = {"joints": FIELDS["joints"]}   # the damaged column is not read: no error
    assert open_logs(tmp_path / "broken.npz", layout).read(0, 3).observations.shape == (18, 3)


@pytest.mark.parametrize("shape", ["flat", "grouped", "per-file"])
def test_a_column_out_of_range_is_one_line_with_exit_2(tmp_path, shape):
    for name, path, layout in stores(tmp_path):
        if layout["shape"] == shape:
            break
    layout["fields"] = {"tip": {"key": "state", "columns": [4, 6]}, "joints": FIELDS["joints"]}
    lay = tmp_path / "lay.toml"
    lay.write_text(layout_to_toml(parse_layout(layout)))
    res = CliRunner().invoke(cli_main, ["scan", str(path), "--layout", str(lay)])
    assert res.exit_code == 2, res.output
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in res.stderr
    line = lines[0]
    assert str(path.name) in line and "state" in line and "column 6 is out of range" in line
    assert "the array has 6 columns" in line and "expected indices 0 .. 5" in line
    if shape != "flat":
        assert "episode 0" in line


def test_a_column_of_a_one_dimensional_array(tmp_path):
    np.savez(tmp_path / "one.npz", x=np.arange(4.0), u=np.zeros((3, 1)), d=np.array([0, 0, 1]))
    layout = {"shape": "flat", "keys": {"action": "u", "observation": {"key": "x", "columns": [0]}},
              "boundaries": {"done": "d"}}
    assert open_logs(tmp_path / "one.npz", layout).read(0, 1).observations[:, 0].tolist() == [0, 1, 2, 3]
    layout["keys"]["observation"]["columns"] = [1]
    with pytest.raises(LogError, match=r"one.npz: key x: column 1 is out of range: the array has 1 column "):
        open_logs(tmp_path / "one.npz", layout)

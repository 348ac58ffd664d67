"""The demo's files: byte-identical by seed, HDF5 structure, layout and recipe, read back."""

from __future__ import annotations

import re
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest

from goalkit.demo import make_demo
from goalkit.demo.files import GOAL_FIELDS, THRESHOLD
from goalkit.demo.tasks import WATER_RADIUS
from goalkit.errors import GoalkitError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

INTERNALS = Path(__file__).resolve().parents[2] / "docs" / "internals.md"
EPISODES = 40


@pytest.fixture(scope="module")
def demo_dir(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    result = make_demo(out, episodes=EPISODES, seed=7, frames=True)
    return out, result


def _bytes(path):
    return Path(path).read_bytes()


def test_same_seed_same_bytes_other_seed_other_bytes(tmp_path, demo_dir):
    _, first = demo_dir
    again = make_demo(tmp_path / "again", episodes=EPISODES, seed=7, frames=True)
    other = make_demo(tmp_path / "other", episodes=EPISODES, seed=8, frames=True)
    for key in ("logs", "layout", "recipe"):
        assert _bytes(first[key]) == _bytes(again[key])
    assert _bytes(first["logs"]) != _bytes(other["logs"])
    with h5py.File(first["logs"]) as a, h5py.File(other["logs"]) as b:
        assert not np.array_equal(a["bench/ep_00000/head"][0], b["bench/ep_00000/head"][0])


def test_episodes_do_not_depend_on_how_many_are_written(tmp_path, demo_dir):
    # episode i is drawn from (seed, i) only: a shorter run holds the same first episodes
    _, full = demo_dir
    short = make_demo(tmp_path / "short", episodes=5, seed=7, frames=True)
    with h5py.File(full["logs"]) as a, h5py.File(short["logs"]) as b:
        for e in range(5):
            name = f"bench/ep_{e:05d}"
            for key in ("head", "trays", "action", "success", "camera"):
                np.testing.assert_array_equal(a[f"{name}/{key}"][()], b[f"{name}/{key}"][()])


def test_hdf5_structure(demo_dir):
    out, result = demo_dir
    assert set(result) == {"logs", "layout", "recipe", "episodes", "steps"}
    assert result["episodes"] == EPISODES
    steps = 0
    with h5py.File(result["logs"]) as f:
        names = sorted(f["bench"])
        assert names == [f"ep_{e:05d}" for e in range(EPISODES)]
        K = int(f.attrs["trays"])
        assert K == 3
        for name in names:
            g = f["bench"][name]
            T = g["action"].shape[0]
            steps += T
            assert g["head"].shape == (T + 1, 3) and g["head_velocity"].shape == (T + 1, 3)
            assert g["trays"].shape == (T + 1, K)
            assert g["action"].shape == (T, 3) and g["action"].dtype == np.float32
            assert g["reward"].shape == (T,) and g["success"].shape == (T,)
            assert g["task_goal"].shape == (T, 3 + K)
            assert g["camera"].shape == (T + 1, 32, 32) and g["camera"].dtype == np.uint8
            for ds in g.values():          # chunked along time, whole rows per chunk
                assert ds.chunks is not None and ds.chunks[1:] == ds.shape[1:]
                assert ds.chunks[0] <= 64
                assert not ds.id.get_create_plist().get_obj_track_times()
            assert g.attrs["controller"] in ("scripted", "noisy", "random")
            assert 0 <= int(g.attrs["task"]) < 2 * K
    assert steps == result["steps"]
    assert sorted(p.name for p in out.iterdir()) == ["gantry-layout.toml", "gantry-logs.h5",
                                                     "gantry-recipe.toml"]  # no temporary files


def test_frames_show_the_head_where_it_is(demo_dir):
    _, result = demo_dir
    with h5py.File(result["logs"]) as f:
        length, depth = f.attrs["bench_size"]
        g = f["bench/ep_00003"]
        cam, head = g["camera"][()], g["head"][()]
    assert cam.max() >= 200
    peak = cam.reshape(len(cam), -1).argmax(axis=1)
    row, col = np.divmod(peak, 32)
    # the brightest pixel lies within one pixel of the head's projection
    assert (np.abs(col - head[:, 0] / length * 32 + 0.5) <= 1.0).all()
    assert (np.abs(row - head[:, 1] / depth * 32 + 0.5) <= 1.0).all()


def _documented_toml(section_title):
    """The ```toml block under a section of docs/internals.md, parsed (the shared schema)."""
    text = INTERNALS.read_text()
    part = text[text.index(section_title):]
    block = re.search(r"```toml\n(.*?)```", part, re.S).group(1)
    return tomllib.loads(block)


def _keys(doc, prefix=""):
    out = set()
    for k, v in doc.items():
        out.add(prefix + k)
        if isinstance(v, dict):
            out |= _keys(v, prefix + k + ".")
    return out


def test_layout_parses_with_documented_keys(demo_dir):
    out, result = demo_dir
    doc = tomllib.loads(Path(result["layout"]).read_text())
    schema = _documented_toml("## Layout file")
    documented = _keys(schema) | {"fields.head_velocity", "fields.trays", "fields.head"}
    assert _keys(doc) <= documented
    assert doc["shape"] == "grouped" and doc["episode_groups"] == "bench/*"
    assert doc["keys"]["frame"] == "camera"
    assert list(doc["fields"]) == ["head", "head_velocity", "trays"]
    with h5py.File(result["logs"]) as f:          # every key names something in each episode
        g = f["bench/ep_00000"]
        for role, key in doc["keys"].items():
            assert key in g or key in g.attrs, role
        for key in doc["fields"].values():
            assert key in g
    from goalkit.logs.layout import parse_layout
    lay = parse_layout(doc, result["layout"])
    assert lay.keys.task_goal == "task_goal" and [n for n, _ in lay.fields] == list(doc["fields"])


def test_layout_without_frames_has_no_frame_key(tmp_path):
    result = make_demo(tmp_path, episodes=2, seed=1)
    doc = tomllib.loads(Path(result["layout"]).read_text())
    assert "frame" not in doc["keys"]
    with h5py.File(result["logs"]) as f:
        assert "camera" not in f["bench/ep_00000"]


def test_recipe_parses_with_documented_keys(demo_dir):
    out, result = demo_dir
    doc = tomllib.loads(Path(result["recipe"]).read_text())
    schema = _documented_toml("## Recipe")
    relabel_names = {"original", "final", "future", "episode", "geometric"}  # internals: strategy codes
    documented = _keys(schema) | {f"relabel.weights.{n}" for n in relabel_names}
    assert _keys(doc) <= documented
    assert doc["goal"]["fields"] == list(GOAL_FIELDS) == ["head", "trays"]
    assert doc["reward"] == {"distance": "euclidean", "threshold": WATER_RADIUS, "inclusive": True,
                             "form": "sparse", "end_on_reach": False}
    assert THRESHOLD == 0.04
    assert doc["relabel"]["goals_per_transition"] == 5
    assert set(doc["relabel"]["weights"]) == {"original", "final", "future", "geometric"}
    assert doc["split"]["validation"] == 0.1
    assert doc["seed"] == 7
    recipe_dir = Path(result["recipe"]).parent
    assert (recipe_dir / doc["logs"]["path"]).resolve() == Path(result["logs"]).resolve()
    assert (recipe_dir / doc["logs"]["layout"]).resolve() == Path(result["layout"]).resolve()
    assert doc["output"]["path"] == "gantry-goals.h5"
    layout = tomllib.loads(Path(result["layout"]).read_text())
    assert set(doc["goal"]["fields"]) <= set(layout["fields"])


def test_read_back_through_open_logs(demo_dir):
    from goalkit.logs import open_logs

    _, result = demo_dir
    source = open_logs(result["logs"], result["layout"])
    with h5py.File(result["logs"]) as f:
        lengths = [f[f"bench/ep_{e:05d}/action"].shape[0] for e in range(EPISODES)]
        head3 = f["bench/ep_00003/head"][()]
        tasks = [int(f[f"bench/ep_{e:05d}"].attrs["task"]) for e in range(EPISODES)]
    assert len(source.lengths) == EPISODES
    assert np.asarray(source.lengths).tolist() == lengths
    assert int(np.sum(source.lengths)) == result["steps"]
    chunk = source.read(0, EPISODES)
    assert chunk.num_episodes == EPISODES and chunk.num_transitions == result["steps"]
    assert dict(chunk.fields) == {"head": (0, 3), "head_velocity": (3, 6), "trays": (6, 9)}
    rows = chunk.state_row(3, np.arange(lengths[3] + 1))
    np.testing.assert_array_equal(chunk.observations[rows, 0:3], head3)
    assert chunk.task_ids.tolist() == tasks
    assert chunk.frames.shape == (result["steps"] + EPISODES, 32, 32)
    assert chunk.task_goals.shape == (result["steps"], 6)


def test_output_directory_that_is_a_file_is_refused(tmp_path):
    target = tmp_path / "taken"
    target.write_text("x")
    with pytest.raises(GoalkitError, match="expected a directory"):
        make_demo(target, episodes=2)


def test_bad_arguments_are_refused(tmp_path):
    with pytest.raises(GoalkitError, match="episodes"):
        make_demo(tmp_path, episodes=0)
    with pytest.raises(GoalkitError, match="trays"):
        make_demo(tmp_path, episodes=2, trays=7)
    assert list(tmp_path.iterdir()) == []


def test_failed_rename_leaves_no_file(tmp_path):
    (tmp_path / "gantry-logs.h5").mkdir()  # the output path is taken by a directory
    with pytest.raises(GoalkitError, match="gantry-logs.h5"):
        make_demo(tmp_path, episodes=2)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["gantry-logs.h5"]
    assert (tmp_path / "gantry-logs.h5").is_dir()

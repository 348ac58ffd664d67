"""Parquet step tables (written with pyarrow, both vector encodings) read equal to the HDF5
original, and `goalkit build` on them gives the same rows."""

import h5py
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from click.testing import CliRunner

from goalkit.cli import main
from goalkit.demo import make_demo
from goalkit.errors import LogError
from goalkit.logs import open_logs


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    d = tmp_path_factory.mktemp("tabledemo")
    make_demo(d, episodes=12, seed=3)
    return d


def _fixed(values):
    """A fixed-size list column (pyarrow.list_(type, size)) from a (rows, width) array."""
    values = np.ascontiguousarray(values)
    flat = pa.array(values.reshape(-1))
    return pa.FixedSizeListArray.from_arrays(flat, values.shape[1])


def write_table(demo, out, encoding, row_group_size=37, null_last=True):
    """The demo log as one row per state; the last row of an episode has a null action."""
    es = open_logs(demo / "gantry-logs.h5", demo / "gantry-layout.toml").read(0, 12)
    E, so = es.num_episodes, es.state_offsets()
    ep_col = np.repeat(es.episode_ids, es.lengths + 1)
    # step-level columns padded with one row per episode (the state with no action)
    step_rows = es.current_state_rows()
    def pad(x):
        full = np.zeros((so[-1],) + x.shape[1:], dtype=x.dtype)
        full[step_rows] = x
        return full
    valid = np.zeros(so[-1], dtype=bool)
    valid[step_rows] = True
    cols = {"episode": pa.array(ep_col)}
    f = es.fields
    obs = es.observations
    if encoding == "list":
        cols["head"] = _fixed(obs[:, slice(*f["head"])])
        cols["head_velocity"] = _fixed(obs[:, slice(*f["head_velocity"])])
        cols["trays"] = _fixed(obs[:, slice(*f["trays"])])
        act = _fixed(pad(es.actions))
        if null_last:   # the action of the last row of each episode is null
            act = pa.FixedSizeListArray.from_arrays(act.values, 3, mask=pa.array(~valid))
        cols["action"] = act
        cols["task_goal"] = _fixed(pad(es.task_goals))
    else:
        for name in ("head", "head_velocity", "trays"):
            a, b = f[name]
            for i in range(b - a):
                cols[f"{name}_{i}"] = pa.array(obs[:, a + i])
        for i in range(3):
            cols[f"action_{i}"] = pa.array(pad(es.actions)[:, i], mask=~valid if null_last else None)
        for i in range(es.task_goals.shape[1]):
            cols[f"goal_{i}"] = pa.array(pad(es.task_goals)[:, i])
    cols["reward"] = pa.array(pad(es.rewards))
    cols["success"] = pa.array(pad(es.success.astype(np.uint8)))
    cols["task"] = pa.array(np.repeat(es.task_ids, es.lengths + 1))
    pq.write_table(pa.table(cols), out, row_group_size=row_group_size)
    if encoding == "list":
        keys = {"action": "action", "task_goal": "task_goal"}
        fields = {n: n for n in ("head", "head_velocity", "trays")}
    else:
        keys = {"action": "action_0,action_1,action_2",
                "task_goal": ",".join(f"goal_{i}" for i in range(es.task_goals.shape[1]))}
        fields = {n: ",".join(f"{n}_{i}" for i in range(f[n][1] - f[n][0]))
                  for n in ("head", "head_velocity", "trays")}
    keys.update(reward="reward", success="success", task="task")
    layout = {"shape": "table", "keys": keys, "fields": fields, "table": {"episode_column": "episode"}}
    return es, layout


@pytest.mark.parametrize("encoding", ["list", "scalars"])
def test_table_reads_equal_to_the_hdf5_original(demo, tmp_path, encoding):
    es, layout = write_table(demo, tmp_path / "steps.parquet", encoding)
    src = open_logs(tmp_path / "steps.parquet", layout)
    assert src.lengths.tolist() == es.lengths.tolist()
    assert src.fields == dict(es.fields)
    for a, b in [(0, 12), (3, 7), (11, 12)]:     # chunks that cut row groups anywhere
        got, want = src.read(a, b), es.select(a, b)
        for name in ("observations", "actions", "rewards", "success", "task_ids", "task_goals"):
            np.testing.assert_array_equal(getattr(got, name), getattr(want, name), err_msg=name)


def _rows(path):
    with h5py.File(path, "r") as f:
        out = {}
        f.visititems(lambda n, o: out.__setitem__(n, o[()]) if isinstance(o, h5py.Dataset)
                     and "provenance" not in n else None)
    return out


def test_build_on_a_table_gives_the_same_rows(demo, tmp_path):
    import tomllib

    from goalkit.logs.layout import layout_to_toml, parse_layout

    _, layout = write_table(demo, tmp_path / "steps.parquet", "list")
    (tmp_path / "table-layout.toml").write_text(layout_to_toml(parse_layout(layout)))
    text = (demo / "gantry-recipe.toml").read_text()
    outs = {}
    for name, logs, lay in [("h5", demo / "gantry-logs.h5", demo / "gantry-layout.toml"),
                            ("pq", tmp_path / "steps.parquet", tmp_path / "table-layout.toml")]:
        t = text.replace('path = "gantry-logs.h5"', f'path = "{logs}"')
        t = t.replace('layout = "gantry-layout.toml"', f'layout = "{lay}"')
        t = t.replace('path = "gantry-goals.h5"', f'path = "{tmp_path / (name + ".h5")}"')
        tomllib.loads(t)
        (tmp_path / f"{name}.toml").write_text(t)
        res = CliRunner().invoke(main, ["build", str(tmp_path / f"{name}.toml"), "--quiet"])
        assert res.exit_code == 0, res.output
        outs[name] = _rows(tmp_path / f"{name}.h5")
        res = CliRunner().invoke(main, ["verify", str(tmp_path / f"{name}.h5")])
        assert res.exit_code == 0, res.output
    assert outs["h5"].keys() == outs["pq"].keys() and len(outs["h5"]) > 3
    for k in outs["h5"]:
        np.testing.assert_array_equal(outs["h5"][k], outs["pq"][k], err_msg=k)
    # verify re-reads the table by checksum: a rewritten table is found
    t = pq.read_table(tmp_path / "steps.parquet")
    r = t.column("reward").to_numpy().copy()
    r[0] += 1.0
    pq.write_table(t.set_column(t.schema.get_field_index("reward"), "reward", pa.array(r)),
                   tmp_path / "steps.parquet", row_group_size=37)
    res = CliRunner().invoke(main, ["verify", str(tmp_path / "pq.h5")])
    assert res.exit_code != 0 and "steps.parquet" in res.output, res.output


def test_table_errors_name_the_column(demo, tmp_path):
    _, layout = write_table(demo, tmp_path / "steps.parquet", "list")
    layout["keys"]["action"] = "actoin"
    with pytest.raises(LogError, match=r"key actoin: no such column.*closest: action"):
        open_logs(tmp_path / "steps.parquet", layout)
    res = CliRunner().invoke(main, ["scan", str(tmp_path / "steps.parquet"), "--layout",
                                    str(_write(tmp_path, layout))])
    assert res.exit_code == 2 and len(res.output.strip().splitlines()) == 1, res.output


def _write(tmp_path, layout):
    from goalkit.logs.layout import layout_to_toml, parse_layout
    p = tmp_path / "lay.toml"
    p.write_text(layout_to_toml(parse_layout(layout)))
    return p


def test_table_problems(demo, tmp_path):
    es, layout = write_table(demo, tmp_path / "steps.parquet", "list")
    t = pq.read_table(tmp_path / "steps.parquet")
    # an episode whose rows come back later
    ep = t.column("episode").to_numpy().copy()
    ep[-3:] = 0
    pq.write_table(t.set_column(0, "episode", pa.array(ep)), tmp_path / "split.parquet")
    with pytest.raises(LogError, match="episode 0 is split into several runs of rows"):
        open_logs(tmp_path / "split.parquet", layout)
    # a variable-length list column
    var = pa.array([list(r) for r in es.observations[:, :3]], type=pa.list_(pa.float64()))
    pq.write_table(t.set_column(t.schema.get_field_index("head"), "head", var), tmp_path / "var.parquet")
    with pytest.raises(LogError, match="key head: is a variable-length list column"):
        open_logs(tmp_path / "var.parquet", layout)
    # a null observation is a NaN: one line naming the episode and the step
    head = np.asarray(t.column("head").combine_chunks().values).reshape(-1, 3)
    mask = np.zeros(len(head), bool)
    mask[5] = True
    nulls = pa.FixedSizeListArray.from_arrays(pa.array(head.reshape(-1)), 3, mask=pa.array(mask))
    pq.write_table(t.set_column(t.schema.get_field_index("head"), "head", nulls), tmp_path / "null.parquet")
    with pytest.raises(LogError, match="key head: episode 0: step 5: expected finite values"):
        open_logs(tmp_path / "null.parquet", layout).read(0, 2)

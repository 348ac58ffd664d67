"""A Gymnasium MuJoCo arm (Reacher-v5) recorded as ROS 2 bags -- joint angles on a joint-state
topic, the fingertip on a pose topic, actions on a command topic -- builds the same set as the
same recording stored as HDF5, row for row."""

import h5py
import numpy as np
import pytest
from click.testing import CliRunner

gym = pytest.importorskip("gymnasium")
pytest.importorskip("mujoco")
from rosbags.rosbag2 import StoragePlugin, Writer  # noqa: E402
from rosbags.typesys import Stores, get_typestore  # noqa: E402

from goalkit.cli import main  # noqa: E402
from goalkit.demo import make_demo  # noqa: E402

T0 = 1_800_000_000 * 10**9


def record(episodes=6, seed=0):
    env = gym.make("Reacher-v5")
    rng = np.random.default_rng(seed)
    out = []
    for e in range(episodes):
        env.reset(seed=seed + e)
        u = env.unwrapped
        qpos, tip, act = [u.data.qpos[:2].copy()], [u.get_body_com("fingertip").copy()], []
        done = False
        while not done:
            a = rng.uniform(-1, 1, size=2)
            _, _, term, trunc, _ = env.step(a)
            done = term or trunc
            act.append(a)
            qpos.append(u.data.qpos[:2].copy())
            tip.append(u.get_body_com("fingertip").copy())
        out.append({"qpos": np.array(qpos), "tip": np.array(tip), "act": np.array(act), "dt": u.dt})
    env.close()
    return out


def write_bags(folder, eps):
    ts = get_typestore(Stores.ROS2_HUMBLE)
    T = ts.types
    for i, ep in enumerate(eps):
        dt = int(round(ep["dt"] * 1e9))             # the simulator's step, 0.02 s
        with Writer(folder / f"take{i}", version=9, storage_plugin=StoragePlugin.MCAP) as w:
            cj = w.add_connection("/arm/joint_states", "sensor_msgs/msg/JointState", typestore=ts)
            cp = w.add_connection("/arm/fingertip", "geometry_msgs/msg/PoseStamped", typestore=ts)
            cc = w.add_connection("/arm/command", "std_msgs/msg/Float64MultiArray", typestore=ts)
            for k in range(len(ep["qpos"])):
                t = T0 + k * dt
                h = T["std_msgs/msg/Header"](stamp=T["builtin_interfaces/msg/Time"](sec=t // 10**9, nanosec=t % 10**9),
                                             frame_id="world")
                # joint angles in radians, positions in metres (REP 103)
                js = T["sensor_msgs/msg/JointState"](header=h, name=["joint0", "joint1"], position=ep["qpos"][k],
                                                     velocity=np.zeros(0), effort=np.zeros(0))
                x, y, z = ep["tip"][k]
                pose = T["geometry_msgs/msg/Pose"](position=T["geometry_msgs/msg/Point"](x=x, y=y, z=z),
                                                   orientation=T["geometry_msgs/msg/Quaternion"](x=0.0, y=0.0, z=0.0, w=1.0))
                w.write(cj, t, ts.serialize_cdr(js, "sensor_msgs/msg/JointState"))
                w.write(cp, t, ts.serialize_cdr(T["geometry_msgs/msg/PoseStamped"](header=h, pose=pose),
                                                "geometry_msgs/msg/PoseStamped"))
                if k < len(ep["act"]):
                    cmd = T["std_msgs/msg/Float64MultiArray"](
                        layout=T["std_msgs/msg/MultiArrayLayout"](dim=[], data_offset=0), data=ep["act"][k])
                    w.write(cc, t, ts.serialize_cdr(cmd, "std_msgs/msg/Float64MultiArray"))


def _rows(path):
    out = {}
    with h5py.File(path, "r") as f:
        f.visititems(lambda n, o: out.__setitem__(n, o[()]) if isinstance(o, h5py.Dataset)
                     and "provenance" not in n else None)
    return out


def test_reacher_bags_build_the_same_set_as_hdf5(tmp_path):
    eps = record()
    with h5py.File(tmp_path / "reacher.h5", "w") as f:
        for i, ep in enumerate(eps):
            g = f.create_group(f"runs/ep{i}")
            g["joints"], g["fingertip"], g["action"] = ep["qpos"], ep["tip"], ep["act"]
    (tmp_path / "h5.toml").write_text('version = 1\nshape = "grouped"\nepisode_groups = "runs/*"\n'
                                      '[keys]\naction = "action"\n[fields]\njoints = "joints"\n'
                                      'fingertip = "fingertip"\n')
    (tmp_path / "bags").mkdir()
    write_bags(tmp_path / "bags", eps)
    (tmp_path / "bag.toml").write_text(
        'version = 1\nshape = "bag"\n[keys]\naction = "/arm/command:data"\n[fields]\n'
        'joints = "/arm/joint_states:position"\nfingertip = "/arm/fingertip:pose.position"\n'
        '[bag]\nstep_period = 0.02\nepisodes = "per-bag"\n')
    make_demo(tmp_path / "demo", episodes=4, seed=0)
    recipe = (tmp_path / "demo" / "gantry-recipe.toml").read_text()
    recipe = recipe.replace('fields = ["head", "trays"]', 'fields = ["fingertip"]')
    recipe = recipe.replace("original = 1", "original = 0").replace("threshold = 0.04", "threshold = 0.02")
    rows = {}
    for name, logs in (("h5", tmp_path / "reacher.h5"), ("bag", tmp_path / "bags")):
        r = recipe.replace('path = "gantry-logs.h5"', f'path = "{logs}"')
        r = r.replace('layout = "gantry-layout.toml"', f'layout = "{tmp_path / (name + ".toml")}"')
        r = r.replace('path = "gantry-goals.h5"', f'path = "{tmp_path / (name + "-goals.h5")}"')
        (tmp_path / f"{name}-recipe.toml").write_text(r)
        res = CliRunner().invoke(main, ["build", str(tmp_path / f"{name}-recipe.toml"), "--quiet"])
        assert res.exit_code == 0, res.output
        rows[name] = _rows(tmp_path / f"{name}-goals.h5")
    assert rows["h5"].keys() == rows["bag"].keys() and len(rows["h5"]) > 3
    for k in rows["h5"]:
        np.testing.assert_array_equal(rows["h5"][k], rows["bag"][k], err_msg=k)
    n = sum(len(ep["act"]) for ep in eps)
    assert any(v.shape[0] >= n for v in rows["bag"].values() if hasattr(v, "shape") and v.ndim)

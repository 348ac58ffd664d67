"""A three-topic ROS 2 bag recording goes scan -> proposed layout -> build -> verify with no
hand-written code."""

import json

import h5py
import numpy as np
from click.testing import CliRunner

from bag_testdata import CMD, JOINTS, TIP, make_truth, write_bag
from goalkit.cli import main
from goalkit.demo import make_demo


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def test_scan_propose_build_verify(tmp_path):
    folder = tmp_path / "takes"
    truths = [make_truth(seed=i, segments=((0.0, 1.0 + 0.2 * i),)) for i in range(6)]
    for i, tr in enumerate(truths):
        write_bag(folder / f"take{i}", tr, "mcap")
    res = run("scan", folder, "--write-layout", tmp_path / "layout.toml", "--json", "--quiet")
    assert res.exit_code == 0, res.output
    rep = json.loads(res.output)
    topics = {t["topic"]: t for t in rep["topics"]}
    assert set(topics) == {JOINTS, TIP, CMD}
    assert topics[JOINTS]["type"] == "sensor_msgs/msg/JointState"
    assert topics[JOINTS]["count"] == sum(tr[JOINTS][0].size for tr in truths)
    # about 173 Hz less 5 % dropped messages
    assert 150 < topics[JOINTS]["rate_hz"] < 175 and 40 < topics[CMD]["rate_hz"] < 48
    assert rep["episodes"] == 6 and rep["layout_proposed"]
    text = (tmp_path / "layout.toml").read_text()
    assert 'shape = "bag"' in text and f'action = "{CMD}:data"' in text
    assert f'nozzle_pose = "{TIP}:pose.position"' in text and f'step_topic = "{CMD}"' in text
    # the human-readable listing names every topic with its type
    res = run("scan", folder)
    assert res.exit_code == 0 and "sensor_msgs/msg/JointState" in res.output and "proposed layout" in res.output

    make_demo(tmp_path / "demo", episodes=4, seed=0)
    recipe = (tmp_path / "demo" / "gantry-recipe.toml").read_text()
    recipe = recipe.replace('path = "gantry-logs.h5"', f'path = "{folder}"')
    recipe = recipe.replace('layout = "gantry-layout.toml"', f'layout = "{tmp_path / "layout.toml"}"')
    recipe = recipe.replace('fields = ["head", "trays"]', 'fields = ["nozzle_pose"]')
    recipe = recipe.replace('path = "gantry-goals.h5"', f'path = "{tmp_path / "goals.h5"}"')
    recipe = recipe.replace("original = 1", "original = 0").replace("validation = 0.1", "validation = 0.2")
    (tmp_path / "recipe.toml").write_text(recipe)
    res = run("build", tmp_path / "recipe.toml", "--quiet")
    assert res.exit_code == 0, res.output
    res = run("verify", tmp_path / "goals.h5")
    assert res.exit_code == 0, res.output
    # two worker processes read the bags too (the source is pickled): the same bytes
    res = run("build", tmp_path / "recipe.toml", "--quiet", "--workers", "2", "--out",
              tmp_path / "goals2.h5")
    assert res.exit_code == 0, res.output
    with h5py.File(tmp_path / "goals.h5") as f, h5py.File(tmp_path / "goals2.h5") as g:
        names = []
        f.visit(lambda n: names.append(n) if isinstance(f[n], h5py.Dataset) and "provenance" not in n else None)
        assert names
        for n in names:
            np.testing.assert_array_equal(f[n][()], g[n][()], err_msg=n)
    # verify re-reads the bags by checksum: a changed bag file is found
    mcap = next((folder / "take3").glob("*.mcap"))
    data = bytearray(mcap.read_bytes())
    data[len(data) // 2] ^= 0xFF
    mcap.write_bytes(bytes(data))
    res = run("verify", tmp_path / "goals.h5")
    assert res.exit_code != 0 and "take3" in res.output, res.output


def test_bag_camera_frames_feed_a_frame_embedding(tmp_path):
    """Frames read from image topics go to `goalkit embed --input frame` unchanged."""
    from bag_testdata import CAM

    folder = tmp_path / "takes"
    for i in range(3):
        write_bag(folder / f"take{i}", make_truth(seed=i, image=True, segments=((0.0, 1.2),)), "mcap")
    res = run("scan", folder, "--write-layout", tmp_path / "layout.toml", "--quiet")
    assert res.exit_code == 0, res.output
    text = (tmp_path / "layout.toml").read_text()
    assert f'frame = "{CAM}"' in text
    res = run("embed", folder, "--layout", tmp_path / "layout.toml", "--method", "pca", "--dims", "3",
              "--input", "frame", "--block", "2", "-o", tmp_path / "emb.npz")
    assert res.exit_code == 0, res.output
    with np.load(tmp_path / "emb.npz", allow_pickle=False) as emb:
        assert emb["attr.frame_shape_"].tolist() == [6, 8, 3]        # the bags' rgb8 images
        assert emb["inner.attr.components_"].shape == (3, 3 * 4 * 3)  # 2 x 2 tiles averaged
    assert "3 episodes" in res.output

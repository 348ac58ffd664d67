"""Fixtures for the scale-out tests: small invented gantry logs and a recipe with a goal table."""

import hashlib
import sys
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest

from goalkit.demo import make_demo
from goalkit.logs import grouped, planspawn, spare
from goalkit.pipeline.shardfiles import shard_meta

GOALKIT = str(Path(sys.executable).with_name("goalkit"))

#: Weights with a cross-episode strategy, so the plan carries a goal table to the workers.
RECIPE = """version = 1
seed = {seed}
[logs]
path = "gantry-logs.h5"
layout = "gantry-layout.toml"
[goal]
fields = ["head", "trays"]
[relabel]
goals_per_transition = 5
gamma = 0.9
[relabel.weights]
original = 1
future = 2
geometric = 1
other_episode = 1
[reward]
threshold = 0.04
[split]
validation = 0.2
[output]
path = "scale-goals.h5"
chunk_rows = 512
"""


def sha256(path) -> str:
    """SHA-256 (FIPS 180-4, via hashlib) of a whole file."""
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


@pytest.fixture(scope="session")
def gantry(tmp_path_factory):
    """Demo logs of 240 episodes (about 11k transitions) and the scale recipe beside them."""
    d = tmp_path_factory.mktemp("gantry")
    make_demo(d, episodes=240, seed=11)
    (d / "scale-recipe.toml").write_text(RECIPE.format(seed=3), encoding="utf-8")
    return d


@pytest.fixture(scope="session")
def reference(gantry, tmp_path_factory):
    """The single-process build of the scale recipe and its SHA-256."""
    from goalkit.pipeline.build import build
    from goalkit.pipeline.recipe import load_recipe

    out = tmp_path_factory.mktemp("ref") / "scale-goals.h5"
    build(load_recipe(gantry / "scale-recipe.toml").with_overrides(out=out))
    return out, sha256(out)


def change_value(path, array, flat_index):
    """Move one float value of ``array`` in a shard file by one ulp, leaving its checksum as it was."""
    meta = shard_meta(path)
    data = bytearray(Path(path).read_bytes())
    _, dtype, _, offset, _ = next(a for a in meta["arrays"] if a[0] == array)
    size = np.dtype(dtype).itemsize
    start = 48 + int.from_bytes(data[8:16], "little") + offset + size * flat_index   # after prefix and header
    value = np.frombuffer(bytes(data[start:start + size]), dtype)
    data[start:start + size] = np.nextafter(value, np.inf).astype(dtype).tobytes()
    Path(path).write_bytes(bytes(data))


@pytest.fixture()
def helper_log(gantry, monkeypatch):
    """The scale logs (240 groups) planned with a helper, as logs of 1,500+ groups are."""
    monkeypatch.setattr(planspawn, "MIN_GROUPS", 50)
    monkeypatch.setattr(planspawn, "MIN_GROUPS_COLD", 50)
    monkeypatch.setattr(spare, "WARM_BYTES", 0)
    seen = []
    finish = grouped.finish_helper

    def watched(helper, *args, **kwargs):
        found = finish(helper, *args, **kwargs)
        seen.append((type(helper).__name__, found is not None))
        return found

    monkeypatch.setattr(grouped, "finish_helper", watched)
    # the helper meets this process where they meet; so that it surely plans a part of these
    # few groups, this process waits (up to 30 s) until the helper has claimed a first batch
    real_upwards = grouped.plan_upwards

    def after_the_helpers_first_claim(frontier, start, plan):
        first, deadline = frontier.high(), time.monotonic() + 30
        while frontier.high() == first and time.monotonic() < deadline:
            time.sleep(0.002)
        return real_upwards(frontier, start, plan)

    monkeypatch.setattr(grouped, "plan_upwards", after_the_helpers_first_claim)
    started = []
    real_start = spare.Spare.start.__func__
    monkeypatch.setattr(spare.Spare, "start", classmethod(lambda cls: started.append(1) or real_start(cls)))
    return SimpleNamespace(seen=seen, started=started)

"""The goal table's read shared with the spare helper (goalkit/pipeline/sharedread.py).

Reference: the serial loop it replaces (every chunk read here with ``source.read``, in order):
the goal table must be the same bytes, every chunk must be used exactly once, and whatever the
per-chunk work raises must be what the serial loop raises first (chunk order). Real helper
processes (``python -m goalkit.logs.spare``) and a real local worker pool; logs are the invented
gantry demo.
"""

from __future__ import annotations

import os
import pickle
import signal
import threading

import numpy as np
import pytest

from goalkit.demo import make_demo
from goalkit.logs import spare
from goalkit.logs.episodes import chunk_bounds
from goalkit.pipeline import plan as plan_module
from goalkit.pipeline import readproc, sharedread
from goalkit.pipeline.build import build
from goalkit.pipeline.plan import goal_table, make_plan, open_source
from goalkit.pipeline.poolspare import PoolSpare
from goalkit.pipeline.recipe import load_recipe
from goalkit.pipeline.workers import LocalRunner

HEADS = """
[heads.value]
weights = {current = 0.2, geometric = 0.5, random = 0.3}
gamma = 0.95
"""


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    d = tmp_path_factory.mktemp("sharedread")
    make_demo(d, episodes=600, seed=2)          # about 28,000 transitions, 600 groups
    return d


@pytest.fixture
def helped(monkeypatch):
    """A helper is wanted for these small logs (as for 100k+ transitions on 2+ CPUs)."""
    monkeypatch.setattr(readproc, "MIN_TRANSITIONS", 1)
    monkeypatch.setattr(readproc, "cpus", lambda: 2)
    monkeypatch.setattr(spare, "cpus", lambda: 2)
    monkeypatch.delenv(readproc.SWITCH, raising=False)
    taken = []
    real = spare.take

    def take():
        helper = real()
        taken.append(helper)
        return helper

    monkeypatch.setattr(spare, "take", take)
    return taken


def serial(source, bounds):
    return {k: source.read(a, b) for k, (a, b) in enumerate(bounds)}


def bounds_of(source, transitions=2_000):
    return chunk_bounds(np.asarray(source.lengths), transitions)


def test_every_chunk_is_used_once_with_the_serial_reads_values(demo, helped):
    source = open_source(load_recipe(demo / "gantry-recipe.toml"))
    bounds = bounds_of(source)
    assert len(bounds) >= 8
    # the request carries the pickled logs' index: more than a pipe holds (64 KiB on Linux),
    # the case in which a second request could block both processes
    assert len(pickle.dumps(source.read)) > 65_536
    seen = {}
    with spare.scope([], early=False):
        # on a thread, so that a read that blocks both processes fails the test instead of hanging it
        reader = threading.Thread(target=sharedread.shared_chunks, daemon=True,
                                  args=(source, bounds, lambda k, chunk: seen.setdefault(k, []).append(chunk)))
        reader.start()
        reader.join(60)
        blocked = reader.is_alive()
        if blocked and helped and helped[0] is not None:
            helped[0].close()                        # let the thread go
    assert not blocked, "the shared read blocked"
    assert len(helped) == 1 and isinstance(helped[0], spare.Spare)    # a helper process answered
    assert sorted(seen) == list(range(len(bounds))) and all(len(v) == 1 for v in seen.values())
    want = serial(source, bounds)
    for k, (got,) in seen.items():
        np.testing.assert_array_equal(got.observations, want[k].observations)
        np.testing.assert_array_equal(got.episode_ids, want[k].episode_ids)


@pytest.mark.parametrize("failing", [{1, 6}, {3, 4}, {6, 7}, {0}, {7}])
def test_what_the_work_raises_is_what_the_serial_loop_raises_first(demo, helped, failing):
    source = open_source(load_recipe(demo / "gantry-recipe.toml"))
    bounds = bounds_of(source)[:8]       # chunks 4 .. 7 are the helper's

    def use(k, chunk):
        if k in failing:
            raise ValueError(f"chunk {k}")

    with spare.scope([], early=False):
        with pytest.raises(ValueError) as err:
            sharedread.shared_chunks(source, bounds, use)
    assert str(err.value) == f"chunk {min(failing)}"


def test_a_helper_that_dies_leaves_its_chunks_to_this_process(demo, helped):
    source = open_source(load_recipe(demo / "gantry-recipe.toml"))
    bounds = bounds_of(source)
    seen, killed = {}, []

    def use(k, chunk):
        if not seen and helped and helped[0] is not None and helped[0].proc is not None:
            os.kill(helped[0].proc.pid, signal.SIGKILL)      # dies as the first chunk is used
            helped[0].proc.wait(10)
            killed.append(k)
        seen[k] = chunk

    with spare.scope([], early=False):
        sharedread.shared_chunks(source, bounds, use)
    assert killed == [0]
    assert sorted(seen) == list(range(len(bounds)))
    want = serial(source, bounds)
    for k, got in seen.items():
        np.testing.assert_array_equal(got.observations, want[k].observations)


def test_a_pool_stand_in_is_asked_a_chunk_at_a_time(demo, helped):
    source = open_source(load_recipe(demo / "gantry-recipe.toml"))
    bounds = bounds_of(source)
    asked = []
    with LocalRunner(1) as runner, spare.scope([], early=False):
        stand_in = PoolSpare(runner)
        real_send = stand_in.send
        stand_in.send = lambda request: asked.append(len(request["each"])) or real_send(request)
        spare.give_back(stand_in)
        seen = {}
        sharedread.shared_chunks(source, bounds, lambda k, chunk: seen.__setitem__(k, chunk))
    assert sorted(seen) == list(range(len(bounds)))
    assert asked and set(asked) == {1}               # never more than a chunk per request
    assert len(asked) == len(bounds) - (len(bounds) + 1) // 2


def test_the_goal_table_is_the_same_bytes_with_and_without_the_helper(demo, helped, monkeypatch):
    recipe = load_recipe(demo / "gantry-recipe.toml")
    source = open_source(recipe)
    plan, _ = make_plan(recipe, source)
    monkeypatch.setattr(plan_module, "TABLE_CHUNK_TRANSITIONS", 2_000)
    with spare.scope([], early=False):
        shared = goal_table(source, plan.goal_map, plan.dtypes, 200_000)
    assert helped and helped[-1] is not None
    monkeypatch.setenv(readproc.SWITCH, "0")
    alone = goal_table(source, plan.goal_map, plan.dtypes, 200_000)
    assert shared.dtype == alone.dtype and shared.tobytes() == alone.tobytes()
    assert len(shared) == int(np.sum(source.lengths) + len(source.lengths))


def test_a_heads_build_gives_the_same_bytes_helped_or_not(demo, helped, tmp_path, monkeypatch):
    text = (demo / "gantry-recipe.toml").read_text().replace("goals_per_transition = 5", "goals_per_transition = 1")
    text = text.replace('compression = "gzip"', 'compression = "gzip"\ngoals = "heads"') + HEADS
    (demo / "heads-recipe.toml").write_text(text)
    monkeypatch.setattr(plan_module, "TABLE_CHUNK_TRANSITIONS", 2_000)
    outs = {}
    for name, workers in (("helped", None), ("pooled", 2)):
        recipe = load_recipe(demo / "heads-recipe.toml").with_overrides(out=tmp_path / f"{name}.h5")
        build(recipe, workers=workers, card=False)
        outs[name] = (tmp_path / f"{name}.h5").read_bytes()
    monkeypatch.setenv(readproc.SWITCH, "0")
    recipe = load_recipe(demo / "heads-recipe.toml").with_overrides(out=tmp_path / "alone.h5")
    build(recipe, card=False)
    alone = (tmp_path / "alone.h5").read_bytes()
    assert outs["helped"] == alone and outs["pooled"] == alone

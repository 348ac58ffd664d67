"""verify reads ahead and checks on two threads: the outcome is the one of reading each chunk's
stored rows when it is checked, on one thread.

verify decodes the stored rows of the next chunk of episodes while it checks the current one
(at the row ranges the plan predicts), and runs the manifest checksums and the audit on a
second thread (goalkit.write.checklane). These tests compare it with the plain order of work
(read ahead off, lane tasks run at once on the caller's thread) on a gzip set stored in small
chunks and checked in many small chunks of episodes: a correct set, rows broken in both splits,
a stored chunk that does not inflate, and an exception in the audit before one in the replay.
"""

from __future__ import annotations

import shutil

import h5py
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import goalkit.write.verify as verify_module
from goalkit.demo import make_demo
from goalkit.logs.episodes import chunk_bounds
from goalkit.pipeline.build import build
from goalkit.pipeline.chunk import relabel_chunk
from goalkit.pipeline.plan import make_plan, split_rows
from goalkit.pipeline.recipe import load_recipe
from goalkit.write import chunkread
from goalkit.write.checklane import CheckLane
from goalkit.write.chunkread import SplitColumns
from goalkit.write.format import SPLITS
from goalkit.write.reader import GoalSet
from goalkit.write.verify import _expected_ranges, verify_set
from tamper_cases import tamper

CHUNK = 250   # transitions per chunk of episodes: about a dozen chunks of 40 demo episodes


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    d = tmp_path_factory.mktemp("ahead")
    make_demo(d, episodes=40, seed=9)
    text = (d / "gantry-recipe.toml").read_text()
    assert 'compression = "gzip"' in text and "chunk_rows = 65536" in text
    (d / "gantry-recipe.toml").write_text(text.replace("chunk_rows = 65536", "chunk_rows = 512"))
    recipe = load_recipe(d / "gantry-recipe.toml")
    build(recipe)
    return d, recipe


@pytest.fixture
def small_chunks(monkeypatch):
    monkeypatch.setattr(verify_module, "chunk_transitions", lambda plan: CHUNK)


def _plain(monkeypatch):
    """Verify without reading ahead and with the lane's tasks run at once, on this thread."""
    monkeypatch.setattr(verify_module._StoredAhead, "start", lambda self, i: None)
    monkeypatch.setattr(CheckLane, "submit", lambda self, fn, *args: fn(*args))


def _outcome(path, monkeypatch, plain: bool):
    with monkeypatch.context() as m:
        if plain:
            _plain(m)
        try:
            return verify_set(path).as_dict()
        except Exception as exc:   # noqa: BLE001  compared, type and message
            return (type(exc).__name__, str(exc))


def test_expected_ranges_are_the_rows_the_replay_produces(built):
    _, recipe = built
    plan, source = make_plan(recipe)
    bounds = list(chunk_bounds(plan.lengths, CHUNK))
    assert len(bounds) >= 8
    ranges = _expected_ranges(plan, bounds)
    cursor = {split: 0 for split in SPLITS}
    for (a, b), want in zip(bounds, ranges):
        fresh = relabel_chunk(plan, source.read(a, b))
        for split in SPLITS:
            n = len(fresh.keys.get(split, ()))
            assert want[split] == (cursor[split], cursor[split] + n)
            cursor[split] += n
    assert cursor == split_rows(plan)


def test_a_correct_set_gives_the_same_report(built, small_chunks, monkeypatch):
    path = built[1].output.path
    ahead = _outcome(path, monkeypatch, plain=False)
    assert ahead["ok"], ahead["failures"]
    assert ahead == _outcome(path, monkeypatch, plain=True)
    assert ahead["checked"]["audit"]["ok"] and len(ahead["checked"]["audit"]["checks"]) >= 10


def test_broken_rows_give_the_same_report(built, small_chunks, monkeypatch, tmp_path):
    path = tmp_path / "broken.h5"
    shutil.copyfile(built[1].output.path, path)
    for split in ("train", "validation"):
        with h5py.File(path, "r") as f:
            n = f[split]["reward"].shape[0]
        rows = np.linspace(0, n - 1, 7).astype(int)
        tamper(path, split, "reward", lambda r, rows=rows: r.__setitem__(rows, r[rows] + 1))
    ahead = _outcome(path, monkeypatch, plain=False)
    assert not ahead["ok"]
    assert any("reward" in f for f in ahead["failures"]), ahead["failures"]
    assert any(f.startswith("audit:") for f in ahead["failures"]), ahead["failures"]
    assert ahead == _outcome(path, monkeypatch, plain=True)


def test_a_chunk_that_does_not_inflate_is_a_finding(built, small_chunks, monkeypatch, tmp_path):
    """A stored chunk whose bytes do not decompress is reported (file, split, column, rows), the
    same way on both paths; the other checks still run: a value broken in the other split is
    found, the rows read are checked and audited, the manifest of the other columns checked."""
    path = tmp_path / "damaged.h5"
    shutil.copyfile(built[1].output.path, path)
    with h5py.File(path, "r+") as f:   # the third stored chunk of train/goal: bytes that are no zlib stream
        ds = f["train"]["goal"]
        at = 2 * ds.chunks[0]
        mask, data = ds.id.read_direct_chunk((at, 0))
        ds.id.write_direct_chunk((at, 0), b"\x00" * len(data), mask)
        n_train, per = ds.shape[0], ds.chunks[0]
        f["validation"]["reward"][3] += 1   # not resealed: its checksum differs too
    ahead = _outcome(path, monkeypatch, plain=False)
    assert ahead == _outcome(path, monkeypatch, plain=True)
    assert not ahead["ok"]
    assert ahead["checked"]["unreadable"] == [{"split": "train", "column": "goal", "rows": [at, at + per]}]
    assert f"{path}: train/goal rows {at} .. {at + per - 1} cannot be read (the stored chunk does not decompress): " \
           f"the rows of its episodes are not checked" in ahead["failures"]
    # the rest is checked: the broken validation reward, the other columns' checksums
    assert any(f.startswith("validation row 3 ") and "reward" in f for f in ahead["failures"]), ahead["failures"]
    assert any(f.startswith("validation/reward: checksum") for f in ahead["failures"]), ahead["failures"]
    assert not any(f.startswith("train/") for f in ahead["failures"]), ahead["failures"]
    audit = ahead["checked"]["audit"]
    unread = [f for f in audit["failures"] if "not audited" in f]
    assert len(unread) == 1 and unread[0].startswith("train rows ")
    a, b = (int(x) for x in unread[0].split(" not audited")[0].split("rows ")[1].split(" .. "))
    assert a <= at and b >= at + per - 1 and b - a < n_train - 1   # only the chunks of episodes around it
    assert 0 < audit["rows"]["train"] < n_train and len(audit["checks"]) >= 10


def test_an_audit_exception_before_a_replay_exception_is_the_one_raised(built, small_chunks, monkeypatch):
    calls = {"audit": 0, "rows": 0}
    feed_add, check_rows = verify_module.AuditFeed.add, verify_module.check_rows

    def failing_add(self, *args):
        calls["audit"] += 1
        if calls["audit"] == 3:
            raise ArithmeticError("audit slip")
        return feed_add(self, *args)

    def failing_check(*args):
        calls["rows"] += 1
        if calls["rows"] == 4:   # the replay fails one task after the audit's
            raise LookupError("replay slip")
        return check_rows(*args)

    monkeypatch.setattr(verify_module.AuditFeed, "add", failing_add)
    monkeypatch.setattr(verify_module, "check_rows", failing_check)
    with pytest.raises(ArithmeticError, match="audit slip"):
        verify_set(built[1].output.path)


@given(data=st.data())
@settings(max_examples=40, deadline=None)
def test_stored_rows_decoded_on_threads_are_hdf5s_own(built, data):
    """Any row ranges of every column, decoded here (libdeflate + the shuffle undone byte plane
    by byte plane), equal HDF5's own filter pipeline (h5py slicing) on the same ranges."""
    path = built[1].output.path
    with GoalSet(path) as gs:
        reader = SplitColumns(gs, "train")
        n = reader.rows
        ranges = data.draw(st.lists(st.tuples(st.integers(0, n), st.integers(0, 1500)), min_size=1, max_size=4))
        ranges = [(a, min(n, a + k)) for a, k in ranges]
        try:
            got = reader.read_ranges(ranges)
        finally:
            reader.close()
        with h5py.File(path, "r") as f:
            for name, value in got.items():
                ds = f["train"][name]
                want = np.concatenate([ds[a:b] for a, b in ranges])
                assert value.dtype == ds.dtype
                np.testing.assert_array_equal(value, want)


@given(data=st.data())
@settings(max_examples=25, deadline=None)
def test_consecutive_ranges_inflate_each_stored_chunk_once(built, data):
    """verify's readers keep a chunk read only in part for the next range: over consecutive
    ranges (as the replay reads them, ends anywhere in a chunk) every stored chunk is inflated
    once per column, and the rows are HDF5's own."""
    inflated = []
    inflate = chunkread._inflate
    path = built[1].output.path
    with pytest.MonkeyPatch.context() as m, GoalSet(path) as gs:
        m.setattr(chunkread, "_inflate", lambda stored, size: inflated.append(size) or inflate(stored, size))
        reader = SplitColumns(gs, "train", ["goal", "source_step", "reward"], keep_tails=True)
        n, per = reader.rows, reader.chunk_rows
        cuts = sorted(set(data.draw(st.lists(st.integers(1, n - 1), min_size=1, max_size=12))))
        bounds = list(zip([0] + cuts, cuts + [n]))
        try:
            parts = [reader.read(a, b) for a, b in bounds]
        finally:
            reader.close()
        with h5py.File(path, "r") as f:
            for name in ("goal", "source_step", "reward"):
                np.testing.assert_array_equal(np.concatenate([p[name] for p in parts]), f["train"][name][:])
    assert len(inflated) == 3 * -(-n // per)   # every chunk of each of the three columns, once

"""The logs' digests taken beside the planning (goalkit/pipeline/earlydigest.py).

Reference: hashlib's SHA-256 of the file's bytes read whole (Python standard library, FIPS
180-4); the early digests may only move the hashing in time, never change what is recorded.
"""

from __future__ import annotations

import hashlib
import os
import time
from types import SimpleNamespace

import pytest

from goalkit.pipeline import earlydigest
from goalkit.pipeline.earlydigest import EarlyDigests
from goalkit.write.provenance import describe_files, file_digest


def test_file_digest_is_hashlibs_whatever_the_block(tmp_path):
    data = os.urandom(100_003)
    path = tmp_path / "log.bin"
    path.write_bytes(data)
    for block in (1, 7, 4096, 100_003, 1 << 20):
        assert file_digest(path, block=block) == hashlib.sha256(data).hexdigest()


def test_the_digests_taken_early_are_those_of_the_opened_files(tmp_path):
    a, b = tmp_path / "a.h5", tmp_path / "b.h5"
    a.write_bytes(b"first log")
    b.write_bytes(b"second log")
    with EarlyDigests([a, b]) as early:
        found = early.log_files(SimpleNamespace(files=[str(a), str(b)]))
        assert found == describe_files([a, b])
        assert found[0]["sha256"] == hashlib.sha256(b"first log").hexdigest()
        # another list of files (another order, a file more or less): hashed again by the caller
        assert early.log_files(SimpleNamespace(files=[str(b), str(a)])) is None
        assert early.log_files(SimpleNamespace(files=[str(a)])) is None


def test_a_file_changed_while_it_was_hashed_is_hashed_again(tmp_path, monkeypatch):
    log = tmp_path / "log.h5"
    log.write_bytes(b"before")
    real = earlydigest.describe_files

    def changing(paths, stop=None):
        found = real(paths, stop=stop)
        log.write_bytes(b"after, longer")          # written to while it was read
        return found

    monkeypatch.setattr(earlydigest, "describe_files", changing)
    with EarlyDigests([log]) as early:
        assert early.log_files(SimpleNamespace(files=[str(log)])) is None


def test_folders_and_missing_files_start_nothing(tmp_path):
    with EarlyDigests([tmp_path]) as early:
        assert early.future is None and early.log_files(SimpleNamespace(files=[])) is None
    with EarlyDigests([tmp_path / "missing.h5"]) as early:
        assert early.future is None
    with EarlyDigests([]) as early:
        assert early.future is None


def test_leaving_the_block_stops_a_long_hash(tmp_path):
    # a build that fails while planning must not wait for a large log to be read through
    big = tmp_path / "big.h5"
    with open(big, "wb") as f:
        f.truncate(4 << 30)                          # 4 GiB, sparse: seconds of hashing
    t0 = time.monotonic()
    with EarlyDigests([big]) as early:
        time.sleep(0.05)
    assert time.monotonic() - t0 < 2.0
    assert early.future.result() is None


@pytest.mark.parametrize("workers", [2])
def test_a_sharded_build_records_the_same_digests(tmp_path, workers, monkeypatch):
    # the provenance of a sharded build (whose key takes the early digests) names the log with
    # the SHA-256 of its bytes, as hashlib gives it
    from goalkit.demo import make_demo
    from goalkit.pipeline.build import build
    from goalkit.pipeline.recipe import load_recipe
    from goalkit.write.reader import open_set

    demo = make_demo(tmp_path / "demo", episodes=30, seed=3)
    recipe = load_recipe(demo["recipe"]).with_overrides(out=tmp_path / "w.h5")
    calls = []
    real = earlydigest.describe_files
    monkeypatch.setattr(earlydigest, "describe_files", lambda paths, stop=None: calls.append(paths) or real(paths, stop=stop))
    again = []
    monkeypatch.setattr("goalkit.pipeline.build.describe_files", lambda paths: again.append(paths) or real(paths))
    build(recipe, workers=workers, card=False)
    assert len(calls) == 1                           # hashed once, beside the planning
    assert [p for p in again if p] == []             # and not again after it
    log = recipe.logs_path
    with open_set(tmp_path / "w.h5") as s:
        files = s.provenance["log_files"]
    assert [f["sha256"] for f in files] == [hashlib.sha256(open(log, "rb").read()).hexdigest()]

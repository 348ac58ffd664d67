"""Shard partition, shard files, build keys and payload spilling (unit level)."""

import json
from dataclasses import replace
from types import SimpleNamespace

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from goalkit.outputs import host_tag
from goalkit.pipeline.buildfolder import BuildFolder, build_key, folder_of
from goalkit.pipeline.chunk import ChunkRows
from goalkit.pipeline.shardfiles import ShardError, check_shard, plan_shards, read_shard, shard_meta, write_shard
from goalkit.pipeline.workers import GOAL_TABLE_FILE, make_payload

from conftest import change_value


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(1, 50), min_size=1, max_size=60), st.integers(1, 120), st.integers(0, 5))
def test_shards_cover_every_episode_once_in_order(lengths, limit, gap):
    # episode ids with gaps, as when bad episodes are skipped
    ids = np.cumsum(np.full(len(lengths), gap + 1)) - 1
    plan = SimpleNamespace(lengths=np.array(lengths), episode_ids=ids)
    specs = plan_shards(plan, limit)
    assert [s.index for s in specs] == list(range(len(specs)))
    assert specs[0].start == 0 and specs[-1].stop == len(lengths)
    for a, b in zip(specs, specs[1:]):
        assert a.stop == b.start
    for s in specs:
        assert s.stop > s.start
        assert s.transitions == sum(lengths[s.start:s.stop])
        assert (s.first_episode, s.last_episode) == (ids[s.start], ids[s.stop - 1])
        # at most `limit` transitions, unless a single episode is longer than that
        assert s.transitions <= limit or s.stop - s.start == 1
        # greedy: the next episode would not have fitted
        if s.stop < len(lengths):
            assert s.transitions + lengths[s.stop] > limit


def _rows(seed=0):
    g = np.random.default_rng(seed)
    cols = {"source_episode": np.arange(6, dtype=np.int64), "goal": g.normal(size=(6, 3)),
            "reached": g.random(6) < 0.5}
    return ChunkRows({"train": cols}, {"train": np.arange(6, dtype=np.int64) * 7})


def test_shard_file_round_trip_and_checks(tmp_path):
    spec = plan_shards(SimpleNamespace(lengths=np.array([3, 3]), episode_ids=np.array([4, 9])), 10)[0]
    order = ["source_episode", "goal", "reached"]
    rows = _rows()
    info = write_shard(tmp_path, spec, "k1", rows, order)
    assert info["rows"] == {"train": 6, "validation": 0}
    back = read_shard(tmp_path, spec, "k1", order)
    for name in order:
        np.testing.assert_array_equal(back.columns["train"][name], rows.columns["train"][name])
        assert back.columns["train"][name].dtype == rows.columns["train"][name].dtype
    np.testing.assert_array_equal(back.keys["train"], rows.keys["train"])
    assert shard_meta(tmp_path / spec.name)["last_episode"] == 9
    assert [p.name for p in tmp_path.iterdir()] == [spec.name]  # no temporary file left
    # another build's key, another partition, a changed value: all refused
    with pytest.raises(ShardError, match="build_key"):
        read_shard(tmp_path, spec, "k2", order)
    with pytest.raises(ShardError, match="stop"):
        read_shard(tmp_path, replace(spec, stop=1), "k1", order)
    clean = (tmp_path / spec.name).read_bytes()
    change_value(tmp_path / spec.name, "train/goal", 2 * 3 + 1)   # one ulp of one value
    assert not check_shard(tmp_path, spec, "k1", order)
    with pytest.raises(ShardError, match=r"shard 0 \(episodes 4\.\.9\): rows do not match"):
        read_shard(tmp_path, spec, "k1", order)
    # any single flipped bit, header or arrays, is caught (one SHA-256 over all but the magic)
    for at in range(8, len(clean), max(1, len(clean) // 97)):
        damaged = bytearray(clean)
        damaged[at] ^= 1 << (at % 8)
        (tmp_path / spec.name).write_bytes(bytes(damaged))
        assert not check_shard(tmp_path, spec, "k1", order), at
    (tmp_path / spec.name).write_bytes(clean[:len(clean) // 2])   # a truncated file
    assert not check_shard(tmp_path, spec, "k1", order)
    (tmp_path / spec.name).write_bytes(b"not a shard")
    assert not check_shard(tmp_path, spec, "k1", order)
    (tmp_path / spec.name).write_bytes(clean)
    assert check_shard(tmp_path, spec, "k1", order)


def _inputs(text="seed = 0", seed=0, layout="layout", logs=None, embeddings=(), library=()):
    from goalkit.pipeline.build import BuildInputs

    logs = [{"path": "/l.h5", "bytes": 10, "sha256": "a" * 64}] if logs is None else logs
    return BuildInputs(text, seed, layout, logs, list(embeddings), list(library)).key_record()


def test_build_key_changes_with_every_input():
    specs = plan_shards(SimpleNamespace(lengths=np.array([3, 3, 3]), episode_ids=np.arange(3)), 4)
    logs = [{"path": "/l.h5", "bytes": 10, "sha256": "a" * 64}]
    embedding_file = {"path": "/e.npz", "bytes": 1, "sha256": "c" * 64}
    library_file = dict(embedding_file, path="/lib.npz")
    base, record = build_key(_inputs(), specs)
    assert base == build_key(_inputs(), specs)[0]
    assert json.loads(json.dumps(record)) == record
    variants = [
        build_key(_inputs(text="seed = 1"), specs),
        build_key(_inputs(seed=5), specs),
        build_key(_inputs(layout="layout2"), specs),
        build_key(_inputs(logs=[dict(logs[0], sha256="b" * 64)]), specs),
        build_key(_inputs(logs=[dict(logs[0], bytes=11)]), specs),
        build_key(_inputs(embeddings=[embedding_file]), specs),
        build_key(_inputs(library=[library_file]), specs),
        build_key(_inputs(library=[embedding_file]), specs),  # one file as library, not as embedding
        build_key(_inputs(), specs[:1]),
    ]
    assert len({base} | {k for k, _ in variants}) == len(variants) + 1


def test_folder_of_another_key_is_emptied(tmp_path):
    out = tmp_path / "set.h5"
    folder = BuildFolder(out)
    assert folder.open("k1", {}) is False
    (folder.path / "shard-00000.npz").write_bytes(b"x")
    killed = f".shard-00001.npz~goalkit-99999999-{host_tag()}-0123456789ab.tmp"  # a killed run's temporary
    (folder.path / killed).write_bytes(b"x")
    folder.release()
    again = BuildFolder(out)
    assert again.open("k1", {}) is True
    assert (folder.path / "shard-00000.npz").exists()
    assert not (folder.path / killed).exists()
    again.release()
    other = BuildFolder(out)
    assert other.open("k2", {}) is False
    assert not (folder.path / "shard-00000.npz").exists()
    other.remove()
    assert not folder_of(out).exists()


def test_a_foreign_file_in_the_build_folder_is_never_deleted(tmp_path):
    out = tmp_path / "set.h5"
    folder = BuildFolder(out)
    folder.open("k1", {})
    (folder.path / "shard-00000.npz").write_bytes(b"x")
    (folder.path / "notes.txt").write_bytes(b"mine")
    (folder.path / "shard-00000.npz.bak").write_bytes(b"mine too")
    folder.release()
    other = BuildFolder(out)
    other.open("k2", {})       # another key: our old files go, the user's stay
    assert not (folder.path / "shard-00000.npz").exists()
    other.remove()             # the folder stays because it holds files goalkit did not name
    assert sorted(p.name for p in folder.path.iterdir()) == ["notes.txt", "shard-00000.npz.bak"]
    assert (folder.path / "notes.txt").read_bytes() == b"mine"


def test_large_goal_table_is_spilled_once_and_mapped(tmp_path):
    from dataclasses import dataclass

    @dataclass(frozen=True)
    class P:  # the one BuildPlan field the payload touches
        goal_table: object

    table = np.arange(600_000, dtype=np.float32).reshape(-1, 3)  # 2.4 MB

    payload = make_payload(P(table), None, tmp_path)
    assert payload.plan.goal_table is None and payload.files["goal_table"][0] == str(tmp_path / GOAL_TABLE_FILE)
    mapped = payload.resolve().goal_table
    assert isinstance(mapped, np.memmap)
    np.testing.assert_array_equal(mapped, table)
    small = make_payload(P(table[:10]), None, tmp_path / "nowhere")
    assert small.files == {} and small.plan.goal_table is not None
    assert small.resolve().goal_table is small.plan.goal_table


def test_per_transition_columns_are_stored_once_and_read_back_exactly(tmp_path):
    from goalkit.pipeline.plan import SLOT_SPAN

    g = np.random.default_rng(3)
    n_t, slots = 40, 4
    t = np.repeat(np.arange(n_t, dtype=np.int64), slots)
    obs = np.repeat(g.normal(size=(n_t, 5)), slots, axis=0)
    signed = np.repeat(np.zeros(n_t, dtype=np.float32), slots)
    signed[1] = -0.0  # equal as numbers, not as bytes: must not be packed
    nan = np.repeat(np.full(n_t, np.nan), slots)
    late = np.repeat(np.ones(n_t, dtype=np.float32), slots)
    late[7 * slots + 2] = 2.0  # repeats within the first transitions, not within the eighth
    cols = {"observation": obs, "goal": g.normal(size=(len(t), 3)), "signed": signed, "nan": nan, "late": late}
    rows = ChunkRows({"train": cols}, {"train": t * SLOT_SPAN + np.tile(np.arange(slots), n_t)})
    order = list(cols)
    spec = plan_shards(SimpleNamespace(lengths=np.array([n_t]), episode_ids=np.array([0])), 10_000)[0]
    write_shard(tmp_path, spec, "k", rows, order)
    meta = shard_meta(tmp_path / spec.name)
    assert meta["per_transition"] == ["train/nan@transition", "train/observation@transition"]
    back = read_shard(tmp_path, spec, "k", order)
    for name in order:
        assert back.columns["train"][name].tobytes() == cols[name].tobytes(), name
    shapes = {name: tuple(shape) for name, _, shape, _, _ in meta["arrays"]}
    assert shapes["train/observation@transition"] == (n_t, 5)
    assert shapes["train/signed"] == (n_t * slots,) and shapes["train/late"] == (n_t * slots,)


def test_deferred_gathers_are_packed_by_their_index_and_handed_back_deferred(tmp_path):
    # What a worker writes (relabel_chunk with deferred gathers) and what the coordinator reads
    # back for its writer: the same bytes as the materialised columns, gathered once.
    from goalkit.pipeline.plan import SLOT_SPAN
    from goalkit.write.gather import RowGather, materialise

    g = np.random.default_rng(5)
    n_t, slots = 30, 3
    states = g.normal(size=(n_t + 1, 4))
    t = np.repeat(np.arange(n_t, dtype=np.int64), slots)
    shuffled = g.permutation(len(t))                           # an index that does not repeat
    cols = {"observation": RowGather(states, t), "next_observation": RowGather(states, t + 1),
            "action": RowGather(states, shuffled % n_t), "goal": g.normal(size=(len(t), 2))}
    rows = ChunkRows({"train": cols}, {"train": t * SLOT_SPAN + np.tile(np.arange(slots), n_t)})
    order = list(cols)
    spec = plan_shards(SimpleNamespace(lengths=np.array([n_t]), episode_ids=np.array([0])), 10_000)[0]
    write_shard(tmp_path, spec, "k", rows, order)
    assert shard_meta(tmp_path / spec.name)["per_transition"] == ["train/next_observation@transition",
                                                                  "train/observation@transition"]
    plain = read_shard(tmp_path, spec, "k", order)
    deferred = read_shard(tmp_path, spec, "k", order, defer=True)
    expected = materialise(cols)
    for name in order:
        assert not isinstance(plain.columns["train"][name], RowGather)
        assert np.asarray(plain.columns["train"][name]).tobytes() == expected[name].tobytes(), name
        assert np.asarray(deferred.columns["train"][name]).tobytes() == expected[name].tobytes(), name
    assert isinstance(deferred.columns["train"]["observation"], RowGather)
    assert not isinstance(deferred.columns["train"]["action"], RowGather)     # stored per row


@settings(max_examples=300, deadline=None)
@given(st.lists(st.integers(1, 50), min_size=1, max_size=80), st.integers(1, 120))
def test_a_tapered_partition_recuts_only_the_last_two_shards(lengths, limit):
    plan = SimpleNamespace(lengths=np.array(lengths), episode_ids=np.arange(len(lengths)) * 2)
    plain, tapered = plan_shards(plan, limit), plan_shards(plan, limit, taper=True)
    # every episode once, in order, each shard within the limit unless it is one long episode
    assert [s.index for s in tapered] == list(range(len(tapered)))
    assert tapered[0].start == 0 and tapered[-1].stop == len(lengths)
    for a, b in zip(tapered, tapered[1:]):
        assert a.stop == b.start
    for s in tapered:
        assert s.stop > s.start and s.transitions == sum(lengths[s.start:s.stop])
        assert s.transitions <= limit or s.stop - s.start == 1
    # the shards before the last two of the plain partition are the plain ones
    kept = max(0, len(plain) - 2)
    assert [(s.start, s.stop) for s in tapered[:kept]] == [(s.start, s.stop) for s in plain[:kept]]
    # their episodes are cut again into at most 4 runs (each at most the limit), of about equal size
    tail = tapered[kept:]
    region = sum(s.transitions for s in tail)
    if all(n <= limit // 4 for n in lengths[plain[kept].start:]):
        assert len(tail) <= 4
        # no run exceeds a quarter of the region by more than one episode
        biggest = max(lengths[plain[kept].start:])
        assert max(s.transitions for s in tail) <= region / 4 + biggest
    if region >= 4 * max(lengths[plain[kept].start:]) and len(lengths) - plain[kept].start >= 4:
        assert len(tail) >= 2

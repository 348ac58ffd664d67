"""Embedding files: save/load round trips, byte-identical saves, and every bad-file error."""

import hashlib
import json

import numpy as np
import pytest

from goalkit.errors import EmbeddingError
from goalkit.goals import (PCA, SFA, EmbeddingGoalMap, FrameEmbedding, Precomputed, Raw, Standardised,
                           load_embedding, save_embedding)
from goalkit.goals.embedfile import load_embedding_file

G = np.random.default_rng(0)
X = np.cumsum(G.normal(size=(240, 4)), axis=0)  # invented gantry-like trajectories
OFF = np.array([0, 80, 160, 240])
FRAMES = G.integers(0, 256, size=(240, 8, 8, 3), dtype=np.uint8)


def _fitted():
    return [Raw().fit(X), Standardised().fit(X), PCA(3).fit(X), PCA(2, whiten=True).fit(X),
            SFA(2).fit(X, OFF), SFA(3, degree=2).fit(X, OFF), Precomputed().fit(X, OFF),
            FrameEmbedding(SFA(2, degree=1), block=(4, 2)).fit(FRAMES, OFF)]


def _query(emb):
    if emb.kind == "precomputed":
        return np.array([[0, 3], [2, 79]])
    return FRAMES[:7] if emb.kind == "frames" else X[:7]


@pytest.mark.parametrize("emb", _fitted(), ids=lambda e: repr(e))
def test_round_trip_gives_identical_outputs_and_params(tmp_path, emb):
    path = save_embedding(tmp_path / "e.npz", emb)
    back = load_embedding(path)
    assert type(back) is type(emb) and back.get_params() == emb.get_params()
    assert np.array_equal(back.transform(_query(emb)), emb.transform(_query(emb)))
    assert back.output_dim_ == emb.output_dim_
    assert not [p.name for p in tmp_path.iterdir() if p.name != "e.npz"]  # no temporary left behind


def test_same_embedding_saves_byte_identical_files(tmp_path):
    a = save_embedding(tmp_path / "a.npz", SFA(2, degree=2).fit(X, OFF))
    b = save_embedding(tmp_path / "b.npz", SFA(2, degree=2).fit(X, OFF))
    assert hashlib.sha256(a.read_bytes()).digest() == hashlib.sha256(b.read_bytes()).digest()


def test_goal_map_settings_round_trip(tmp_path):
    gm = EmbeddingGoalMap(PCA(2).fit(X[:, :3]), indices=[0, 2, 3], fields=("head",))
    gm.save(tmp_path / "g.npz")
    back = EmbeddingGoalMap.load(tmp_path / "g.npz")
    assert back.indices == (0, 2, 3) and back.fields == ("head",) and back.input == "observation"
    assert back.describe()["fingerprint"] == gm.describe()["fingerprint"]
    assert back.describe()["file"] == str(tmp_path / "g.npz")


def _good_arrays(tmp_path):
    path = save_embedding(tmp_path / "good.npz", PCA(2).fit(X))
    with np.load(path) as z:
        return {k: z[k] for k in z.files}


def _write(tmp_path, arrays, name="bad.npz"):
    p = tmp_path / name
    np.savez(p, **arrays)
    return p


@pytest.mark.parametrize("edit, key, match", [
    (lambda a: a.pop("format"), "format", "missing"),
    (lambda a: a.update(format=np.asarray("something-else")), "format", "expected 'goalkit-embedding'"),
    (lambda a: a.update(format=np.arange(3)), "format", "expected a string"),
    (lambda a: a.pop("version"), "version", "missing"),
    (lambda a: a.update(version=np.asarray(99)), "version", "format version 1, got 99"),
    (lambda a: a.update(version=np.asarray(1.0)), "version", "integer version"),
    (lambda a: a.update(kind=np.asarray("autoencoder")), "kind", "embedding kind among"),
    (lambda a: a.pop("kind"), "kind", "missing"),
    (lambda a: a.update(params=np.asarray("{not json")), "params", "JSON object"),
    (lambda a: a.update(params=np.asarray("[1, 2]")), "params", "JSON object, got list"),
    (lambda a: a.update(params=np.asarray('{"n_clusters": 3}')), "params", "hyperparameters of a pca"),
    (lambda a: a.pop("attr.components_"), "attr.components_", "fitted array 'components_'"),
    (lambda a: a.update({"attr.components_": np.zeros((2, 5))}), "attr.components_", r"\(K, 4\) principal axes"),
    (lambda a: a.update({"attr.explained_variance_": np.zeros(3)}), "attr.explained_variance_", r"shape \(2,\)"),
    (lambda a: a.update({"attr.mean_": np.zeros((2, 2))}), "attr.mean_", "1-D mean"),
    (lambda a: a.pop("goal_map"), "goal_map", "missing"),
])
def test_bad_files_name_file_and_key(tmp_path, edit, key, match):
    arrays = _good_arrays(tmp_path)
    edit(arrays)
    path = _write(tmp_path, arrays)
    with pytest.raises(EmbeddingError, match=match) as info:
        load_embedding(path)
    assert info.value.file == str(path) and info.value.key == key
    assert str(path) in str(info.value)


def test_bad_inner_embedding_of_frames_names_inner_key(tmp_path):
    path = save_embedding(tmp_path / "f.npz", FrameEmbedding(PCA(2), block=2).fit(FRAMES[..., 0]))
    with np.load(path) as z:
        arrays = {k: z[k] for k in z.files}
    arrays["inner.attr.components_"] = np.zeros((2, 3))
    with pytest.raises(EmbeddingError) as info:
        load_embedding(_write(tmp_path, arrays))
    assert info.value.key == "inner.attr.components_"
    arrays["inner.attr.components_"] = np.zeros((2, 5))
    arrays["inner.attr.mean_"] = np.zeros(5)
    with pytest.raises(EmbeddingError, match="inner embedding fitted on 16 preprocessed pixels") as info:
        load_embedding(_write(tmp_path, arrays, "g.npz"))
    assert info.value.key == "inner"


def test_missing_unreadable_pickled_and_plain_npy_files(tmp_path):
    with pytest.raises(EmbeddingError, match="does not exist") as info:
        load_embedding(tmp_path / "nope.npz")
    assert info.value.file == str(tmp_path / "nope.npz")
    junk = tmp_path / "junk.npz"
    junk.write_bytes(b"this is not a zip archive")
    with pytest.raises(EmbeddingError, match="expected an .npz archive"):
        load_embedding(junk)
    npy = tmp_path / "plain.npz"
    with open(npy, "wb") as fh:
        np.save(fh, np.arange(3))
    with pytest.raises(EmbeddingError, match="single .npy array"):
        load_embedding(npy)
    arrays = _good_arrays(tmp_path)
    arrays["attr.mean_"] = np.array([{"a": 1}], dtype=object)
    pick = tmp_path / "pickled.npz"
    np.savez(pick, **arrays)
    with pytest.raises(EmbeddingError, match="pickled objects") as info:
        load_embedding(pick)
    assert info.value.key == "attr.mean_"


def test_bad_goal_map_table(tmp_path):
    arrays = _good_arrays(tmp_path)
    arrays["goal_map"] = np.asarray(json.dumps({"input": "observation", "indices": 3, "fields": []}))
    with pytest.raises(EmbeddingError, match="list of indices") as info:
        EmbeddingGoalMap.load(_write(tmp_path, arrays))
    assert info.value.key == "goal_map"
    arrays["goal_map"] = np.asarray(json.dumps({"input": "observation", "indices": [0, 1], "fields": []}))
    with pytest.raises(EmbeddingError, match="4 observation indices"):
        EmbeddingGoalMap.load(_write(tmp_path, arrays, "g.npz"))


def test_save_refuses_missing_directory_and_unfitted(tmp_path):
    with pytest.raises(EmbeddingError, match="existing directory"):
        save_embedding(tmp_path / "no" / "e.npz", Raw().fit(X))
    with pytest.raises(EmbeddingError, match="not fitted"):
        save_embedding(tmp_path / "e.npz", PCA(2))
    assert not (tmp_path / "e.npz").exists() and list(tmp_path.iterdir()) == []


def test_summary_is_stored_for_inspection(tmp_path):
    path = save_embedding(tmp_path / "s.npz", SFA(2).fit(X, OFF))
    with np.load(path) as z:
        summary = json.loads(str(z["summary"]))
    emb, gm = load_embedding_file(path)
    assert summary["method"] == "sfa" and summary["delta"] == emb.delta_.tolist()
    assert gm == {"input": "observation", "indices": None, "fields": []}

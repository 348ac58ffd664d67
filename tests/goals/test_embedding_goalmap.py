"""EmbeddingGoalMap on EpisodeSets, fitting on logs, and every EmbeddingError of fit/transform."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from goalkit.errors import EmbeddingError
from goalkit.goals import PCA, SFA, EmbeddingGoalMap, FrameEmbedding, Precomputed, Raw, Standardised
from goalkit.goals.fitlogs import embedding_goal_map, fit_on_logs, precomputed_on_logs
from goalkit.logs.episodes import EpisodeSet
from goalkit.logs.memory import MemorySource


def _episodes(lengths=(5, 3, 7), width=5, frames=True, seed=0, ids=None):
    """Invented gantry episodes: head x-y-z then two tray positions, optional 6x6 frames."""
    g = np.random.default_rng(seed)
    lengths = np.asarray(lengths)
    n_states = int(lengths.sum() + len(lengths))
    return EpisodeSet(
        observations=np.cumsum(g.normal(size=(n_states, width)), axis=0),
        actions=g.normal(size=(int(lengths.sum()), 3)),
        offsets=np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64),
        episode_ids=np.arange(len(lengths), dtype=np.int64) if ids is None else np.asarray(ids),
        frames=g.integers(0, 256, size=(n_states, 6, 6), dtype=np.uint8) if frames else None,
        fields={"head": (0, 3), "trays": (3, 5)}, source="bench-logs.h5")


def test_observation_map_uses_indices_and_returns_float64():
    ep = _episodes()
    pca = PCA(2).fit(ep.observations[:, [0, 1, 2]])
    phi = EmbeddingGoalMap(pca, indices=[0, 1, 2], fields=["head"])
    rows = ep.next_state_rows()
    out = phi(ep, rows)
    assert out.dtype == np.float64 and out.shape == (len(rows), 2) and phi.dim == 2
    np.testing.assert_allclose(out, pca.transform(ep.observations[rows][:, :3]))
    d = phi.describe()
    assert d["method"] == "pca" and d["indices"] == [0, 1, 2] and d["fields"] == ["head"] and d["dim"] == 2


def test_frame_map_reads_frames():
    ep = _episodes()
    fe = FrameEmbedding(Standardised(), block=3).fit(ep.frames, ep.state_offsets())
    phi = EmbeddingGoalMap(fe, input="frame")
    rows = np.array([0, 4, 17])
    np.testing.assert_allclose(phi(ep, rows), fe.transform(ep.frames[rows]))
    assert phi.dim == 4 and phi.describe()["inner"]["method"] == "standardised"


def test_precomputed_map_looks_up_by_episode_id_and_step_in_any_chunk():
    whole = _episodes()
    values = np.arange(whole.observations.shape[0] * 2, dtype=np.float64).reshape(-1, 2)
    phi = EmbeddingGoalMap(Precomputed().fit(values, whole.state_offsets()))
    chunk = whole.select(1, 3)  # episodes 1 and 2: ids stay 1, 2
    rows = np.arange(chunk.observations.shape[0])
    np.testing.assert_array_equal(phi(chunk, rows), values[6:])
    np.testing.assert_array_equal(phi(whole, rows), values[rows])


@settings(max_examples=50, deadline=None)
@given(st.lists(st.integers(0, 5), min_size=1, max_size=6), st.data())
def test_precomputed_lookup_matches_state_row_rule(lengths, data):
    # rule (docs/internals.md): state t of episode position e is row offsets[e] + e + t
    ep = _episodes(lengths, frames=False)
    values = np.random.default_rng(1).normal(size=(ep.observations.shape[0], 3))
    p = Precomputed().fit(values, ep.state_offsets())
    e = data.draw(st.integers(0, len(lengths) - 1))
    t = data.draw(st.integers(0, lengths[e]))
    np.testing.assert_array_equal(p.lookup([e], [t])[0], values[ep.state_row(e, t)])
    np.testing.assert_array_equal(EmbeddingGoalMap(p)(ep, [ep.state_row(e, t)])[0], values[ep.state_row(e, t)])


def test_fit_on_logs_does_not_depend_on_chunk_size():
    src = MemorySource(_episodes(lengths=(40, 25, 60, 33), frames=False, seed=3))
    a = fit_on_logs(src, SFA(2, degree=2), fields=["head"], chunk_steps=1)
    b = fit_on_logs(src, SFA(2, degree=2), fields=["head"], chunk_steps=10_000)
    assert np.array_equal(a.embedding.weights_, b.embedding.weights_)
    assert a.indices == (0, 1, 2) and a.fields == ("head",)


def test_embedding_goal_map_checks_the_logs(tmp_path):
    src = MemorySource(_episodes(frames=False))
    fit_on_logs(src, PCA(2), fields=["trays"]).save(tmp_path / "t.npz")
    gm = embedding_goal_map(tmp_path / "t.npz", src)
    assert gm.indices == (3, 4)
    other = MemorySource(EpisodeSet(observations=np.zeros((4, 3)), actions=np.zeros((3, 1)),
                                    offsets=np.array([0, 3]), episode_ids=np.array([0]),
                                    fields={"head": (0, 3)}))
    with pytest.raises(EmbeddingError, match="field 'trays'") as info:
        embedding_goal_map(tmp_path / "t.npz", other)
    assert info.value.file == str(tmp_path / "t.npz")
    precomputed_on_logs(src, np.zeros((18, 2))).save(tmp_path / "p.npz")
    short = MemorySource(_episodes(lengths=(5, 3, 6), frames=False))
    with pytest.raises(EmbeddingError, match="expected 7 precomputed states") as info:
        embedding_goal_map(tmp_path / "p.npz", short)
    assert info.value.episode == 2
    with pytest.raises(EmbeddingError, match=r"shape \(18, G\)"):
        precomputed_on_logs(src, np.zeros((17, 2)))


# ---- every EmbeddingError of fit / transform / goal map --------------------------------------
X = np.random.default_rng(0).normal(size=(30, 3))
OFF = np.array([0, 10, 30])


@pytest.mark.parametrize("call, match", [
    (lambda: PCA(2).fit(np.zeros(5)), "2-D array"),
    (lambda: PCA(2).fit(np.array([["a", "b"]])), "real-valued"),
    (lambda: PCA(2).fit(np.ones((1, 3))), "at least 2 rows"),
    (lambda: PCA(4).fit(X), r"n_components an integer in 1..3"),
    (lambda: PCA(1.5).fit(X), "n_components an integer"),
    (lambda: PCA(3, whiten=True).fit(np.c_[X[:, :2], X[:, 0] + X[:, 1]]), "directions with nonzero variance"),
    (lambda: PCA(2).fit(X).transform(X[:, :2]), "3 columns"),
    (lambda: PCA(2).transform(X), "not fitted"),
    (lambda: Standardised().fit(X).transform(np.ones((2, 2))), "3 columns"),
    (lambda: Raw().fit(X, offsets=np.array([0, 5])), "from 0 to the number of rows 30"),
    (lambda: Raw().fit(X, offsets=np.array([0, 20, 10, 30])), "non-decreasing"),
    (lambda: Raw().fit(X, offsets=np.array([[0, 30]])), "1-D integer array"),
    (lambda: SFA(2).fit(X), "episode offsets for SFA"),
    (lambda: SFA(2, degree=3).fit(X, OFF), "degree 1"),
    (lambda: SFA(0).fit(X, OFF), "positive integer"),
    (lambda: SFA(4).fit(X, OFF), "n_components <= 3"),
    (lambda: SFA(1).fit(X[:3], np.array([0, 1, 2, 3])), "at least 2 within-episode"),
    (lambda: SFA(1).fit(np.ones((10, 2)), np.array([0, 10])), "every dimension is constant"),
    (lambda: Precomputed().fit(X, OFF).lookup([2], [0]), "episode ids in 0..1"),
    (lambda: Precomputed().fit(X, OFF).lookup([0], [10]), "step in 0..9"),
    (lambda: Precomputed().fit(X, OFF).lookup([0, 1], [0]), "as many steps"),
    (lambda: Precomputed().fit(X, OFF).transform(np.zeros((2, 2))), r"\(episode id, step\) pairs"),
    (lambda: FrameEmbedding(Raw()).fit(np.zeros((3, 4, 4))), "uint8"),
    (lambda: FrameEmbedding(Raw()).fit(np.zeros((3, 4), np.uint8)), r"\(M, H, W\)"),
    (lambda: FrameEmbedding(Raw(), block=5).fit(np.zeros((3, 4, 4), np.uint8)), "at least one block"),
    (lambda: FrameEmbedding(Raw(), block=0).fit(np.zeros((3, 4, 4), np.uint8)), "block a positive"),
    (lambda: FrameEmbedding(Precomputed()).fit(np.zeros((3, 4, 4), np.uint8), np.array([0, 3])),
     "observation embedding"),
    (lambda: FrameEmbedding(Raw()).fit(np.zeros((3, 4, 4), np.uint8)).transform(np.zeros((1, 4, 6), np.uint8)),
     r"shape \(4, 4\) \(as fitted\)"),
    (lambda: EmbeddingGoalMap(PCA(2)), "not fitted"),
    (lambda: EmbeddingGoalMap(object()), "goalkit embedding"),
    (lambda: EmbeddingGoalMap(Raw().fit(X), input="pixels"), "input 'observation' or 'frame'"),
    (lambda: EmbeddingGoalMap(Raw().fit(X), input="frame"), "input 'observation' for this raw"),
    (lambda: EmbeddingGoalMap(FrameEmbedding(Raw()).fit(np.zeros((3, 4, 4), np.uint8))), "input 'frame'"),
    (lambda: EmbeddingGoalMap(Raw().fit(X), indices=[0, 1]), "3 observation indices"),
    (lambda: EmbeddingGoalMap(Raw().fit(X), indices=[0, -1, 2]), "non-negative integer"),
    (lambda: EmbeddingGoalMap(Precomputed().fit(X, OFF), input="frame"), "precomputed"),
])
def test_embedding_errors(call, match):
    with pytest.raises(EmbeddingError, match=match):
        call()


def test_non_finite_value_names_episode_and_step():
    bad = X.copy()
    bad[13, 1] = np.nan
    with pytest.raises(EmbeddingError, match="NaN or inf in row 13") as info:
        SFA(1).fit(bad, OFF)
    assert (info.value.episode, info.value.step) == (1, 3)


def test_goal_map_errors_name_the_log():
    ep = _episodes(frames=False)
    phi = EmbeddingGoalMap(FrameEmbedding(Raw(), block=2).fit(np.zeros((3, 6, 6), np.uint8)), input="frame")
    with pytest.raises(EmbeddingError, match="no frame key") as info:
        phi(ep, np.array([0]))
    assert info.value.file == "bench-logs.h5"
    wide = EmbeddingGoalMap(Raw().fit(np.zeros((2, 3))), indices=[0, 1, 9])
    with pytest.raises(EmbeddingError, match="more than 9 columns"):
        wide(ep, np.array([0]))
    with pytest.raises(EmbeddingError, match="bench-logs.h5: expected features with 4 columns .as fitted., got 5"):
        EmbeddingGoalMap(Raw().fit(np.zeros((2, 4))))(ep, np.array([0]))
    with pytest.raises(EmbeddingError, match="state rows in 0..17"):
        EmbeddingGoalMap(Raw().fit(np.zeros((2, 5))))(ep, np.array([18]))

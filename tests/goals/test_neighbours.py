"""The faiss neighbour index against scikit-learn's exact NearestNeighbors, recall and determinism."""

import faiss
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from goalkit.errors import EmbeddingError
from goalkit.goals.neighbours import (IndexSettings, build_index, faiss_threads, recall_at_k, sample_rows)


def _goals(n, d=6, seed=0):
    """Invented continuous goal vectors (tie-free with probability one)."""
    return np.random.default_rng(seed).normal(size=(n, d)).astype(np.float32)


def _sk_neighbours(X, Q, k):
    from sklearn.neighbors import NearestNeighbors

    nn = NearestNeighbors(n_neighbors=k, algorithm="brute").fit(X.astype(np.float64))
    return nn.kneighbors(Q.astype(np.float64))


def test_exact_index_matches_scikit_learn_nearest_neighbors():
    # reference: sklearn.neighbors.NearestNeighbors (brute force, Euclidean). faiss returns
    # squared L2; the index returns Euclidean distances, so they compare directly
    X, Q = _goals(3000), _goals(200, seed=1)
    idx = build_index(X, IndexSettings(method="exact", k=8))
    d, i = idx.search(Q, 8)
    d_ref, i_ref = _sk_neighbours(X, Q, 8)
    assert np.array_equal(i, i_ref)
    np.testing.assert_allclose(d, d_ref, atol=1e-5)
    assert idx.report.method == "exact" and idx.report.recall == 1.0 and idx.report.recall_queries == 0
    # faiss's own distances are the squares
    raw_d, raw_i = idx._index.search(Q, 8)
    np.testing.assert_allclose(np.sqrt(raw_d), d_ref, atol=1e-4)


@pytest.mark.parametrize("method", ["ivf", "hnsw"])
def test_approximate_recall_reaches_target_against_exact(method):
    X = _goals(20_000, d=8, seed=2)
    target = 0.9
    idx = build_index(X, IndexSettings(method=method, k=10, target_recall=target, recall_queries=400))
    assert idx.report.method == method
    assert idx.report.recall_lower >= target and idx.report.recall >= idx.report.recall_lower
    # independent check on other queries (sampled from the indexed vectors, like the default
    # calibration), against scikit-learn's exact neighbours
    rows = np.random.default_rng(9).choice(len(X), 300, replace=False)
    Q = X[rows]
    _, ids = idx.search(Q, 10)
    _, ref = _sk_neighbours(X, Q, 10)
    assert recall_at_k(X, Q, ids, ref) >= target - 0.03  # sampling error of 300 queries
    if method == "ivf":
        assert 1 <= idx.report.nprobe < idx.report.nlist
    else:
        assert idx.report.ef_search >= 10


def test_ivf_tuning_with_given_calibration_queries_holds_on_new_queries():
    X = _goals(20_000, d=8, seed=3)
    cal, new = _goals(500, d=8, seed=4), _goals(500, d=8, seed=5)
    idx = build_index(X, IndexSettings(method="ivf", k=10, target_recall=0.95), calibration=cal)
    assert idx.report.calibration == "given" and idx.report.recall_queries == 500
    _, ids = idx.search(new, 10)
    _, ref = _sk_neighbours(X, new, 10)
    assert recall_at_k(X, new, ids, ref) >= 0.95 - 0.02


def test_tie_aware_recall_counts_equally_near_duplicates():
    # a robot standing still logs identical states: any of them is a correct neighbour
    X = np.repeat(_goals(50, d=3, seed=6), 4, axis=0)
    Q = X[0:20:4]  # one query per duplicated group 0..4
    exact = np.tile(np.arange(4), (5, 1)) + 4 * np.arange(5)[:, None]
    shuffled = exact[:, ::-1].copy()
    assert recall_at_k(X, Q, shuffled, exact) == 1.0
    wrong = exact.copy()
    wrong[:, 0] = (wrong[:, 0] + 40) % len(X)
    assert recall_at_k(X, Q, wrong, exact) == pytest.approx(0.75)


def test_builds_are_byte_identical_run_to_run_and_across_thread_counts():
    X = _goals(30_000, d=8, seed=7)
    Q = _goals(300, d=8, seed=8)
    out = []
    for threads in (1, 1, 2):
        idx = build_index(X, IndexSettings(method="ivf", k=10, threads=threads))
        d, i = idx.search(Q, 10)
        out.append((faiss.serialize_index(idx._index).tobytes(), d.tobytes(), i.tobytes(), idx.report))
    assert out[0] == out[1]
    assert out[0][:3] == out[2][:3]  # same lists, vectors, results with 2 threads
    assert out[0][3].nprobe == out[2][3].nprobe
    h = [build_index(X[:5000], IndexSettings(method="hnsw", threads=t)) for t in (1, 2)]
    assert faiss.serialize_index(h[0]._index).tobytes() == faiss.serialize_index(h[1]._index).tobytes()


def test_faiss_threads_sets_and_restores_the_process_wide_count():
    before = faiss.omp_get_max_threads()
    with faiss_threads(1):
        assert faiss.omp_get_max_threads() == 1
    assert faiss.omp_get_max_threads() == before


def test_labels_and_short_results():
    X = _goals(5, d=2, seed=9)
    idx = build_index(X, IndexSettings(method="exact"), labels=np.arange(5) * 10 + 7)
    d, i = idx.search(X[:2], 7)
    assert set(i[0, :5].tolist()) == {7, 17, 27, 37, 47} and i[0, 0] == 7
    assert np.all(i[:, 5:] == -1) and np.all(np.isinf(d[:, 5:]))
    assert np.all(np.diff(d[:, :5], axis=1) >= 0)


def test_auto_method_picks_exact_for_small_and_ivf_for_large_sets():
    assert build_index(_goals(100), IndexSettings(exact_below=1000)).report.method == "exact"
    assert build_index(_goals(3000), IndexSettings(exact_below=1000, recall_queries=100)).report.method == "ivf"


@pytest.mark.parametrize("bad, match", [
    (dict(method="kd-tree"), "index method"), (dict(k=0), "k a positive"), (dict(target_recall=1.5), "target_recall"),
    (dict(nlist=0), "nlist"), (dict(threads=0), "threads"), (dict(confidence_z=-1), "confidence_z"),
])
def test_bad_settings_raise(bad, match):
    with pytest.raises(EmbeddingError, match=match):
        build_index(_goals(50), IndexSettings(**bad))


def test_bad_vectors_and_queries_raise():
    with pytest.raises(EmbeddingError, match=r"goal vectors of shape \(N, D\)"):
        build_index(np.zeros(10))
    with pytest.raises(EmbeddingError, match="finite goal vectors"):
        build_index(np.array([[0.0, np.nan]]))
    with pytest.raises(EmbeddingError, match="one label per vector"):
        build_index(_goals(10), labels=np.arange(3))
    idx = build_index(_goals(10, d=3))
    with pytest.raises(EmbeddingError, match=r"queries of shape \(M, 3\)"):
        idx.search(np.zeros((2, 4)), 1)
    with pytest.raises(EmbeddingError, match="k a positive"):
        idx.search(np.zeros((2, 3)), 0)
    with pytest.raises(EmbeddingError, match="calibration queries"):
        build_index(_goals(100, d=3), IndexSettings(method="ivf"), calibration=np.zeros((3, 2)))


@settings(max_examples=40, deadline=None)
@given(n=st.integers(1, 300), m=st.integers(0, 400), seed=st.integers(0, 2**32), slot=st.integers(0, 3))
def test_sample_rows_are_distinct_sorted_and_reproducible(n, m, seed, slot):
    rows = sample_rows(n, m, seed, slot)
    assert rows.shape == (min(n, m),)
    assert np.all(np.diff(rows) > 0) and (rows.size == 0 or (rows[0] >= 0 and rows[-1] < n))
    assert np.array_equal(rows, sample_rows(n, m, seed, slot))

"""Embeddings checked against outside references: scikit-learn and a published worked example."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from goalkit.goals.checks import successive_pairs
from goalkit.goals.frames import FrameEmbedding, downsample
from goalkit.goals.linear import PCA, Raw, Standardised
from goalkit.goals.sfa import SFA, quadratic_expand


def _gantry_like(n=3000, seed=0):
    """Invented correlated features with a distinct spectrum (unit-test data)."""
    g = np.random.default_rng(seed)
    scales = np.array([3.0, 2.0, 1.2, 0.7, 0.4, 0.1])
    basis, _ = np.linalg.qr(g.normal(size=(6, 6)))
    return g.normal(size=(n, 6)) * scales @ basis.T + np.array([1.5, 0.4, 0.2, 9.0, -3.0, 100.0])


# ---- PCA against scikit-learn's PCA (sklearn.decomposition.PCA, full SVD solver) ---------------
@pytest.mark.parametrize("k", [2, 6])
def test_pca_matches_scikit_learn(k):
    from sklearn.decomposition import PCA as SkPCA

    X = _gantry_like()
    ours = PCA(n_components=k).fit(X)
    ref = SkPCA(n_components=k, svd_solver="full").fit(X)
    # components agree up to the sign of each axis
    dots = np.abs(np.sum(ours.components_ * ref.components_, axis=1))
    np.testing.assert_allclose(dots, 1.0, atol=1e-9)
    np.testing.assert_allclose(ours.explained_variance_, ref.explained_variance_, rtol=1e-9)
    np.testing.assert_allclose(ours.explained_variance_ratio_, ref.explained_variance_ratio_, rtol=1e-9)
    np.testing.assert_allclose(ours.mean_, ref.mean_, rtol=1e-12)
    signs = np.sign(np.sum(ours.components_ * ref.components_, axis=1))
    np.testing.assert_allclose(ours.transform(X[:50]), ref.transform(X[:50]) * signs, atol=1e-8)


def test_pca_whiten_matches_scikit_learn():
    from sklearn.decomposition import PCA as SkPCA

    X = _gantry_like(seed=1)
    ours = PCA(n_components=4, whiten=True).fit(X)
    ref = SkPCA(n_components=4, whiten=True, svd_solver="full").fit(X)
    signs = np.sign(np.sum(ours.components_ * ref.components_, axis=1))
    np.testing.assert_allclose(ours.transform(X[:100]), ref.transform(X[:100]) * signs, atol=1e-8)
    np.testing.assert_allclose(np.cov(ours.transform(X), rowvar=False), np.eye(4), atol=1e-9)


def test_pca_chunked_covariance_equals_one_shot_for_long_inputs():
    # more rows than one moment chunk (65536): the chunked X.T @ X must equal numpy's np.cov
    g = np.random.default_rng(3)
    X = g.normal(size=(140_000, 3)) @ np.array([[2, 0, 0], [1, 1, 0], [0, 0.5, 0.2]]) + 50.0
    p = PCA().fit(X)
    evals = np.sort(np.linalg.eigvalsh(np.cov(X, rowvar=False)))[::-1]
    np.testing.assert_allclose(p.explained_variance_, evals, rtol=1e-9)


# ---- Standardised against scikit-learn's StandardScaler --------------------------------------
def test_standardised_matches_standard_scaler_including_constant_dimension():
    from sklearn.preprocessing import StandardScaler

    X = _gantry_like(500)
    X[:, 2] = 0.25  # a constant dimension (e.g. a tray that never moves)
    ours = Standardised().fit(X)
    ref = StandardScaler().fit(X)
    np.testing.assert_allclose(ours.mean_, ref.mean_, rtol=1e-12)
    np.testing.assert_allclose(ours.scale_, ref.scale_, rtol=1e-10)
    np.testing.assert_allclose(ours.transform(X), ref.transform(X), atol=1e-10)
    assert ours.constant_.tolist() == [False, False, True, False, False, False]
    assert np.all(ours.transform(X)[:, 2] == 0.0)


def test_raw_is_identity_as_float64():
    X = np.arange(12, dtype=np.int32).reshape(4, 3)
    r = Raw().fit(X)
    out = r.transform(X)
    assert out.dtype == np.float64 and np.array_equal(out, X)


# ---- SFA: the worked example of Wiskott and Sejnowski (2002), Neural Computation 14(4) ----------
# Section 3 ("a simple example", recalled from memory): x1 = sin t + cos^2(11 t), x2 = cos(11 t),
# t in [0, 2 pi]. With the degree-2 expansion the slowest output is y = +/- sin t
# (x1 - x2^2 = sin t is a degree-2 polynomial of the input).
T = np.linspace(0.0, 2.0 * np.pi, 2000)
X_WS = np.c_[np.sin(T) + np.cos(11 * T) ** 2, np.cos(11 * T)]
ONE_EPISODE = np.array([0, T.shape[0]])


def test_sfa_quadratic_finds_sin_t():
    sfa = SFA(n_components=1, degree=2).fit(X_WS, ONE_EPISODE)
    y = sfa.transform(X_WS)[:, 0]
    assert abs(np.corrcoef(y, np.sin(T))[0, 1]) > 0.99
    # unit variance, zero mean on the training signal (SFA's constraints, ibid. section 2)
    assert abs(y.mean()) < 1e-9 and abs(y.var(ddof=1) - 1) < 1e-9
    # slowness: y = sin t / sqrt(1/2) gives mean (dy)^2 = dt^2 mean(cos^2 t) / (1/2) = dt^2
    dt = T[1] - T[0]
    assert sfa.delta_[0] == pytest.approx(np.mean(np.diff(np.sin(T) / np.sin(T).std(ddof=1)) ** 2), rel=1e-3)
    assert sfa.delta_[0] == pytest.approx(dt ** 2, rel=0.01)


def test_sfa_linear_cannot_find_sin_t():
    y = SFA(n_components=1, degree=1).fit(X_WS, ONE_EPISODE).transform(X_WS)[:, 0]
    c = abs(np.corrcoef(y, np.sin(T))[0, 1])
    # analytic bound: x2 is uncorrelated with sin t, so no linear output can beat corr(x1, sin t)
    # = sqrt(var sin / (var sin + var cos^2(11t))) = sqrt(0.5 / 0.625) = 0.894
    assert c <= np.sqrt(0.8) + 1e-3
    assert c < 0.95


def test_sfa_outputs_are_decorrelated_and_ordered_by_slowness():
    g = np.random.default_rng(5)
    t = np.arange(4000) * (4 * 2 * np.pi / 4000)  # whole periods: the three sources are orthogonal
    X = np.c_[np.sin(t), np.sin(5 * t), np.sin(13 * t)] @ g.normal(size=(3, 3)) + 1e-5 * g.normal(size=(4000, 3))
    sfa = SFA(degree=1).fit(X, np.array([0, 4000]))
    Y = sfa.transform(X)
    np.testing.assert_allclose(np.cov(Y, rowvar=False), np.eye(3), atol=1e-9)
    assert np.all(np.diff(sfa.delta_) > 0)
    np.testing.assert_allclose(np.mean(np.diff(Y, axis=0) ** 2, axis=0), sfa.delta_, rtol=1e-9)
    assert abs(np.corrcoef(Y[:, 0], np.sin(t))[0, 1]) > 0.99
    assert abs(np.corrcoef(Y[:, 2], np.sin(13 * t))[0, 1]) > 0.99


def test_sfa_never_uses_differences_across_episode_boundaries():
    # two episodes whose states differ by a large jump at the boundary; the fit on the
    # concatenation with offsets must equal the fit from the within-episode differences only
    t = np.linspace(0, 2 * np.pi, 300)
    a = np.c_[np.sin(t), np.cos(3 * t)]
    b = np.c_[np.sin(t) + 5.0, 10 * np.cos(3 * t)]
    X = np.r_[a, b]
    sfa = SFA(degree=1).fit(X, np.array([0, 300, 600]))
    Y = sfa.transform(X)
    within = np.r_[np.diff(Y[:300], axis=0), np.diff(Y[300:], axis=0)]
    np.testing.assert_allclose(np.mean(within ** 2, axis=0), sfa.delta_, rtol=1e-9)
    across = np.mean(np.diff(Y, axis=0) ** 2, axis=0)
    assert not np.allclose(across, sfa.delta_, rtol=1e-3)
    # and the boundary matters: fitting as one episode gives another solution
    one = SFA(degree=1).fit(X, np.array([0, 600]))
    assert not np.allclose(np.abs(one.weights_), np.abs(sfa.weights_), rtol=1e-3)


def test_sfa_result_does_not_depend_on_chunking_of_moments(monkeypatch):
    import goalkit.goals.sfa as sfa_mod

    g = np.random.default_rng(2)
    X = np.cumsum(g.normal(size=(5000, 3)), axis=0)
    off = np.array([0, 1700, 1701, 5000])
    full = SFA(degree=2, n_components=3).fit(X, off)
    monkeypatch.setattr(sfa_mod, "CHUNK_ROWS", 777)
    small = SFA(degree=2, n_components=3).fit(X, off)
    np.testing.assert_allclose(small.weights_, full.weights_, rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(small.delta_, full.delta_, rtol=1e-8)


def test_quadratic_expansion_spans_all_degree_2_monomials():
    # against scikit-learn's PolynomialFeatures(degree=2, include_bias=False): same columns, same order
    from sklearn.preprocessing import PolynomialFeatures

    Z = np.random.default_rng(0).normal(size=(7, 4))
    ref = PolynomialFeatures(degree=2, include_bias=False).fit_transform(Z)
    np.testing.assert_allclose(quadratic_expand(Z), ref, rtol=1e-14)


# ---- frames ------------------------------------------------------------------------------------
def test_block_average_matches_scikit_image_definition():
    # block_reduce(image, (2, 2), np.mean) semantics (scikit-image), written out directly; trailing
    # rows/columns that do not fill a block are dropped
    g = np.random.default_rng(0)
    f = g.integers(0, 256, size=(3, 7, 9, 2), dtype=np.uint8)
    out = downsample(f, (2, 3))
    ref = np.zeros((3, 3, 3, 2))
    for i in range(3):
        for j in range(3):
            ref[:, i, j] = f[:, 2 * i:2 * i + 2, 3 * j:3 * j + 3].astype(float).mean(axis=(1, 2))
    np.testing.assert_allclose(out, ref.reshape(3, -1) / 255.0, rtol=1e-14)
    assert out.min() >= 0 and out.max() <= 1


def test_frame_embedding_feeds_pca():
    g = np.random.default_rng(1)
    frames = g.integers(0, 256, size=(60, 8, 8), dtype=np.uint8)
    fe = FrameEmbedding(PCA(n_components=3), block=2).fit(frames)
    direct = PCA(n_components=3).fit(downsample(frames, (2, 2)))
    np.testing.assert_allclose(fe.transform(frames[:5]), direct.transform(downsample(frames[:5], (2, 2))))
    assert fe.output_dim_ == 3 and fe.n_features_in_ == 16


# ---- property tests of the indexing rule (hypothesis) -------------------------------------------
@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(min_value=0, max_value=6), min_size=1, max_size=8))
def test_successive_pairs_stay_inside_episodes(lengths):
    off = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    mask = successive_pairs(off)
    n = int(off[-1])
    assert mask.shape == (max(n - 1, 0),)
    episode = np.repeat(np.arange(len(lengths)), lengths)
    for i in range(n - 1):  # small data: the plain definition, pair by pair
        assert mask[i] == (episode[i] == episode[i + 1])
    assert mask.sum() == sum(max(m - 1, 0) for m in lengths)

"""Goal maps give bit-identical rows whatever batch a state is computed in."""

import numpy as np
from hypothesis import given, settings, strategies as st

from goalkit.goals import PCA, SFA, EmbeddingGoalMap
from goalkit.goals.rowwise import rowwise_product
from goalkit.logs.episodes import EpisodeSet

RS = np.random.default_rng(11)
X = np.cumsum(RS.normal(size=(3000, 7)), axis=0)
OFFSETS = np.array([0, 1000, 2000, 3000])


@settings(max_examples=40, deadline=None)
@given(a=st.integers(0, 2999), n=st.integers(1, 600))
def test_rowwise_product_rows_do_not_depend_on_the_batch(a, n):
    W = np.linspace(-1, 1, 7 * 5).reshape(7, 5)
    full = rowwise_product(X, W)
    np.testing.assert_array_equal(rowwise_product(X[a:a + n], W), full[a:a + n])
    # and it is the matrix product (numpy's matmul as the reference, to rounding)
    np.testing.assert_allclose(full, X @ W, rtol=1e-12, atol=1e-9)


@settings(max_examples=25, deadline=None)
@given(a=st.integers(0, 2990), n=st.integers(1, 400), which=st.sampled_from(["pca", "sfa1", "sfa2"]))
def test_embedding_goal_maps_are_batch_invariant(a, n, which):
    emb = {"pca": PCA(n_components=3), "sfa1": SFA(n_components=3), "sfa2": SFA(n_components=3, degree=2)}[which]
    emb.fit(X, OFFSETS)
    full = emb.transform(X)
    np.testing.assert_array_equal(emb.transform(X[a:a + n]), full[a:a + n])
    # through the goal-map interface, with a chunk of episodes
    eps = EpisodeSet(observations=X, actions=np.zeros((X.shape[0] - 3, 1)), offsets=OFFSETS - np.arange(4),
                     episode_ids=np.arange(3))
    gm = EmbeddingGoalMap(emb)
    rows = np.arange(a, min(a + n, X.shape[0]))
    np.testing.assert_array_equal(gm(eps, rows), full[rows])

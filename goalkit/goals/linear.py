"""Linear embeddings: Raw (identity), Standardised (per-dimension scaling) and PCA."""

from __future__ import annotations

import numpy as np


from goalkit.errors import EmbeddingError, shown
from goalkit.goals.base import Embedding, register
from goalkit.goals.checks import check_features, check_offsets
from goalkit.goals.moments import mean_cov, mean_var
from goalkit.goals.rowwise import rowwise_product


def _prepare_fit(X, offsets, min_rows=1):
    """Check offsets (if given) and features of a fit; return (X float64, offsets or None)."""
    arr = np.asarray(X)
    off = None
    if offsets is not None:
        n = arr.shape[0] if arr.ndim >= 1 else 0
        off = check_offsets(offsets, n)
    return check_features(arr, offsets=off, min_rows=min_rows), off


@register
class Raw(Embedding):
    """The identity: goal vectors are the input features themselves.

    Examples
    --------
    >>> Raw().fit(np.ones((3, 2))).transform(np.array([[1, 2]]))
    array([[1., 2.]])
    """

    kind = "raw"
    _arrays = ("n_features_in_",)

    def fit(self, X, offsets=None) -> "Raw":
        X, _ = _prepare_fit(X, offsets)
        self.n_features_in_ = np.int64(X.shape[1])
        self._after_load(None)
        return self

    def _after_load(self, file) -> None:
        self.n_features_in_ = int(np.asarray(self.n_features_in_).reshape(()))
        if self.n_features_in_ < 1:
            raise self._shape_error("n_features_in_", "a positive width", [], file)
        self.output_dim_ = self.n_features_in_

    def state(self) -> dict:
        self._check_fitted()
        return {"n_features_in_": np.int64(self.n_features_in_)}

    def transform(self, X) -> np.ndarray:
        self._check_fitted()
        return check_features(X, n_features=self.n_features_in_).copy()


def constant_mask(mean: np.ndarray, var: np.ndarray, n: int) -> np.ndarray:
    """Dimensions whose variance is indistinguishable from zero in float64.

    The bound is the one scikit-learn's StandardScaler uses for constant features
    (``var <= n * eps * var + (n * mean * eps) ** 2``; recalled from its source, 2024).
    """
    eps = np.finfo(np.float64).eps
    return var <= n * eps * var + (n * mean * eps) ** 2


@register
class Standardised(Embedding):
    """Per-dimension standardisation: ``(x - mean_) / scale_``.

    Constant dimensions (zero variance) keep ``scale_ = 1``, so they map to 0 rather than to
    NaN; ``constant_`` marks them. The scale is the population standard deviation
    (``ddof=0``), as in scikit-learn's StandardScaler.

    Examples
    --------
    >>> s = Standardised().fit(np.array([[0., 5.], [2., 5.]]))
    >>> s.transform(np.array([[1., 5.], [2., 7.]])).tolist()
    [[0.0, 0.0], [1.0, 2.0]]
    """

    kind = "standardised"
    _arrays = ("mean_", "scale_", "constant_")

    def fit(self, X, offsets=None) -> "Standardised":
        X, _ = _prepare_fit(X, offsets)
        mean, var = mean_var(X)
        const = constant_mask(mean, var, X.shape[0])
        self.mean_ = mean
        self.scale_ = np.where(const, 1.0, np.sqrt(var))
        self.constant_ = const
        self._after_load(None)
        return self

    def _after_load(self, file) -> None:
        d = np.shape(self.mean_)
        if len(d) != 1 or d[0] < 1:
            raise self._shape_error("mean_", "a 1-D array of per-dimension means", self.mean_, file)
        for name in ("scale_", "constant_"):
            if np.shape(getattr(self, name)) != d:
                raise self._shape_error(name, f"shape {d} like mean_", getattr(self, name), file)
        if not np.all(np.asarray(self.scale_) > 0):
            raise EmbeddingError("expected positive scales", file=file, key="attr.scale_")
        self.mean_ = np.asarray(self.mean_, dtype=np.float64)
        self.scale_ = np.asarray(self.scale_, dtype=np.float64)
        self.constant_ = np.asarray(self.constant_, dtype=bool)
        self.n_features_in_ = self.output_dim_ = int(d[0])

    def transform(self, X) -> np.ndarray:
        self._check_fitted()
        X = check_features(X, n_features=self.n_features_in_)
        return (X - self.mean_) / self.scale_


@register
class PCA(Embedding):
    """Principal component analysis: project centred features on the top eigenvectors.

    The covariance is accumulated as ``X.T @ X`` over row chunks and diagonalised with
    ``numpy.linalg.eigh``, so a fit is one pass over the data whatever its length.

    Parameters
    ----------
    n_components : int or None
        Output width (``None``: as many as input dimensions).
    whiten : bool
        Divide each component by its standard deviation, so the outputs have unit variance.

    Attributes
    ----------
    mean_ : ndarray (D,)
    components_ : ndarray (K, D)
        Rows are unit principal axes, by decreasing variance; each row's largest-magnitude
        entry is positive (the sign rule of scikit-learn's ``svd_flip`` on the axes).
    explained_variance_ : ndarray (K,)
        Variance along each axis (``ddof=1``).
    explained_variance_ratio_ : ndarray (K,)
        Fraction of the total variance along each axis.

    Examples
    --------
    >>> X = np.array([[0., 0.], [1., 1.], [2., 2.], [3., 3.]])
    >>> p = PCA(n_components=1).fit(X)
    >>> np.round(p.components_, 6).tolist(), np.round(p.explained_variance_ratio_, 6).tolist()
    ([[0.707107, 0.707107]], [1.0])
    """

    kind = "pca"
    _params = ("n_components", "whiten")
    _arrays = ("mean_", "components_", "explained_variance_", "explained_variance_ratio_")

    def __init__(self, n_components: int | None = None, whiten: bool = False):
        self.n_components = n_components
        self.whiten = whiten

    def _k(self, d: int) -> int:
        k = d if self.n_components is None else self.n_components
        if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or not 1 <= k <= d:
            raise EmbeddingError(f"expected n_components an integer in 1..{d} (the input width), got {shown(k)}")
        return int(k)

    def fit(self, X, offsets=None) -> "PCA":
        X, _ = _prepare_fit(X, offsets, min_rows=2)
        k = self._k(X.shape[1])
        mean, cov = mean_cov(X)
        evals, evecs = np.linalg.eigh(cov)
        evals = np.maximum(evals[::-1], 0.0)  # eigh sorts ascending; we want decreasing variance
        axes = np.ascontiguousarray(evecs[:, ::-1].T)
        pick = np.argmax(np.abs(axes), axis=1)
        axes *= np.sign(axes[np.arange(axes.shape[0]), pick])[:, None]
        total = float(np.trace(cov))
        if self.whiten and not np.all(evals[:k] > 1e-12 * max(evals[0], np.finfo(float).tiny)):
            r = int(np.sum(evals > 1e-12 * max(evals[0], np.finfo(float).tiny)))
            raise EmbeddingError(f"expected at least n_components={k} directions with nonzero variance to whiten, "
                                 f"the features have {r}")
        self.mean_ = mean
        self.components_ = axes[:k]
        self.explained_variance_ = evals[:k]
        self.explained_variance_ratio_ = evals[:k] / total if total > 0 else np.zeros(k)
        self._after_load(None)
        return self

    def _after_load(self, file) -> None:
        if np.ndim(self.mean_) != 1:
            raise self._shape_error("mean_", "a 1-D mean", self.mean_, file)
        d = np.shape(self.mean_)[0]
        if np.ndim(self.components_) != 2 or np.shape(self.components_)[1] != d or np.shape(self.components_)[0] < 1:
            raise self._shape_error("components_", f"(K, {d}) principal axes", self.components_, file)
        k = np.shape(self.components_)[0]
        for name in ("explained_variance_", "explained_variance_ratio_"):
            if np.shape(getattr(self, name)) != (k,):
                raise self._shape_error(name, f"shape ({k},)", getattr(self, name), file)
        self.mean_ = np.asarray(self.mean_, dtype=np.float64)
        self.components_ = np.asarray(self.components_, dtype=np.float64)
        self.explained_variance_ = np.asarray(self.explained_variance_, dtype=np.float64)
        self.explained_variance_ratio_ = np.asarray(self.explained_variance_ratio_, dtype=np.float64)
        self.n_features_in_, self.output_dim_ = int(d), int(k)
        if self.whiten and not np.all(self.explained_variance_ > 0):
            raise EmbeddingError("expected positive explained variances for a whitening PCA", file=file,
                                 key="attr.explained_variance_")

    def transform(self, X) -> np.ndarray:
        self._check_fitted()
        X = check_features(X, n_features=self.n_features_in_)
        Y = rowwise_product(X - self.mean_, self.components_.T)
        if self.whiten:
            Y /= np.sqrt(self.explained_variance_)
        return Y

    def summary(self) -> dict:
        out = super().summary()
        out["explained_variance"] = self.explained_variance_.tolist()
        out["explained_variance_ratio"] = self.explained_variance_ratio_.tolist()
        out["explained_variance_ratio_total"] = float(self.explained_variance_ratio_.sum())
        return out

"""Slow feature analysis (Wiskott and Sejnowski, 2002), linear or on a degree-2 expansion.

The algorithm of Wiskott and Sejnowski (2002, section 3): expand the input (identity or all
monomials of degree 1 and 2), centre and sphere the expanded signal, then take the
directions in which the sphered signal's time derivative has the least variance. The
derivative is the successive difference between consecutive states *of one episode*: pairs
that straddle an episode boundary are never used. The output components are uncorrelated,
have zero mean and unit variance on the training data, and come ordered slowest first;
``delta_`` holds their slowness, the mean squared step-to-step difference.
"""

from __future__ import annotations

import numpy as np


from goalkit.errors import EmbeddingError, shown
from goalkit.goals.base import Embedding, register
from goalkit.goals.checks import check_features, check_offsets, successive_pairs
from goalkit.goals.linear import constant_mask
from goalkit.goals.moments import mean_var
from goalkit.goals.rowwise import rowwise_product

#: rows per chunk of the expanded signal (small enough to stay in cache; fixed, so results are
#: identical run to run)
CHUNK_ROWS = 8192

#: sphering drops directions whose variance is below this fraction of the largest one
RANK_TOL = 1e-10


def quadratic_expand(Z: np.ndarray) -> np.ndarray:
    """Return ``[z_1..z_D, z_i z_j for i <= j]``: all monomials of degree 1 and 2.

    Examples
    --------
    >>> quadratic_expand(np.array([[2., 3.]])).tolist()
    [[2.0, 3.0, 4.0, 6.0, 9.0]]
    """
    n, d = Z.shape
    out = np.empty((n, d + d * (d + 1) // 2))
    out[:, :d] = Z
    col = d
    for i in range(d):  # loop over input dimensions (order of numpy's triu_indices), not rows
        np.multiply(Z[:, i:i + 1], Z[:, i:], out=out[:, col:col + d - i])
        col += d - i
    return out


def expanded_dim(d: int, degree: int) -> int:
    """Width of the expansion of a ``d``-dimensional input."""
    return d if degree == 1 else d + d * (d + 1) // 2


def _sign_fix(V: np.ndarray) -> np.ndarray:
    """Flip columns so that each column's largest-magnitude entry is positive (deterministic)."""
    pick = np.argmax(np.abs(V), axis=0)
    return V * np.sign(V[pick, np.arange(V.shape[1])])[None, :]


@register
class SFA(Embedding):
    """Slow feature analysis on within-episode successive differences.

    Parameters
    ----------
    n_components : int or None
        Number of slow features kept (``None``: all non-degenerate directions).
    degree : {1, 2}
        1: linear SFA; 2: SFA on the degree-2 polynomial expansion.

    Attributes
    ----------
    input_mean_, input_scale_ : ndarray (D,)
        The input is standardised before the expansion (an affine change that leaves the
        space of degree-2 polynomials, hence the solution, unchanged, and keeps it well
        conditioned). Constant dimensions have scale 1.
    expansion_mean_ : ndarray (H,)
        Mean of the expanded signal.
    weights_ : ndarray (H, K)
        Map from the centred expansion to the slow features (sphering included).
    delta_ : ndarray (K,)
        Mean squared successive difference of each output on the training data, increasing.
    n_effective_ : int
        Non-degenerate directions of the expanded signal.

    Examples
    --------
    >>> t = np.linspace(0, 2 * np.pi, 500)
    >>> X = np.c_[np.sin(t) + np.cos(11 * t) ** 2, np.cos(11 * t)]
    >>> y = SFA(n_components=1, degree=2).fit(X, np.array([0, 500])).transform(X)[:, 0]
    >>> bool(abs(np.corrcoef(y, np.sin(t))[0, 1]) > 0.99)
    True
    """

    kind = "sfa"
    _params = ("n_components", "degree")
    _arrays = ("input_mean_", "input_scale_", "expansion_mean_", "weights_", "delta_")

    def __init__(self, n_components: int | None = None, degree: int = 1):
        self.n_components = n_components
        self.degree = degree

    def _check_params(self) -> None:
        if isinstance(self.degree, bool) or self.degree not in (1, 2):
            raise EmbeddingError(f"expected SFA degree 1 (linear) or 2 (quadratic expansion), got {shown(self.degree)}")
        k = self.n_components
        if k is not None and (isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 1):
            raise EmbeddingError(f"expected n_components a positive integer or None, got {shown(k)}")

    def _expand(self, Xc: np.ndarray) -> np.ndarray:
        Z = (Xc - self.input_mean_) / self.input_scale_
        return Z if self.degree == 1 else quadratic_expand(Z)

    def fit(self, X, offsets=None) -> "SFA":
        """Fit on features ``X`` (rows = states) with episode row offsets.

        Parameters
        ----------
        X : array_like, shape (M, D)
            States of all episodes, concatenated.
        offsets : array_like of int, shape (E + 1,)
            Row offsets of the episodes in ``X`` (``episodes.state_offsets()`` for
            state-level features). Required: differences never cross an episode boundary.
        """
        self._check_params()
        arr = np.asarray(X)
        if offsets is None:
            raise EmbeddingError("expected episode offsets for SFA (the differences must stay inside episodes), "
                                 "got None")
        off = check_offsets(offsets, arr.shape[0] if arr.ndim else 0)
        X = check_features(arr, offsets=off, min_rows=3)
        n, d = X.shape
        pairs = successive_pairs(off)
        n_pairs = int(pairs.sum())
        if n_pairs < 2:
            raise EmbeddingError(f"expected at least 2 within-episode successive pairs of states for SFA, got {n_pairs}")
        mean, var = mean_var(X)
        const = constant_mask(mean, var, n)
        self.input_mean_ = mean
        self.input_scale_ = np.where(const, 1.0, np.sqrt(var))
        h = expanded_dim(d, self.degree)
        # one pass: sums of the expansion, its outer products, and those of its differences
        shift = self._expand(X[:min(n, CHUNK_ROWS)]).mean(axis=0)
        s1, s2, dd = np.zeros(h), np.zeros((h, h)), np.zeros((h, h))
        for a in range(0, n, CHUNK_ROWS):  # loop over chunks, not rows
            b = min(a + CHUNK_ROWS, n)
            E = self._expand(X[a:min(b + 1, n)]) - shift  # one row of overlap for the last difference
            c = E[:b - a]
            s1 += c.sum(axis=0)
            s2 += c.T @ c
            D = (E[1:] - E[:-1])[pairs[a:a + E.shape[0] - 1]]
            dd += D.T @ D
        m = s1 / n
        cov = (s2 - n * np.outer(m, m)) / (n - 1)
        cov = (cov + cov.T) / 2
        dcov = (dd + dd.T) / (2 * n_pairs)
        lam, V = np.linalg.eigh(cov)
        keep = lam > RANK_TOL * max(lam[-1], np.finfo(float).tiny)
        r = int(keep.sum())
        if r == 0:
            raise EmbeddingError("expected features that vary over the log; every dimension is constant")
        k = r if self.n_components is None else int(self.n_components)
        if k > r:
            raise EmbeddingError(f"expected n_components <= {r} (the non-degenerate directions of the "
                                 f"{'quadratic expansion' if self.degree == 2 else 'input'}), got {k}")
        S = V[:, keep] / np.sqrt(lam[keep])  # sphering: cov(E @ S) = I
        mu, U = np.linalg.eigh(S.T @ dcov @ S)  # ascending: slowest first
        U = _sign_fix(U[:, :k])
        self.expansion_mean_ = shift + m
        self.weights_ = S @ U
        self.delta_ = np.maximum(mu[:k], 0.0)
        self.n_effective_ = r
        self._after_load(None)
        return self

    def _after_load(self, file) -> None:
        self._check_params()
        if np.ndim(self.input_mean_) != 1 or np.shape(self.input_scale_) != np.shape(self.input_mean_):
            raise self._shape_error("input_scale_", f"shape {np.shape(self.input_mean_)} like input_mean_",
                                    self.input_scale_, file)
        d = int(np.shape(self.input_mean_)[0])
        h = expanded_dim(d, int(self.degree))
        if np.shape(self.expansion_mean_) != (h,):
            raise self._shape_error("expansion_mean_", f"shape ({h},) for degree {self.degree}",
                                    self.expansion_mean_, file)
        if np.ndim(self.weights_) != 2 or np.shape(self.weights_)[0] != h or np.shape(self.weights_)[1] < 1:
            raise self._shape_error("weights_", f"({h}, K) weights", self.weights_, file)
        k = int(np.shape(self.weights_)[1])
        if np.shape(self.delta_) != (k,):
            raise self._shape_error("delta_", f"shape ({k},)", self.delta_, file)
        for name in self._arrays:
            setattr(self, name, np.asarray(getattr(self, name), dtype=np.float64))
        self.n_features_in_, self.output_dim_ = d, k
        if not hasattr(self, "n_effective_"):
            self.n_effective_ = k

    def transform(self, X) -> np.ndarray:
        self._check_fitted()
        X = check_features(X, n_features=self.n_features_in_)
        out = np.empty((X.shape[0], self.output_dim_))
        for a in range(0, X.shape[0], CHUNK_ROWS):  # the expansion is wide: bound its memory
            out[a:a + CHUNK_ROWS] = rowwise_product(self._expand(X[a:a + CHUNK_ROWS]) - self.expansion_mean_,
                                                    self.weights_)
        return out

    def summary(self) -> dict:
        out = super().summary()
        out["delta"] = self.delta_.tolist()
        out["expanded_dim"] = int(self.expansion_mean_.shape[0])
        return out

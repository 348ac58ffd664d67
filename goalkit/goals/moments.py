"""Chunked first and second moments: mean and covariance via ``X.T @ X`` over row chunks.

The rows are shifted by the mean of the first chunk before the products are summed, which
keeps the one-pass formula accurate when the data sit far from the origin. The chunk size
is fixed, so results do not depend on how the caller's data were read.
"""

from __future__ import annotations

import numpy as np

#: rows per chunk of the moment sums (fixed: results are identical run to run)
CHUNK_ROWS = 65536


def mean_cov(X: np.ndarray, chunk_rows: int = CHUNK_ROWS) -> tuple[np.ndarray, np.ndarray]:
    """Return the mean and the covariance (``ddof=1``) of the rows of ``X``.

    Parameters
    ----------
    X : ndarray, shape (M, D), M >= 2
        Rows are samples (float32 or float64; sums are float64).
    chunk_rows : int
        Rows per chunk.

    Returns
    -------
    mean : ndarray of float64, shape (D,)
    cov : ndarray of float64, shape (D, D)

    Examples
    --------
    >>> X = np.array([[1., 2.], [3., 6.], [5., 10.]])
    >>> m, c = mean_cov(X)
    >>> m.tolist(), c.tolist()
    ([3.0, 6.0], [[4.0, 8.0], [8.0, 16.0]])
    """
    n, d = X.shape
    shift = np.asarray(X[:min(n, chunk_rows)], dtype=np.float64).mean(axis=0)
    s1 = np.zeros(d)
    s2 = np.zeros((d, d))
    for a in range(0, n, chunk_rows):  # loop over chunks, not rows
        c = np.asarray(X[a:a + chunk_rows], dtype=np.float64) - shift
        s1 += c.sum(axis=0)
        s2 += c.T @ c
    m = s1 / n
    cov = (s2 - n * np.outer(m, m)) / (n - 1)
    cov = (cov + cov.T) / 2
    return shift + m, cov


def mean_var(X: np.ndarray, chunk_rows: int = CHUNK_ROWS) -> tuple[np.ndarray, np.ndarray]:
    """Return per-column mean and variance (``ddof=0``) of the rows of ``X``, in chunks."""
    n, d = X.shape
    shift = np.asarray(X[:min(n, chunk_rows)], dtype=np.float64).mean(axis=0)
    s1 = np.zeros(d)
    s2 = np.zeros(d)
    for a in range(0, n, chunk_rows):
        c = np.asarray(X[a:a + chunk_rows], dtype=np.float64) - shift
        s1 += c.sum(axis=0)
        s2 += np.einsum("ij,ij->j", c, c)
    m = s1 / n
    var = np.maximum(s2 / n - m * m, 0.0)
    return shift + m, var

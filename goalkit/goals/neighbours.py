"""Nearest-neighbour index over goal vectors, on faiss: exact, IVF-flat or HNSW.

Build once over the goal vectors of the logged states, then ``index.search(queries, k)`` on
a chunk of goal vectors. Approximate indexes are tuned to a requested recall: the search
breadth (IVF's ``nprobe``, HNSW's ``efSearch``) is raised on a sample of queries until the
measured recall@k against exact search reaches the target, and the recall actually reached
is returned in an :class:`IndexReport` for the build summary and the dataset's provenance.

Determinism
-----------
Vectors are float32 inside faiss. The k-means that places IVF's lists is seeded
(``IndexSettings.seed``) and trained on a sample chosen by :mod:`goalkit.rng`; HNSW's level
draws use faiss's fixed internal seed. ``faiss.omp_set_num_threads`` sets the OpenMP
thread count of the whole process (not one index); :func:`faiss_threads` sets it for the
duration of a build or search and restores the previous value. Flat and IVF builds and
searches give byte-identical results with 1 or 2 threads (checked by the tests); HNSW
insertion order depends on scheduling with several threads, so HNSW is always built with
one thread.

Recall
------
recall@k of one query is the fraction of the ``k`` returned neighbours whose distance is
at most the exact ``k``-th neighbour distance (computed in float64). Without ties this is
the usual overlap ``|approx & exact| / k``; with duplicated states (a robot standing still)
it does not penalise returning an equally near duplicate.
"""

from __future__ import annotations

import contextlib
import math
from dataclasses import asdict, dataclass

import numpy as np

from goalkit import rng
from goalkit.errors import EmbeddingError, shown

METHODS = ("auto", "exact", "ivf", "hnsw")


@contextlib.contextmanager
def faiss_threads(n: int):
    """Run the block with ``faiss.omp_set_num_threads(n)``; restore the previous count after."""
    import faiss

    before = faiss.omp_get_max_threads()
    faiss.omp_set_num_threads(int(n))
    try:
        yield
    finally:
        faiss.omp_set_num_threads(before)


@dataclass(frozen=True)
class IndexSettings:
    """How to build a neighbour index.

    Parameters
    ----------
    method : {"auto", "exact", "ivf", "hnsw"}
        ``auto``: exact flat search up to ``exact_below`` vectors, IVF-flat above.
    k : int
        Neighbours per query the recall is tuned for.
    target_recall : float
        Smallest acceptable recall@k (approximate methods).
    confidence_z : float
        The tuned breadth must reach ``target_recall`` with the measured recall minus this
        many standard errors (1.645: a one-sided 95% normal bound; common practice), so that
        new queries of the same kind reach the target too.
    seed : int
        Seed of the k-means and of the training / recall samples.
    recall_queries : int
        Queries in the recall sample (drawn from the indexed vectors).
    exact_below : int
        ``auto`` uses exact search for at most this many vectors.
    nlist : int or None
        IVF lists; ``None``: ``4 * sqrt(n)`` (the low end of faiss's documented
        ``4*sqrt(n) .. 16*sqrt(n)`` guideline; common practice), at most ``n / 39``.
    train_per_list : int
        IVF k-means training points per list (faiss warns below 39; common practice).
    hnsw_m : int
        HNSW graph degree.
    hnsw_ef_construction : int
        HNSW build breadth.
    threads : int
        OpenMP threads for building and searching (HNSW builds always use 1).
    """

    method: str = "auto"
    k: int = 10
    target_recall: float = 0.95
    confidence_z: float = 1.645
    seed: int = 0
    recall_queries: int = 1000
    exact_below: int = 50_000
    nlist: int | None = None
    train_per_list: int = 64
    hnsw_m: int = 32
    hnsw_ef_construction: int = 64
    threads: int = 1

    def check(self) -> None:
        """Raise EmbeddingError for impossible settings."""
        if self.method not in METHODS:
            raise EmbeddingError(f"expected index method among {', '.join(METHODS)}, got {self.method!r}",
                                 key="method")
        for name in ("k", "recall_queries", "train_per_list", "hnsw_m", "hnsw_ef_construction", "threads"):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 1:
                raise EmbeddingError(f"expected {name} a positive integer, got {shown(v)}", key=name)
        if not 0.0 < float(self.target_recall) <= 1.0:
            raise EmbeddingError(f"expected target_recall in (0, 1], got {shown(self.target_recall)}", key="target_recall")
        if not 0.0 <= float(self.confidence_z) <= 10.0:
            raise EmbeddingError(f"expected confidence_z in [0, 10], got {shown(self.confidence_z)}", key="confidence_z")
        if self.nlist is not None and (not isinstance(self.nlist, (int, np.integer)) or self.nlist < 1):
            raise EmbeddingError(f"expected nlist a positive integer or None, got {shown(self.nlist)}", key="nlist")


@dataclass(frozen=True)
class IndexReport:
    """What was built and the recall it reached (for build summaries and provenance).

    Attributes
    ----------
    method : str
        ``exact``, ``ivf`` or ``hnsw`` (after resolving ``auto``).
    n_vectors, dim : int
        Indexed vectors and their width.
    k : int
        Neighbours per query the recall was measured for.
    target_recall : float
        Requested recall@k.
    recall : float
        recall@k measured on ``recall_queries`` calibration queries against exact search
        (exact search: 1.0 by construction, ``recall_queries`` 0).
    recall_lower : float
        ``recall`` minus ``confidence_z`` standard errors over the calibration queries; the
        search breadth is the smallest one whose lower bound reaches ``target_recall``.
    calibration : str
        ``"indexed"`` (a sample of the indexed vectors), ``"given"`` (queries passed in) or
        ``"none"`` (exact search).
    recall_queries : int
    nlist, nprobe : int
        IVF lists and lists probed per query (0 otherwise).
    hnsw_m, ef_search : int
        HNSW degree and search breadth (0 otherwise).
    seed : int
    memory_bytes : int
        Size of the serialised faiss index (vectors, lists, graph).
    """

    method: str
    n_vectors: int
    dim: int
    k: int
    target_recall: float
    recall: float
    recall_lower: float
    recall_queries: int
    calibration: str = "indexed"
    nlist: int = 0
    nprobe: int = 0
    hnsw_m: int = 0
    ef_search: int = 0
    seed: int = 0
    memory_bytes: int = 0

    def as_dict(self) -> dict:
        """Return the report as a JSON-able dict."""
        return asdict(self)


def _as_float32(x, dim: int | None, what: str) -> np.ndarray:
    arr = np.asarray(x)
    if arr.ndim != 2 or (dim is not None and arr.shape[1] != dim) or arr.shape[1] < 1:
        want = f"(M, {dim})" if dim is not None else "(N, D)"
        raise EmbeddingError(f"expected {what} of shape {want}, got {arr.shape}")
    if not (np.issubdtype(arr.dtype, np.floating) or np.issubdtype(arr.dtype, np.integer)):
        raise EmbeddingError(f"expected real-valued {what}, got dtype {arr.dtype}")
    out = np.ascontiguousarray(arr, dtype=np.float32)
    if not np.isfinite(out).all():
        row = int(np.flatnonzero(~np.isfinite(out).all(axis=1))[0])
        raise EmbeddingError(f"expected finite {what} (as float32), got NaN or inf in row {row}")
    return out


def sample_rows(n: int, m: int, seed: int, slot: int) -> np.ndarray:
    """Return ``min(m, n)`` distinct rows of ``0..n-1``, sorted, chosen by :mod:`goalkit.rng`."""
    if m >= n:
        return np.arange(n, dtype=np.int64)
    h = rng.hash64(seed, 0, np.arange(n, dtype=np.int64), slot, "subsample")
    return np.sort(np.argsort(h, kind="stable")[:m]).astype(np.int64)


def exact_sq_distances(vectors: np.ndarray, queries: np.ndarray, ids: np.ndarray) -> np.ndarray:
    """Squared L2 distances (float64) from each query to its candidate ids (-1 -> inf)."""
    safe = np.where(ids >= 0, ids, 0)
    diff = vectors[safe].astype(np.float64) - queries[:, None, :].astype(np.float64)
    d = np.einsum("mkd,mkd->mk", diff, diff)
    return np.where(ids >= 0, d, np.inf)


def recall_per_query(vectors, queries, approx_ids, exact_ids) -> np.ndarray:
    """Tie-aware recall@k of each query (see the module notes), float64 (M,)."""
    k = exact_ids.shape[1]
    d_exact = exact_sq_distances(vectors, queries, exact_ids)
    kth = d_exact.max(axis=1, where=np.isfinite(d_exact), initial=0.0)
    d_approx = exact_sq_distances(vectors, queries, approx_ids)
    ok = d_approx <= kth[:, None] * (1 + 1e-9) + 1e-12
    return ok.sum(axis=1) / k


def recall_at_k(vectors, queries, approx_ids, exact_ids) -> float:
    """Tie-aware recall@k (see the module notes) of ``approx_ids`` against ``exact_ids``."""
    return float(recall_per_query(vectors, queries, approx_ids, exact_ids).mean())


def lower_bound(per_query: np.ndarray, z: float) -> float:
    """Mean minus ``z`` standard errors (normal approximation; 0 queries -> the mean)."""
    m = float(per_query.mean())
    if per_query.shape[0] < 2 or z == 0:
        return m
    return m - z * float(per_query.std(ddof=1)) / np.sqrt(per_query.shape[0])


class NeighbourIndex:
    """A built neighbour index; create with :func:`build_index`.

    Attributes
    ----------
    report : IndexReport
    labels : ndarray of int64 or None
        What each indexed vector stands for (e.g. a global state number); search returns
        labels instead of positions when set.
    """

    def __init__(self, index, vectors: np.ndarray, report: IndexReport, labels=None, threads: int = 1):
        self._index = index
        self._vectors = vectors
        self.report = report
        self.labels = labels
        self._threads = threads

    def __getstate__(self) -> dict:
        """Pickle support: the faiss index travels serialised (faiss objects do not pickle)."""
        import faiss

        state = dict(self.__dict__)
        state["_index"] = faiss.serialize_index(self._index)
        return state

    def __setstate__(self, state: dict) -> None:
        import faiss

        state = dict(state)
        state["_index"] = faiss.deserialize_index(state["_index"])
        self.__dict__.update(state)

    @property
    def breadth(self) -> int:
        """Search breadth: IVF ``nprobe`` or HNSW ``efSearch`` (0 for exact search)."""
        if self.report.method == "ivf":
            return int(self._index.nprobe)
        if self.report.method == "hnsw":
            return int(self._index.hnsw.efSearch)
        return 0

    @property
    def max_breadth(self) -> int:
        """Largest useful breadth: ``nlist`` for IVF, the vector count for HNSW, 0 for exact."""
        return {"ivf": int(self.report.nlist), "hnsw": len(self)}.get(self.report.method, 0)

    def set_breadth(self, value: int) -> None:
        """Set the search breadth (IVF ``nprobe`` / HNSW ``efSearch``); no effect on exact search.

        For callers that tune the breadth on their own kind of queries (e.g. filtered ones);
        :attr:`report` keeps describing the breadth :func:`build_index` chose.
        """
        value = max(1, int(value))
        if self.report.method == "ivf":
            self._index.nprobe = min(value, self.max_breadth)
        elif self.report.method == "hnsw":
            self._index.hnsw.efSearch = value

    @property
    def dim(self) -> int:
        """Width of the indexed vectors."""
        return int(self._vectors.shape[1])

    def __len__(self) -> int:
        return int(self._vectors.shape[0])

    def search(self, queries, k: int) -> tuple[np.ndarray, np.ndarray]:
        """Return the ``k`` nearest indexed vectors of each query.

        Parameters
        ----------
        queries : array_like, shape (M, dim)
            Goal vectors (cast to float32 like the index).
        k : int
            Neighbours per query. The recall in :attr:`report` holds for ``k <= report.k``.

        Returns
        -------
        distances : ndarray of float64, shape (M, k)
            Euclidean (not squared) distances, recomputed in float64 from the float32
            vectors; ascending per row, ``inf`` where fewer than ``k`` were found.
        ids : ndarray of int64, shape (M, k)
            Positions of the neighbours in the indexed vectors (or their labels); -1 where
            fewer than ``k`` were found.
        """
        q = _as_float32(queries, self.dim, "queries")
        if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 1:
            raise EmbeddingError(f"expected k a positive integer, got {shown(k)}")
        with faiss_threads(self._threads):
            _, ids = self._index.search(q, int(k))
        ids = ids.astype(np.int64)
        d = exact_sq_distances(self._vectors, q, ids)
        order = np.argsort(d, axis=1, kind="stable")
        d = np.take_along_axis(d, order, axis=1)
        ids = np.take_along_axis(ids, order, axis=1)
        if self.labels is not None:
            ids = np.where(ids >= 0, self.labels[np.maximum(ids, 0)], -1)
        return np.sqrt(d), ids


def _serialised_size(index) -> int:
    import faiss

    return int(faiss.serialize_index(index).nbytes)


def _tune(index, set_breadth, candidates_max: int, start: int, vectors, queries, exact_ids, k, target, z):
    """Raise the search breadth (doubling, then bisection) until the recall's lower bound >= target.

    Returns the breadth, its measured recall@k and the lower bound (mean - z standard errors).
    """
    def recall(b):
        set_breadth(b)
        _, ids = index.search(queries, k)
        per = recall_per_query(vectors, queries, ids.astype(np.int64), exact_ids)
        return float(per.mean()), lower_bound(per, z)

    hi, (mean, low) = smallest_breadth(recall, start, candidates_max, target)
    set_breadth(hi)
    return hi, mean, low


def smallest_breadth(measure, start: int, top: int, target: float):
    """The smallest search breadth >= ``start`` whose recall lower bound reaches ``target``.

    Doubles from ``start`` (up to ``top``), then bisects between the last failing and the first
    passing breadth. ``measure(b)`` returns ``(recall, lower_bound)``. When even ``top`` fails,
    returns ``top``.

    Returns
    -------
    (int, (float, float))
        The breadth and its measured ``(recall, lower_bound)``.
    """
    b = max(1, start)
    lo = b - 1  # never go below the starting breadth
    r = measure(b)
    while r[1] < target and b < top:
        lo, b = b, min(2 * b, top)
        r = measure(b)
    hi, r_hi = b, r
    if r_hi[1] >= target:
        while hi - lo > 1:
            mid = (lo + hi) // 2
            r_mid = measure(mid)
            if r_mid[1] >= target:
                hi, r_hi = mid, r_mid
            else:
                lo = mid
    return hi, r_hi


def build_index(vectors, settings: IndexSettings | None = None, *, labels=None, calibration=None) -> NeighbourIndex:
    """Build a neighbour index over ``vectors`` and measure the recall it reaches.

    Parameters
    ----------
    vectors : array_like, shape (N, D)
        Goal vectors to index (cast to float32).
    settings : IndexSettings, optional
        Method, k, target recall, seed, ... (defaults: :class:`IndexSettings`).
    labels : array_like of int, shape (N,), optional
        Returned by :meth:`NeighbourIndex.search` instead of positions.
    calibration : array_like, shape (M, D), optional
        Queries to tune and measure the recall on, drawn like the queries the index will
        answer. Default: ``settings.recall_queries`` of the indexed vectors themselves, which
        is right for "states near this logged state" but optimistic for queries from
        elsewhere (e.g. goals of a library): the neighbours of a logged state are mostly
        the adjacent states of its own trajectory, which sit in the same IVF list.

    Returns
    -------
    NeighbourIndex
        With ``.report`` an :class:`IndexReport`.

    Examples
    --------
    >>> x = np.random.default_rng(0).normal(size=(2000, 4))
    >>> idx = build_index(x, IndexSettings(method="ivf", k=5, target_recall=0.9, recall_queries=200))
    >>> idx.report.recall >= 0.9, idx.search(x[:1], 1)[1].tolist()
    (True, [[0]])
    """
    import faiss

    s = settings or IndexSettings()
    s.check()
    X = _as_float32(vectors, None, "goal vectors")
    n, d = X.shape
    if labels is not None:
        labels = np.asarray(labels, dtype=np.int64)
        if labels.shape != (n,):
            raise EmbeddingError(f"expected one label per vector, shape ({n},), got {labels.shape}")
    method = s.method
    if method == "auto":
        method = "exact" if n <= s.exact_below else "ivf"
    k = min(int(s.k), n)
    seed = int(s.seed)
    with faiss_threads(s.threads):
        flat = faiss.IndexFlatL2(d)
        flat.add(X)
        if method == "exact":
            report = IndexReport("exact", n, d, k, float(s.target_recall), 1.0, 1.0, 0, "none", seed=seed,
                                 memory_bytes=_serialised_size(flat))
            return NeighbourIndex(flat, X, report, labels, s.threads)
        cal = "indexed" if calibration is None else "given"
        if calibration is None:
            queries = X[sample_rows(n, s.recall_queries, seed, slot=1)]
        else:
            queries = _as_float32(calibration, d, "calibration queries")
            if queries.shape[0] < 1:
                raise EmbeddingError("expected at least one calibration query, got none")
        _, exact_ids = flat.search(queries, k)
        exact_ids = exact_ids.astype(np.int64)
        del flat
        if method == "ivf":
            nlist = s.nlist or max(1, min(int(round(4 * math.sqrt(n))), n // 39))
            nlist = min(nlist, n)
            quantizer = faiss.IndexFlatL2(d)
            index = faiss.IndexIVFFlat(quantizer, d, nlist, faiss.METRIC_L2)
            index.cp.seed = seed % (2 ** 31)
            index.cp.max_points_per_centroid = max(s.train_per_list, 1)
            index.train(X[sample_rows(n, s.train_per_list * nlist, seed, slot=2)])
            index.add(X)
            nprobe, recall, low = _tune(index, lambda b: setattr(index, "nprobe", int(b)), nlist, 1,
                                        X, queries, exact_ids, k, s.target_recall, s.confidence_z)
            report = IndexReport("ivf", n, d, k, float(s.target_recall), recall, low, len(queries), cal, nlist=nlist,
                                 nprobe=nprobe, seed=seed, memory_bytes=_serialised_size(index))
        else:  # hnsw: insertion order must not depend on scheduling, so one thread
            index = faiss.IndexHNSWFlat(d, int(s.hnsw_m))
            index.hnsw.efConstruction = int(s.hnsw_ef_construction)
            with faiss_threads(1):
                index.add(X)
            ef, recall, low = _tune(index, lambda b: setattr(index.hnsw, "efSearch", int(b)), max(n, k), k,
                                    X, queries, exact_ids, k, s.target_recall, s.confidence_z)
            report = IndexReport("hnsw", n, d, k, float(s.target_recall), recall, low, len(queries), cal,
                                 hnsw_m=int(s.hnsw_m), ef_search=ef, seed=seed, memory_bytes=_serialised_size(index))
    return NeighbourIndex(index, X, report, labels, s.threads)

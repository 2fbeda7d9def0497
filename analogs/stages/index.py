"""Nearest-neighbour index over the principal components of every archive day.

The index is rebuilt from ``scores.nc`` when a store loads: it is fast, portable across
faiss versions, and leaves no binary blob to trust. Candidate filtering (season window,
exclusion window, regime) goes through faiss ID selection, so the search only ever
ranks allowed days.
"""

from __future__ import annotations

import contextlib
import os

import faiss
import numpy as np

from analogs._validation import check_choice, check_int
from analogs.parameters import P
from analogs.errors import NotFittedError

INDEX_KINDS = P.index.choices
#: Below this share of allowed vectors a filtered search ranks the allowed vectors
#: alone, exactly (faiss brute force on the subset): cheaper than scanning every vector
#: through a selector (measured at a million vectors: 2-4 ms for 2.5 % of them against
#: 8.5 ms for a flat scan), and exact where a filtered HNSW walk loses recall
#: (measured: recall@10 0.48 with 0.5 % of the vectors allowed). Above it, faiss ID
#: selection with a bitmap of the allowed ids. Per index kind. For a flat index the
#: share is per query: a batch of m queries sharing the allowed ids (the hindcast's
#: targets of one calendar day) gathers them once but would scan every vector m times
#: (measured at a million vectors, 30 queries, a quarter of them allowed: 67 ms against
#: 477 ms), so it ranks the subset below m / 16 of the vectors.
SUBSET_SEARCH_MAX_SHARE = {"flat": 1 / 16, "hnsw": 1 / 8}


def sequential_batch_size(n_dims) -> int:
    """Most queries of ``n_dims`` components one flat search may hold and still have
    faiss compute every distance with its sequential kernel, as for a query searched
    alone. Above ``faiss.cvar.distance_compute_blas_threshold`` (queries times
    components; a query count in faiss before 1.9, which this reads as a batch of one)
    faiss computes the distances through a BLAS product, ``|x|^2 + |y|^2 - 2 x.y``, which
    rounds otherwise and could reorder near ties."""
    return max(1, (int(faiss.cvar.distance_compute_blas_threshold) - 1) // max(1, int(n_dims)))


@contextlib.contextmanager
def faiss_threads(n_threads):
    """Run the enclosed faiss work on ``n_threads`` OpenMP threads, then restore the
    count that was set before (faiss' thread count is process-wide state: it is changed
    only inside this context, never left changed).

    >>> with faiss_threads(1):
    ...     distances, ids = index.search(queries, 20)   # doctest: +SKIP
    """
    n_threads = check_int(n_threads, "n_threads", "faiss_threads", min_value=1)
    previous = faiss.omp_get_max_threads()
    faiss.omp_set_num_threads(n_threads)
    try:
        yield
    finally:
        faiss.omp_set_num_threads(previous)


def window_distances(vectors, queries, ids) -> np.ndarray:
    """Squared Euclidean distances of each query to the vectors of its own rows ``ids``,
    float32 (m, w), computed by faiss' pairwise kernel (``fvec_L2sqr_by_idx``): the
    very values a flat search ranks (its sequential kernel, bit for bit; tested against
    :meth:`AnalogIndex.search`), so a ranking made from them is the search's, near ties
    included. ``inf`` where an id is -1 (padding).

    Parameters
    ----------
    vectors : array (n, d), the indexed vectors (cast to float32, as :meth:`AnalogIndex.fit`).
    queries : array (m, d).
    ids : int array (m, w) of rows of ``vectors``, -1 for none.
    """
    vectors = np.ascontiguousarray(vectors, dtype=np.float32)
    queries = np.ascontiguousarray(np.atleast_2d(queries), dtype=np.float32)
    ids = np.ascontiguousarray(ids, dtype=np.int64)
    if (ids.shape[0] != queries.shape[0] or queries.shape[1] != vectors.shape[1]
            or (ids.size and not -1 <= ids.min() <= ids.max() < vectors.shape[0])):
        raise ValueError(f"window_distances: {queries.shape[0]} queries of {queries.shape[1]} "
                         f"components, ids of shape {ids.shape}, vectors of shape {vectors.shape}")
    squared = np.empty(ids.shape, dtype=np.float32)
    if ids.size:
        with faiss_threads(1):
            faiss.fvec_L2sqr_by_idx(faiss.swig_ptr(squared), faiss.swig_ptr(queries),
                                    faiss.swig_ptr(vectors), faiss.swig_ptr(ids),
                                    vectors.shape[1], ids.shape[0], ids.shape[1])
    return squared


class AnalogIndex:
    """Exact or approximate Euclidean nearest-neighbour search over PC vectors.

    Parameters
    ----------
    kind : {"auto", "flat", "hnsw"}
        ``"flat"`` is exact brute-force search; ``"hnsw"`` is faiss' hierarchical
        navigable small-world graph (approximate); ``"auto"`` uses flat search below
        ``hnsw_threshold`` vectors and HNSW above it.
    hnsw_threshold : int
        Number of vectors above which ``"auto"`` switches to HNSW.
    hnsw_neighbours : int
        Graph degree M of the HNSW index.
    ef_search : int
        Breadth of the HNSW search (larger is slower and more exact).
    n_threads : int
        OpenMP threads faiss may use to search. One by default: a query ranks at most a
        few hundred thousand short vectors, where thread start-up costs more than it
        saves (measured: 0.3 ms on one thread against 20 ms on two for 8 queries of 3000).
    build_threads : int, optional
        OpenMP threads for building an HNSW graph (default: every CPU; the graph
        insertions are independent enough to scale).

    Attributes
    ----------
    kind_ : str
        The index kind actually built.
    n_vectors_, n_dims_ : int
    """

    def __init__(self, kind="flat", *, hnsw_threshold=500_000, hnsw_neighbours=32,
                 ef_search=256, n_threads=1, build_threads=None):
        self.kind = kind
        self.hnsw_threshold = hnsw_threshold
        self.hnsw_neighbours = hnsw_neighbours
        self.ef_search = ef_search
        self.n_threads = n_threads
        self.build_threads = build_threads

    def fit(self, vectors):
        """Index ``vectors`` (n, d); row i gets id i."""
        check_choice(self.kind, "kind", "AnalogIndex", INDEX_KINDS)
        check_int(self.hnsw_threshold, "hnsw_threshold", "AnalogIndex", min_value=1)
        check_int(self.hnsw_neighbours, "hnsw_neighbours", "AnalogIndex", min_value=4)
        check_int(self.ef_search, "ef_search", "AnalogIndex", min_value=1)
        check_int(self.n_threads, "n_threads", "AnalogIndex", min_value=1)
        if self.build_threads is not None:
            check_int(self.build_threads, "build_threads", "AnalogIndex", min_value=1)
        vectors = np.ascontiguousarray(vectors, dtype=np.float32)
        if vectors.ndim != 2 or vectors.shape[0] == 0:
            raise ValueError(f"AnalogIndex.fit needs a non-empty (n, d) array, got shape {vectors.shape}")
        n, d = vectors.shape
        kind = self.kind
        if kind == "auto":
            kind = "hnsw" if n > self.hnsw_threshold else "flat"
        if kind == "flat":
            index = faiss.IndexFlatL2(d)
        else:
            index = faiss.IndexHNSWFlat(d, self.hnsw_neighbours)
            index.hnsw.efConstruction = max(2 * self.hnsw_neighbours, 80)
        with faiss_threads(self.n_threads if kind == "flat"
                           else self.build_threads or os.cpu_count() or 1):
            index.add(vectors)
        self.index_ = index
        self.kind_ = kind
        self.n_vectors_, self.n_dims_ = n, d
        flat = index if kind == "flat" else faiss.downcast_index(index.storage)
        # a view of the vectors faiss holds (no copy), for exact subset searches
        self._vectors = faiss.rev_swig_ptr(flat.get_xb(), n * d).reshape(n, d)
        return self

    def search(self, queries, k, *, allowed=None):
        """Return (distances, ids) of the ``k`` nearest indexed vectors to each query.

        Parameters
        ----------
        queries : array (d,) or (m, d)
        k : int
        allowed : array of int ids, optional
            Only these ids are ranked (faiss ``IDSelectorBatch``).

        Returns
        -------
        distances : ndarray (m, k) float64
            Euclidean (not squared) distances; missing neighbours are ``inf``.
        ids : ndarray (m, k) int64, ``-1`` where fewer than ``k`` ids were allowed.
        """
        if not hasattr(self, "index_"):
            raise NotFittedError("This AnalogIndex is not fitted yet; call fit(vectors) first.")
        queries = np.ascontiguousarray(np.atleast_2d(queries), dtype=np.float32)
        if queries.shape[1] != self.n_dims_:
            raise ValueError(
                f"query vectors have {queries.shape[1]} components, the index has {self.n_dims_}")
        k = check_int(k, "k", "AnalogIndex.search", min_value=1)
        with faiss_threads(self.n_threads):
            return self._search(queries, k, allowed)

    def _search(self, queries, k, allowed):
        params = None
        if allowed is not None:
            allowed = np.asarray(allowed, dtype=np.int64)
            if allowed.size == 0:
                shape = (queries.shape[0], k)
                return np.full(shape, np.inf), np.full(shape, -1, dtype=np.int64)
            batch = queries.shape[0] if self.kind_ == "flat" else 1
            if allowed.size <= SUBSET_SEARCH_MAX_SHARE[self.kind_] * batch * self.n_vectors_:
                return self._subset_search(queries, k, allowed)
            selector = self._selector(allowed)
            if self.kind_ == "hnsw":
                params = faiss.SearchParametersHNSW(sel=selector, efSearch=max(self.ef_search, k))
            else:
                params = faiss.SearchParameters(sel=selector)
        elif self.kind_ == "hnsw":
            params = faiss.SearchParametersHNSW(efSearch=max(self.ef_search, k))
        squared, ids = self.index_.search(queries, k, params=params)
        distances = np.sqrt(np.maximum(squared.astype(np.float64), 0.0))
        distances[ids < 0] = np.inf
        return distances, ids

    def _selector(self, allowed):
        """faiss bitmap selector of ``allowed`` (one bit per indexed vector: cheap to
        build even for a season window of millions of vectors)."""
        mask = np.zeros(self.n_vectors_, dtype=bool)
        mask[allowed] = True
        bits = np.packbits(mask, bitorder="little")  # faiss reads bit (i & 7) of byte i >> 3
        selector = faiss.IDSelectorBitmap(self.n_vectors_, faiss.swig_ptr(bits))
        selector.bits_owner = bits  # the buffer lives as long as the selector
        return selector

    def _subset_search(self, queries, k, allowed):
        """Exact search among the ``allowed`` vectors only."""
        found = min(k, allowed.size)
        squared, local = faiss.knn(queries, self._vectors[allowed], found)
        distances = np.full((queries.shape[0], k), np.inf)
        ids = np.full((queries.shape[0], k), -1, dtype=np.int64)
        distances[:, :found] = np.sqrt(np.maximum(squared.astype(np.float64), 0.0))
        ids[:, :found] = np.where(local >= 0, allowed[np.maximum(local, 0)], -1)
        distances[ids < 0] = np.inf
        return distances, ids


def recall_at_k(index: AnalogIndex, vectors, *, k=20, allowed_for=None, n_queries=200, seed=0):
    """Mean recall@k of ``index`` against exact flat search on the same vectors.

    ``allowed_for(row)`` may return the allowed ids of the query taken from ``row`` (a
    season window, say), so that recall is measured under the filtering queries use.
    Recall is the share of the exact k nearest ids that the index also returns.
    """
    vectors = np.asarray(vectors, dtype=np.float32)
    exact = AnalogIndex(kind="flat", n_threads=index.n_threads).fit(vectors)
    rng = np.random.default_rng(seed)
    rows = rng.choice(len(vectors), size=min(n_queries, len(vectors)), replace=False)
    shares = []
    for row in rows:
        allowed = None if allowed_for is None else allowed_for(row)
        truth = exact.search(vectors[row], k, allowed=allowed)[1][0]
        truth = set(truth[truth >= 0].tolist())
        if not truth:
            continue
        found = set(index.search(vectors[row], k, allowed=allowed)[1][0].tolist())
        shares.append(len(truth & found) / len(truth))
    return float(np.mean(shares)) if shares else float("nan")

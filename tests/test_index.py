"""faiss index against exact neighbours from scikit-learn (an outside reference)."""

import numpy as np
import pytest
from sklearn.neighbors import NearestNeighbors

from analogs.errors import AnalogsInputError, NotFittedError
from analogs.stages.index import AnalogIndex, faiss_threads


@pytest.fixture(scope="module")
def vectors():
    rng = np.random.default_rng(42)
    # A decaying spectrum, like PCs: leading components carry most of the spread.
    return rng.normal(size=(3000, 12)) * np.linspace(30.0, 2.0, 12)


def test_flat_matches_sklearn_brute_force(vectors):
    """Exact search equals scikit-learn NearestNeighbors(algorithm='brute')."""
    queries = vectors[:25] + 0.5
    distances, ids = AnalogIndex(kind="flat").fit(vectors).search(queries, 10)
    reference = NearestNeighbors(n_neighbors=10, algorithm="brute").fit(vectors)
    ref_distances, ref_ids = reference.kneighbors(queries)
    np.testing.assert_array_equal(ids, ref_ids)
    np.testing.assert_allclose(distances, ref_distances, rtol=1e-4)


def test_allowed_ids_restrict_the_search(vectors):
    """With an ID selection, results equal brute force over the allowed subset only."""
    allowed = np.arange(0, len(vectors), 7)
    distances, ids = AnalogIndex().fit(vectors).search(vectors[3], 15, allowed=allowed)
    reference = NearestNeighbors(n_neighbors=15, algorithm="brute").fit(vectors[allowed])
    ref_distances, ref_ids = reference.kneighbors(vectors[3:4])
    np.testing.assert_array_equal(ids[0], allowed[ref_ids[0]])
    np.testing.assert_allclose(distances[0], ref_distances[0], rtol=1e-4)


@pytest.mark.parametrize("kind", ["flat", "hnsw"])
@pytest.mark.parametrize("step", [1, 2, 199])
def test_subset_and_bitmap_searches_agree_with_brute_force(vectors, kind, step):
    """Every 199th id (15 of 3000: an exact search of the subset), every 2nd (for a
    batch of 8 queries on a flat index, a subset too: its share is per query) or every
    id (faiss bitmap ID selection): the neighbours of scikit-learn over the allowed
    rows (all of them for flat search and for the subset, recall >= 0.95 for HNSW)."""
    from analogs.stages.index import SUBSET_SEARCH_MAX_SHARE

    allowed = np.arange(5, len(vectors), step)
    index = AnalogIndex(kind=kind).fit(vectors)
    batch = 8 if kind == "flat" else 1
    subset = allowed.size <= SUBSET_SEARCH_MAX_SHARE[kind] * batch * len(vectors)
    assert subset == (step == 199 or (kind == "flat" and step == 2))
    k = min(10, allowed.size)
    distances, ids = index.search(vectors[:8] + 0.2, k, allowed=allowed)
    reference = NearestNeighbors(n_neighbors=k, algorithm="brute").fit(vectors[allowed])
    ref_distances, ref_ids = reference.kneighbors(vectors[:8] + 0.2)
    if kind == "flat" or subset:
        np.testing.assert_array_equal(ids, allowed[ref_ids])
        np.testing.assert_allclose(distances, ref_distances, rtol=1e-4)
    else:
        recall = np.mean([len(set(a) & set(e)) / k for a, e in zip(ids, allowed[ref_ids])])
        assert recall >= 0.95 and np.isin(ids, allowed).all()


def test_fewer_allowed_than_k_pads_with_minus_one(vectors):
    distances, ids = AnalogIndex().fit(vectors).search(vectors[0], 5, allowed=[10, 20])
    assert sorted(ids[0][:2]) == [10, 20]
    assert (ids[0][2:] == -1).all() and np.isinf(distances[0][2:]).all()


def test_hnsw_recall_against_exact(vectors):
    """Approximate search keeps recall@10 >= 0.95 against exact search."""
    queries = vectors[::100] + 0.3
    exact = AnalogIndex(kind="flat").fit(vectors).search(queries, 10)[1]
    approx = AnalogIndex(kind="hnsw").fit(vectors).search(queries, 10)[1]
    recall = np.mean([len(set(a) & set(e)) / 10 for a, e in zip(approx, exact)])
    assert recall >= 0.95


def test_auto_switches_on_size(vectors):
    assert AnalogIndex(kind="auto", hnsw_threshold=100).fit(vectors).kind_ == "hnsw"
    assert AnalogIndex(kind="auto").fit(vectors).kind_ == "flat"


def test_unfitted_and_bad_params(vectors):
    with pytest.raises(NotFittedError, match="not fitted"):
        AnalogIndex().search(vectors[0], 3)
    with pytest.raises(AnalogsInputError, match="'kind' parameter of AnalogIndex must be one of"):
        AnalogIndex(kind="tree").fit(vectors)
    with pytest.raises(AnalogsInputError, match="'build_threads' parameter of AnalogIndex"):
        AnalogIndex(kind="hnsw", build_threads=0).fit(vectors)


def test_threaded_hnsw_build_keeps_recall_and_restores_threads(vectors):
    """A graph built on two threads finds the exact neighbours as well (recall@10 >=
    0.95 against scikit-learn brute force), and neither the build nor the (one-thread)
    search leaves faiss' process-wide thread count changed."""
    import faiss

    queries = vectors[::100] + 0.3
    with faiss_threads(3):
        index = AnalogIndex(kind="hnsw", build_threads=2).fit(vectors)
        assert faiss.omp_get_max_threads() == 3
        found = index.search(queries, 10)[1]
        assert faiss.omp_get_max_threads() == 3
    exact = NearestNeighbors(n_neighbors=10, algorithm="brute").fit(vectors).kneighbors(queries)[1]
    assert np.mean([len(set(a) & set(e)) / 10 for a, e in zip(found, exact)]) >= 0.95


def test_faiss_threads_sets_and_restores_even_on_error():
    """The context sets the count inside and restores the previous one on the way out,
    also when the enclosed work raises; nested contexts unwind in order."""
    import faiss

    before = faiss.omp_get_max_threads()
    with faiss_threads(3):
        assert faiss.omp_get_max_threads() == 3
        with faiss_threads(1):
            assert faiss.omp_get_max_threads() == 1
        assert faiss.omp_get_max_threads() == 3
    assert faiss.omp_get_max_threads() == before
    with pytest.raises(ZeroDivisionError, match="division by zero"):
        with faiss_threads(2):
            1 / 0
    assert faiss.omp_get_max_threads() == before
    with pytest.raises(AnalogsInputError, match="'n_threads' parameter of faiss_threads"):
        with faiss_threads(0):
            pass
    assert faiss.omp_get_max_threads() == before

"""The hop kernels against scipy.sparse products and numpy reductions."""
import numpy as np
import pytest
import scipy.sparse as sp
from conftest import random_symmetric

from bigprune.kernels.spmm import balanced_bounds, scale_rows, smooth_rows

EVERY_ROW = np.zeros(0, dtype=np.int8)


def _graph(n, weighted, index_dtype, seed=3):
    rng = np.random.default_rng(seed)
    adj = random_symmetric(n, 0.08, rng, weighted=weighted)
    adj.sort_indices()
    weights = adj.data.astype(np.float32) if weighted else np.zeros(0, dtype=np.float32)
    return adj, adj.indptr.astype(np.int64), adj.indices.astype(index_dtype), weights


def _reference(adj, weights, norm):
    """Â as a scipy matrix: self loops added, then "sym" or "rw" normalisation, in float64."""
    a = sp.csr_matrix(adj, dtype=np.float64)
    if weights.shape[0]:
        a.data = weights.astype(np.float64)
    a = (a + sp.identity(a.shape[0])).tocsr()
    degree = np.asarray(a.sum(axis=1)).ravel()
    if norm == "sym":
        scale = sp.diags(degree ** -0.5)
        return scale @ a @ scale, degree
    return sp.diags(1.0 / degree) @ a, degree


def _scales(degree, norm):
    if norm == "sym":
        scale = (degree ** -0.5).astype(np.float32)
        return scale, scale
    return (1.0 / degree).astype(np.float32), np.ones(degree.shape[0], dtype=np.float32)


def test_scale_rows_matches_numpy_broadcast():
    x = np.random.default_rng(1).normal(size=(40, 9)).astype(np.float32)
    scale = np.linspace(0.1, 2.0, 40, dtype=np.float32)
    expected = x * scale[:, None]  # reference: numpy broadcasting
    scale_rows(x, scale)
    np.testing.assert_array_equal(x, expected)


@pytest.mark.parametrize("parts", [1, 3, 16, 200])
def test_balanced_bounds_match_searchsorted(parts):
    _, indptr, _, _ = _graph(120, False, np.int32)
    start, stop = 7, 101
    bounds = np.empty(parts + 1, dtype=np.int64)
    balanced_bounds(indptr, start, stop, parts, bounds)
    # reference: numpy.searchsorted over the prefix sums of work (entries plus one per row)
    work = indptr[start:stop + 1] + np.arange(start, stop + 1)
    goals = work[0] + ((work[-1] - work[0]) * np.arange(1, parts)) // parts
    expected = np.concatenate([[start], start + np.searchsorted(work[:-1], goals), [stop]])
    np.testing.assert_array_equal(bounds, expected)


@pytest.mark.parametrize("norm", ["sym", "rw"])
@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("index_dtype", [np.int32, np.int64])
@pytest.mark.parametrize("block", [1, 7, 1000])
@pytest.mark.parametrize("d", [1, 17, 64])
def test_smooth_rows_matches_scipy_product(norm, weighted, index_dtype, block, d):
    n = 90
    adj, indptr, indices, weights = _graph(n, weighted, index_dtype)
    x = np.random.default_rng(5).normal(size=(n, d)).astype(np.float32)
    hat, degree = _reference(adj, weights, norm)
    left, right = _scales(degree, norm)
    scaled = x.copy()
    scale_rows(scaled, right)
    out = np.full((n, d), np.nan, dtype=np.float32)
    for start in range(0, n, block):
        stop = min(n, start + block)
        bounds = np.empty(5, dtype=np.int64)
        balanced_bounds(indptr, start, stop, 4, bounds)
        smooth_rows(indptr, indices, weights, left, scaled, EVERY_ROW, 1, bounds, out[start:stop])
    # reference: scipy.sparse CSR product Â @ X in float64
    np.testing.assert_allclose(out, hat @ x.astype(np.float64), rtol=1e-5, atol=1e-5)


def test_smooth_rows_keeps_isolated_rows_unchanged():
    indptr = np.array([0, 1, 2, 2], dtype=np.int64)  # 0 - 1 joined, 2 alone
    indices = np.array([1, 0], dtype=np.int32)
    degree = np.array([2.0, 2.0, 1.0])
    left, right = _scales(degree, "sym")
    x = np.array([[1.0, 2.0], [3.0, 4.0], [5.0, 6.0]], dtype=np.float32)
    scaled = x.copy()
    scale_rows(scaled, right)
    out = np.empty_like(x)
    smooth_rows(indptr, indices, np.zeros(0, np.float32), left, scaled, EVERY_ROW, 1,
                np.array([0, 3], dtype=np.int64), out)
    # reference: hand computation of D^-1/2 (A+I) D^-1/2 X (Wu et al., 2019): rows 0, 1 average
    np.testing.assert_allclose(out, [[2.0, 3.0], [2.0, 3.0], [5.0, 6.0]], rtol=1e-6)


@pytest.mark.parametrize("level", [1, 2])
def test_smooth_rows_restricted_computes_needed_rows_only(level):
    n, d = 90, 5
    adj, indptr, indices, weights = _graph(n, False, np.int32)
    x = np.random.default_rng(8).normal(size=(n, d)).astype(np.float32)
    hat, degree = _reference(adj, weights, "sym")
    left, right = _scales(degree, "sym")
    scaled = x.copy()
    scale_rows(scaled, right)
    through = (np.arange(n) % 3).astype(np.int8)  # rows 0, 3, ... never; 2, 5, ... to hop 2
    out = np.zeros((n, d), dtype=np.float32)
    bounds = np.empty(4, dtype=np.int64)
    balanced_bounds(indptr, 0, n, 3, bounds)
    smooth_rows(indptr, indices, weights, left, scaled, through, level, bounds, out)
    keep = through >= level
    # reference: scipy.sparse CSR product Â @ X on the rows still needed at this hop
    np.testing.assert_allclose(out[keep], (hat @ x.astype(np.float64))[keep], rtol=1e-5, atol=1e-5)
    assert np.isnan(out[~keep]).all()

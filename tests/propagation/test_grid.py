"""The out-of-core pieces: .npy windows, bucketing kernels, the needed-rows kernel."""
import numpy as np
import pytest
import scipy.sparse as sp
from conftest import random_symmetric

import bigprune.common.arrayfile as arrayfile
from bigprune.common.arrayfile import NpyFile
from bigprune.kernels.grid import bucket_edges, count_blocks, row_cuts, scatter_bucket
from bigprune.kernels.needed import spread_needed


def _csr(n=60, weighted=True, seed=1):
    adj = random_symmetric(n, 0.15, np.random.default_rng(seed), weighted=weighted)
    adj.sort_indices()
    return adj, adj.indptr.astype(np.int64), adj.indices.astype(np.int32), adj.data.astype(np.float32)


@pytest.mark.parametrize("stored", [np.float32, np.float16, np.int64])
def test_npy_windows_read_and_write_like_numpy(tmp_path, monkeypatch, stored):
    monkeypatch.setattr(arrayfile, "PIECE_BYTES", 40)  # casts run in pieces of a few rows
    values = (np.arange(77 * 5).reshape(77, 5) % 31).astype(stored)
    np.save(tmp_path / "a.npy", values)
    with NpyFile(tmp_path / "a.npy", writable=True) as file:
        assert file.shape == (77, 5) and file.dtype == stored
        out = np.empty((30, 5), dtype=np.float32)
        file.read_into(11, out)
        # reference: numpy's own reader
        np.testing.assert_array_equal(out, np.load(tmp_path / "a.npy")[11:41].astype(np.float32))
        file.write(70, np.full((7, 5), 2.5, dtype=np.float32))
    expected = values.copy()
    expected[70:] = np.float32(2.5).astype(stored)
    np.testing.assert_array_equal(np.load(tmp_path / "a.npy"), expected)


@pytest.mark.parametrize("block_rows", [1, 7, 60])
def test_count_blocks_matches_bincount(block_rows):
    _, _, indices, _ = _csr()
    counts = np.zeros(-(-60 // block_rows), dtype=np.int64)
    count_blocks(indices, block_rows, counts)
    # reference: numpy.bincount of the column blocks
    np.testing.assert_array_equal(counts, np.bincount(indices // block_rows, minlength=counts.shape[0]))


@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("block_rows", [1, 9, 60])
@pytest.mark.parametrize("index_dtype", [np.int32, np.int64])
def test_bucket_edges_is_a_stable_sort_by_source_block(weighted, block_rows, index_dtype):
    _, indptr, indices, data = _csr()
    indices = indices.astype(index_dtype)
    first, last, row0 = int(indptr[10]) + 3, int(indptr[40]) - 2, 10  # a chunk cutting rows
    cols = indices[first:last]
    weights = data[first:last] if weighted else np.zeros(0, dtype=np.float32)
    blocks = -(-60 // block_rows)
    starts = np.empty(blocks + 1, dtype=np.int64)
    rows_out = np.empty(last - first, dtype=np.int32)
    cols_out = np.empty(last - first, dtype=np.int32)
    w_out = np.empty(last - first if weighted else 0, dtype=np.float32)
    bucket_edges(indptr, row0, first, cols, weights, block_rows, starts, rows_out, cols_out, w_out)
    # reference: numpy's stable argsort by block of the (row, column) entries
    rows = np.repeat(np.arange(60), np.diff(indptr))[first:last]
    order = np.argsort(cols // block_rows, kind="stable")
    np.testing.assert_array_equal(rows_out, rows[order] - row0)
    np.testing.assert_array_equal(cols_out, cols[order] % block_rows)
    np.testing.assert_array_equal(starts, np.searchsorted(np.sort(cols // block_rows), np.arange(blocks + 1)))
    if weighted:
        np.testing.assert_array_equal(w_out, weights[order])


@pytest.mark.parametrize("parts", [1, 2, 5, 50])
def test_row_cuts_never_split_a_row(parts):
    rows = np.repeat(np.arange(12), [5, 1, 1, 9, 0, 2, 3, 3, 1, 8, 1, 1]).astype(np.int32)
    cuts = np.empty(parts + 1, dtype=np.int64)
    row_cuts(rows, parts, cuts)
    assert cuts[0] == 0 and cuts[-1] == rows.shape[0] and (np.diff(cuts) >= 0).all()
    inner = cuts[(cuts > 0) & (cuts < rows.shape[0])]
    assert (rows[inner] != rows[inner - 1]).all()  # each cut falls where the row changes


@pytest.mark.parametrize("scaled", [False, True])
@pytest.mark.parametrize("weighted", [False, True])
def test_scatter_bucket_matches_scipy_product(weighted, scaled):
    rng = np.random.default_rng(4)
    rows = np.sort(rng.integers(0, 20, size=300)).astype(np.int32)
    cols = rng.integers(0, 15, size=300).astype(np.int32)
    weights = rng.uniform(0.1, 2, 300).astype(np.float32) if weighted else np.zeros(0, np.float32)
    x = rng.normal(size=(15, 7)).astype(np.float32)
    out = np.ones((20, 7), dtype=np.float32)
    cuts = np.empty(5, dtype=np.int64)
    row_cuts(rows, 4, cuts)
    scale = rng.uniform(0.5, 1.5, 15).astype(np.float32) if scaled else np.zeros(0, np.float32)
    scatter_bucket(rows, cols, weights, scale, x, np.zeros(0, np.int8), 1, cuts, out)
    data = (weights if weighted else np.ones(300)) * (scale[cols] if scaled else 1.0)
    # reference: scipy.sparse COO product (repeats summed) plus the starting ones
    block = sp.coo_matrix((data.astype(np.float64), (rows, cols)), shape=(20, 15)).tocsr()
    np.testing.assert_allclose(out, 1 + block @ x.astype(np.float64), rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize("chunk", [1, 17, 10_000])
def test_spread_needed_matches_scipy_reachability(chunk):
    adj, indptr, indices, _ = _csr(weighted=False)
    through = np.zeros(60, dtype=np.int8)
    through[[3, 40]] = 3
    for level in (3, 2):
        for first in range(0, indices.shape[0], chunk):
            spread_needed(indptr, first, indices[first:first + chunk], through, level)
    # reference: scipy products (A + I) @ indicator give the rows within one hop
    reach = sp.csr_matrix(adj, dtype=np.float64) + sp.identity(60)
    seed = np.zeros(60)
    seed[[3, 40]] = 1
    one, two = reach @ seed > 0, reach @ (reach @ seed) > 0
    expected = np.where(seed > 0, 3, np.where(one, 2, np.where(two, 1, 0)))
    np.testing.assert_array_equal(through, expected)

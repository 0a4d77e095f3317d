"""The propagate stage: SGC smoothing (Wu et al., 2019) against scipy.sparse, options, budget."""
import numpy as np
import pytest
import scipy.sparse as sp
from conftest import random_symmetric, write_graph_store

import bigprune.propagate as stage
from bigprune.errors import BudgetError, InputError
from bigprune.memory import FIXED_OVERHEAD, MIB, format_size
from bigprune.propagate import embedding, propagate
from bigprune.store import Store


def _normalised(adj, norm):
    """Â built with scipy: A + I, then D^-1/2 (A+I) D^-1/2 or D^-1 (A+I), D its row sums."""
    a = sp.csr_matrix(sp.csr_matrix(adj, dtype=np.float32), dtype=np.float64)
    a = (a + sp.identity(a.shape[0])).tocsr()
    degree = np.asarray(a.sum(axis=1)).ravel()
    if norm == "sym":
        return sp.diags(degree ** -0.5) @ a @ sp.diags(degree ** -0.5)
    return sp.diags(1.0 / degree) @ a


def _store(path, n=150, d=6, weighted=False, seed=0):
    rng = np.random.default_rng(seed)
    adj = random_symmetric(n, 0.05, rng, weighted=weighted)
    features = rng.normal(size=(n, d)).astype(np.float32)
    return write_graph_store(path, adj, features, np.zeros(n), np.zeros(n), weighted=weighted), adj, features


@pytest.mark.parametrize("norm", ["sym", "rw"])
@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("block_rows", [1, 7, 10_000])
def test_hops_match_scipy_products(tmp_path, monkeypatch, norm, weighted, block_rows):
    store, adj, features = _store(tmp_path / "store", weighted=weighted)
    monkeypatch.setattr(stage, "BLOCK_BYTES", block_rows * 4 * features.shape[1])
    monkeypatch.setattr(stage, "MIN_BLOCK_ROWS", 1)
    summary = propagate(store, hops=3, norm=norm, threads=2)
    assert summary["hops"] == 3 and summary["norm"] == norm and summary["peak_rss"] > 0
    hat = _normalised(adj, norm)
    expected = features.astype(np.float64)
    for hop in range(1, 4):
        expected = hat @ expected
        got = embedding(store, hop)
        assert got.dtype == np.float32 and got.shape == features.shape
        # reference: scipy.sparse CSR products Â^k X in float64
        np.testing.assert_allclose(got, expected, rtol=1e-5, atol=1e-5)
    info = store.entry("propagate")["info"]
    assert info["block_rows"] == min(block_rows, 10_000) and len(info["hop_seconds"]) == 3


def test_embedding_defaults_to_last_hop_and_hop_0_is_the_features(small_store):
    propagate(small_store, hops=2)
    np.testing.assert_array_equal(embedding(small_store), embedding(small_store, 2))
    np.testing.assert_array_equal(embedding(small_store.path, 0), small_store.load("graph", "features"))
    with pytest.raises(InputError) as err:
        embedding(small_store, 3)
    assert str(err.value) == ("--hop 3 is beyond the 2 hops propagated: use 0 to 2, "
                              "or run bigprune propagate --hops 3")


def test_a_repeated_run_is_skipped_and_new_options_recompute(small_store):
    first = propagate(small_store, hops=1)
    assert "skipped" not in first
    assert propagate(small_store, hops=1)["skipped"] is True
    propagate(small_store, hops=1, norm="rw")
    assert small_store.entry("propagate")["params"]["norm"] == "rw"


@pytest.mark.parametrize("hops, message", [
    (0, "--hops 0 must be a whole number of at least 1"),
    (1.5, "--hops 1.5 must be a whole number of at least 1"),
    ("2", "--hops '2' must be a whole number of at least 1"),
    (True, "--hops True must be a whole number of at least 1"),
])
def test_bad_hops_are_refused(small_store, hops, message):
    with pytest.raises(InputError) as err:
        propagate(small_store, hops=hops)
    assert str(err.value) == message


def test_bad_norm_is_refused(small_store):
    with pytest.raises(InputError) as err:
        propagate(small_store, norm="l1")
    assert str(err.value) == "--norm 'l1' must be one of: sym, rw"


def test_missing_graph_stage_names_the_command(tmp_path):
    with pytest.raises(InputError) as err:
        propagate(tmp_path / "nowhere")
    assert str(err.value) == f"--store {tmp_path / 'nowhere'}: no such store; create it with bigprune ingest"


def test_budget_below_the_fixed_overhead_is_refused(small_store):
    with pytest.raises(BudgetError) as err:
        propagate(small_store, memory_budget="100MiB")
    assert str(err.value) == ("--memory-budget 100.0 MiB is too small for propagating 300 x 8 "
                              "features in memory (out-of-core propagation is not available yet): "
                              "use at least 464.0 MiB")
    assert "propagate" not in Store(small_store.path).manifest()["stages"]


def test_budget_too_small_for_the_features_names_one_that_works(tmp_path):
    n, d = 20_000, 1_000  # 80 MB of features, more than the 64 MiB left by a 464 MiB budget
    adj = sp.diags([np.ones(n - 1), np.ones(n - 1)], [-1, 1], format="csr")
    store = write_graph_store(tmp_path / "store", adj, np.ones((n, d), dtype=np.float32),
                              np.zeros(n), np.zeros(n))
    csr = 8 * (n + 1) + 4 * adj.nnz
    needed = csr + 4 * n * d + 8 * n + 4 * d * 1024 + FIXED_OVERHEAD
    with pytest.raises(BudgetError) as err:
        propagate(store, hops=1, memory_budget="464MiB")
    assert str(err.value) == (f"--memory-budget 464.0 MiB is too small for propagating 20,000 x "
                              f"1000 features in memory (out-of-core propagation is not available "
                              f"yet): it needs about {format_size(needed)}")
    propagate(store, hops=1, memory_budget=needed + MIB)
    # reference: a path graph's Â (self loops, sym) keeps a constant vector at 1 away from the ends
    np.testing.assert_allclose(embedding(store)[2:-2], 1.0, rtol=1e-6)

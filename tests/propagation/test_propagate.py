"""The propagate stage: SGC smoothing (Wu et al., 2019) against scipy.sparse, options, budget."""
import numpy as np
import pytest
import scipy.sparse as sp
from conftest import random_symmetric, write_graph_store

import bigprune.propagation.hopplan as hopplan
import bigprune.common.memory as memory
from bigprune.cli import main
from bigprune.common.errors import InputError
from bigprune.common.memory import parse_size
from bigprune.propagation.propagate import embedding, propagate
from bigprune.common.schema import NO_LABEL
from bigprune.common.store import Store

# With the fixed overhead set to 0 (monkeypatched), this budget holds neither the CSR nor X of
# the 400 x 64 graphs below: the grid runs with about 5 x 7 blocks and chunks of ~260 entries.
GRID_BUDGET = 50_000


def _normalised(adj, norm):
    """Â built with scipy: A + I, then D^-1/2 (A+I) D^-1/2 or D^-1 (A+I), D its row sums."""
    a = sp.csr_matrix(sp.csr_matrix(adj, dtype=np.float32), dtype=np.float64)
    a = (a + sp.identity(a.shape[0])).tocsr()
    degree = np.asarray(a.sum(axis=1)).ravel()
    if norm == "sym":
        return sp.diags(degree ** -0.5) @ a @ sp.diags(degree ** -0.5)
    return sp.diags(1.0 / degree) @ a


def _store(path, n=150, d=6, weighted=False, seed=0, split=None, label=None):
    rng = np.random.default_rng(seed)
    adj = random_symmetric(n, 0.05, rng, weighted=weighted)
    features = rng.normal(size=(n, d)).astype(np.float32)
    split = np.zeros(n) if split is None else split
    label = np.zeros(n) if label is None else label
    return write_graph_store(path, adj, features, split, label, weighted=weighted), adj, features


def _powers(adj, norm, features, hops):
    """[Â^1 X, ..., Â^hops X] in float64 with scipy."""
    hat, x, out = _normalised(adj, norm), features.astype(np.float64), []
    for _ in range(hops):
        x = hat @ x
        out.append(x)
    return out


@pytest.mark.parametrize("norm", ["sym", "rw"])
@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("block_rows", [1, 7, 10_000])
def test_hops_match_scipy_products(tmp_path, monkeypatch, norm, weighted, block_rows):
    store, adj, features = _store(tmp_path / "store", weighted=weighted)
    # BLOCK_BYTES holds the two output blocks (one computed while the other is written)
    monkeypatch.setattr(hopplan, "BLOCK_BYTES", 2 * block_rows * 4 * features.shape[1])
    monkeypatch.setattr(hopplan, "MIN_BLOCK_ROWS", 1)
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
    assert info["block_rows"] == min(block_rows, 150) and len(info["hop_seconds"]) == 3


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


@pytest.mark.parametrize("norm", ["sym", "rw"])
@pytest.mark.parametrize("weighted", [False, True])
def test_grid_hops_match_scipy_and_the_in_memory_way(tmp_path, monkeypatch, norm, weighted):
    monkeypatch.setattr(memory, "FIXED_OVERHEAD", 0)
    grid, adj, features = _store(tmp_path / "grid", n=400, d=64, weighted=weighted)
    whole, _, _ = _store(tmp_path / "whole", n=400, d=64, weighted=weighted)
    propagate(grid, hops=3, norm=norm, memory_budget=GRID_BUDGET, threads=2)
    propagate(whole, hops=3, norm=norm, memory_budget="1GiB", threads=2)
    info = grid.entry("propagate")["info"]
    assert info["way"] == "grid" and whole.entry("propagate")["info"]["way"] == "memory"
    assert min(info["grid_blocks"]) > 1 and info["plan"]["edge_rows"] < info["nnz"]
    for hop, expected in enumerate(_powers(adj, norm, features, 3), start=1):
        # reference: scipy.sparse CSR products Â^k X in float64
        np.testing.assert_allclose(embedding(grid, hop), expected, rtol=1e-5, atol=1e-5)
        np.testing.assert_allclose(embedding(grid, hop), embedding(whole, hop), rtol=1e-5, atol=1e-6)


def _needed_reference(adj, keep, hops):
    """Last hop each row is needed at, by scipy: R_K = keep, R_{k-1} = rows within one hop of R_k."""
    reach = sp.csr_matrix(adj, dtype=np.float64) + sp.identity(adj.shape[0])
    through = np.zeros(adj.shape[0], dtype=np.int8)
    needed = keep.astype(np.float64)
    for level in range(hops, 0, -1):
        through[(needed > 0) & (through == 0)] = level
        needed = reach @ needed
    return through


@pytest.mark.parametrize("budget", ["1GiB", GRID_BUDGET])
def test_restricted_hops_compute_the_rows_later_stages_read(tmp_path, monkeypatch, budget):
    monkeypatch.setattr(memory, "FIXED_OVERHEAD", 0)
    n = 400
    split = np.zeros(n, dtype=np.int8)
    split[:12], split[12:15], split[15:20] = 1, 2, 3  # train, valid, test; the rest unsplit
    label = np.zeros(n, dtype=np.int64)
    label[5:12] = NO_LABEL  # unlabelled train nodes are not in the pool
    store, adj, features = _store(tmp_path / "store", n=400, d=64, split=split, label=label)
    propagate(store, hops=3, memory_budget=budget, restrict=True, threads=2)
    keep = np.zeros(n, dtype=bool)
    keep[:5], keep[12:20] = True, True
    through = store.load("propagate", "computed_through")
    # reference: needed sets grown hop by hop with scipy products (A + I) @ indicator
    np.testing.assert_array_equal(through, _needed_reference(adj, keep, 3))
    info = store.entry("propagate")["info"]
    assert info["restricted"] and info["skipped_rows"] == [int((through < k).sum()) for k in (1, 2, 3)]
    assert 0 < info["skipped_rows"][2] < n and info["skipped_rows"][0] <= info["skipped_rows"][2]
    for hop, expected in enumerate(_powers(adj, "sym", features, 3), start=1):
        got = embedding(store, hop)
        done = through >= hop
        # reference: scipy.sparse CSR products Â^k X in float64, on the rows computed
        np.testing.assert_allclose(got[done], expected[done], rtol=1e-5, atol=1e-5)
        assert np.isnan(got[~done]).all()


@pytest.mark.parametrize("budget", ["1GiB", GRID_BUDGET])
def test_float16_storage_stays_close_to_float64(tmp_path, monkeypatch, budget):
    monkeypatch.setattr(memory, "FIXED_OVERHEAD", 0)
    store, adj, features = _store(tmp_path / "store", n=400, d=64)
    propagate(store, hops=3, memory_budget=budget, dtype="float16", threads=2)
    for hop, expected in enumerate(_powers(adj, "sym", features, 3), start=1):
        got = embedding(store, hop)
        assert got.dtype == np.float16
        # reference: scipy.sparse products in float64; each stored hop rounds to float16
        # (relative step 2**-11), and a hop of Â (row sums <= 1 in norm) does not amplify it
        scale = np.abs(expected).max()
        assert np.abs(got.astype(np.float64) - expected).max() <= hop * 2.0 ** -11 * scale


def test_budget_below_the_fixed_overhead_is_refused_by_the_command(small_store, capsys):
    code = main(["propagate", "--store", str(small_store.path), "--memory-budget", "100MiB", "--quiet"])
    err = capsys.readouterr().err.strip()
    assert code == 3
    assert err.startswith("bigprune propagate: error: --memory-budget 100.0 MiB is too small for "
                          "propagating 300 x 8 features over ")
    assert err.endswith(" entries: use at least 320.1 MiB")  # memory.FIXED_OVERHEAD plus a few kB
    assert "propagate" not in Store(small_store.path).manifest()["stages"]


def test_a_budget_too_small_for_the_grid_exits_3_naming_one_that_works(tmp_path, monkeypatch, capsys):
    monkeypatch.setattr(memory, "FIXED_OVERHEAD", 0)
    store, adj, features = _store(tmp_path / "store", n=400, d=64)
    code = main(["propagate", "--store", str(store.path), "--memory-budget", "10K", "--quiet"])
    err = capsys.readouterr().err.strip()
    assert code == 3
    head = ("bigprune propagate: error: --memory-budget 10.0 KiB is too small for propagating "
            f"400 x 64 features over {adj.nnz:,} entries: use at least ")
    assert err.startswith(head)
    # the budget named, as printed, is enough
    works = err[len(head):].replace(" ", "")
    assert parse_size(works) > 10 * 1024
    assert main(["propagate", "--store", str(store.path), "--memory-budget", works,
                 "--quiet", "--hops", "1"]) == 0
    assert store.entry("propagate")["info"]["way"] == "grid"
    np.testing.assert_allclose(embedding(store, 1), _powers(adj, "sym", features, 1)[0],
                               rtol=1e-5, atol=1e-5)  # reference: scipy.sparse product


def test_the_command_passes_dtype_and_restrict(small_store, capsys):
    assert main(["propagate", "--store", str(small_store.path), "--hops", "1", "--dtype", "float16",
                 "--restrict", "--quiet"]) == 0
    params = small_store.entry("propagate")["params"]
    assert params["dtype"] == "float16" and params["restrict"] is True
    assert embedding(small_store, 1).dtype == np.float16


def test_bad_dtype_and_too_many_restricted_hops_are_refused(small_store):
    with pytest.raises(InputError) as err:
        propagate(small_store, dtype="float64")
    assert str(err.value) == "--dtype 'float64' must be one of: float32, float16"
    with pytest.raises(InputError) as err:
        propagate(small_store, hops=128, restrict=True)
    assert str(err.value) == "--hops 128 is too many for --restrict: use at most 127, or --no-restrict"


@pytest.mark.parametrize("shape", [(400, 64, 7916, 4, False, 4, False), (400, 64, 7916, 4, True, 2, True),
                                   (100, 8, 1000, 8, False, 4, False)])
def test_a_larger_budget_never_loses_the_plan(shape):
    # The refusal names the smallest budget with a plan, found by bisection: that is only right if
    # every larger budget has one too (a window choice once failed at 28.4 KiB after 28.3 KiB fit).
    fits = [hopplan._fit(*shape, spare) is not None for spare in range(1000, 60_000)]
    first = fits.index(True)
    assert all(fits[first:])

"""The demo scenario generator: layout, schemas, determinism and the statistics it promises."""
import re

import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest
import scipy.optimize as opt
import scipy.sparse as sp
import scipy.stats as st
from sklearn.linear_model import LogisticRegression
from threadpoolctl import threadpool_limits

from bigprune.scenario import scenario
from bigprune.common.errors import InputError
from bigprune.scenario.scenario import generate

DAYS = ["day=2026-11-24", "day=2026-11-25", "day=2026-11-26", "day=2026-11-27"]


def read(result):
    """Node table, answers and edges as numpy, with edges mapped to node-table rows."""
    nodes = pq.read_table(result["nodes"])
    answers = pq.read_table(result["answers"])
    edges = ds.dataset(result["edges"], format="parquet").to_table()
    ids = nodes["node_id"].to_numpy(zero_copy_only=False)
    order = np.argsort(ids)

    def rows(values):
        values = values.to_numpy(zero_copy_only=False)
        return order[np.searchsorted(ids[order], values)]

    n = nodes.num_rows
    split = np.array(nodes["split"].to_pylist(), dtype=object)
    label = np.full(n, -1)
    known = nodes["label"].is_valid().to_numpy(zero_copy_only=False)
    label[known] = nodes["label"].filter(known).to_numpy()
    label[rows(answers["node_id"])] = answers["label"].to_numpy()
    features = nodes["features"].combine_chunks().flatten().to_numpy().reshape(n, -1)
    return dict(nodes=nodes, answers=answers, edges=edges, ids=ids, split=split, label=label,
                features=features, src=rows(edges["src"]), dst=rows(edges["dst"]),
                counts=result["counts"])


def simple_adjacency(src, dst, n):
    """Symmetric 0/1 adjacency without self loops or repeats."""
    adj = sp.coo_matrix((np.ones(len(src)), (src, dst)), shape=(n, n)).tocsr()
    adj = ((adj + adj.T) > 0).astype(np.float64)
    adj.setdiag(0)
    adj.eliminate_zeros()
    return adj


def edge_homophily(g):
    """Share of edges (between nodes whose label we know) joining the same department."""
    known = (g["label"][g["src"]] >= 0) & (g["label"][g["dst"]] >= 0)
    return float(np.mean(g["label"][g["src"]][known] == g["label"][g["dst"]][known]))


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """One 20k-node scenario with the default parameters, shared by the statistical checks."""
    return read(generate(tmp_path_factory.mktemp("demo") / "out", nodes=20_000, seed=3))


# ---- files and schemas ------------------------------------------------------------------------
@pytest.mark.parametrize("id_type,weighted", [("int64", False), ("string", True)])
def test_files_and_schemas(tmp_path, id_type, weighted):
    out = tmp_path / "out"
    result = generate(out, nodes=800, id_type=id_type, weighted=weighted, dim=16)
    id_field = pa.int64() if id_type == "int64" else pa.string()
    files = sorted(p.relative_to(out).as_posix() for p in out.rglob("*") if p.is_file())
    assert files == ["answers.parquet",
                     *[f"edges/{day}/part-{i:03d}.parquet" for day in DAYS for i in range(2)],
                     "nodes.parquet"]
    nodes = pq.read_table(result["nodes"])
    assert nodes.schema.names == ["node_id", "split", "label", "features"]
    assert nodes.schema.field("node_id").type == id_field
    assert nodes.schema.field("split").type == pa.string()
    assert nodes.schema.field("label").type == pa.int64()
    assert nodes.schema.field("features").type.equals(pa.list_(pa.float32(), 16))
    answers = pq.read_table(result["answers"])
    assert answers.schema.names == ["node_id", "label"]
    assert answers.schema.field("node_id").type == id_field
    for part in sorted((out / "edges").rglob("*.parquet")):
        schema = pq.read_schema(part)
        assert schema.names == ["src", "dst", *(["weight"] if weighted else [])]
        assert schema.field("src").type == id_field and schema.field("dst").type == id_field
        if weighted:
            assert schema.field("weight").type == pa.float32()

    g = read(result)
    counts = result["counts"]
    assert nodes.num_rows == counts["nodes"] == 800
    assert g["edges"].num_rows == counts["edges"] == 800 * 10 // 2
    assert set(g["split"]) == {"train", "valid", "test", None}
    for name in ("train", "valid", "test"):
        assert np.sum(g["split"] == name) == counts[name]
    labelled = np.isin(g["split"], ["train", "valid"])
    assert nodes["label"].is_valid().to_numpy(zero_copy_only=False).tolist() == labelled.tolist()
    assert sorted(answers["node_id"].to_pylist()) == sorted(g["ids"][g["split"] == "test"].tolist())
    assert g["label"][labelled | (g["split"] == "test")].min() >= 0
    assert g["label"].max() < 12
    if weighted:
        weight = g["edges"]["weight"].to_numpy()
        assert weight.min() > 0 and weight.max() <= 1


def test_only_parquet_files_and_blocks_stitch(tmp_path, monkeypatch):
    # Tiny odd blocks make every writer cross many block boundaries.
    monkeypatch.setattr(scenario, "NODE_BLOCK", 97)
    monkeypatch.setattr(scenario, "EDGE_BLOCK", 101)
    result = generate(tmp_path / "out", nodes=700, days=1, parts_per_day=3, id_type="string")
    assert all(p.suffix == ".parquet" for p in (tmp_path / "out").rglob("*") if p.is_file())
    g = read(result)
    assert np.isin(g["edges"]["src"].to_numpy(zero_copy_only=False), g["ids"]).all()
    assert np.isin(g["edges"]["dst"].to_numpy(zero_copy_only=False), g["ids"]).all()
    assert g["edges"].num_rows == result["counts"]["edges"] == 3500


def test_ids_unique_and_not_contiguous(demo, tmp_path):
    ids = demo["ids"]
    assert len(np.unique(ids)) == len(ids)  # reference: numpy.unique
    assert ids.min() >= 0
    assert ids.max() - ids.min() > 1000 * len(ids)  # spread far beyond 0..n-1
    assert not np.all(np.diff(ids) > 0)  # not in row order either
    assert np.isin(demo["edges"]["src"].to_numpy(), ids).all()
    assert np.isin(demo["edges"]["dst"].to_numpy(), ids).all()
    strings = pq.read_table(generate(tmp_path / "s", nodes=3000, id_type="string")["nodes"])
    values = strings["node_id"].to_pylist()
    assert len(set(values)) == len(values)
    assert all(re.fullmatch(r"L-[0-9a-f]{16}", v) for v in values)


def test_deterministic_for_a_seed(tmp_path):
    def tables(path, seed):
        r = generate(path, nodes=1500, seed=seed, weighted=True)
        return [pq.read_table(r["nodes"]), pq.read_table(r["answers"]),
                ds.dataset(r["edges"], format="parquet").to_table()]

    first, again, other = tables(tmp_path / "a", 5), tables(tmp_path / "b", 5), tables(tmp_path / "c", 6)
    assert all(x.equals(y) for x, y in zip(first, again))
    assert not any(x.equals(y) for x, y in zip(first, other))


def test_duplicates_and_self_loops_present(demo):
    src, dst = demo["src"], demo["dst"]
    assert np.sum(src == dst) >= demo["counts"]["self_loops"] > 0
    # reference: networkx.Graph keeps one edge per unordered pair (self loops included)
    graph = nx.Graph()
    graph.add_edges_from(zip(src.tolist(), dst.tolist()))
    assert len(src) - graph.number_of_edges() >= 0.01 * len(src)
    assert nx.number_of_selfloops(graph) == len(set(src[src == dst].tolist()))


# ---- statistics the scenario promises ---------------------------------------------------------
def test_edge_homophily_rises_with_the_parameter(tmp_path):
    measured, assortativity = [], []
    for h in (0.1, 0.5, 0.9):
        g = read(generate(tmp_path / f"h{h}", nodes=4000, homophily=h, seed=1))
        measured.append(edge_homophily(g))
        # reference: networkx attribute assortativity (Newman 2003) on the labelled subgraph
        known = np.flatnonzero(g["label"] >= 0)
        graph = nx.Graph()
        graph.add_nodes_from((int(i), {"dept": int(g["label"][i])}) for i in known)
        keep = (g["label"][g["src"]] >= 0) & (g["label"][g["dst"]] >= 0) & (g["src"] != g["dst"])
        graph.add_edges_from(zip(g["src"][keep].tolist(), g["dst"][keep].tolist()))
        assortativity.append(nx.attribute_assortativity_coefficient(graph, "dept"))
        # Edge homophily (Zhu et al., 2020) of the model: h + (1 - h) * sum_c q_c^2, q_c the
        # propensity share of department c; the largest share bounds sum q_c^2 by max q_c.
        assert h <= measured[-1] <= h + (1 - h) * 0.35 + 0.03
    assert measured[0] < measured[1] < measured[2]
    assert assortativity[0] < assortativity[1] < assortativity[2]


def test_degree_distribution_is_heavy_tailed(tmp_path):
    estimates = []
    for exponent in (2.2, 3.0):
        g = read(generate(tmp_path / f"e{exponent}", nodes=20_000, exponent=exponent, seed=2))
        degree = np.diff(simple_adjacency(g["src"], g["dst"], len(g["ids"])).indptr)
        # reference: scipy.stats.poisson; an Erdos-Renyi graph of the same mean degree would
        # almost surely have no degree above its 1 - 1/n quantile; we want far above (x5, a
        # common-practice margin for "heavy tailed")
        assert degree.max() > 5 * st.poisson.ppf(1 - 1 / len(degree), degree.mean())
        # Clauset, Shalizi & Newman (2009), eq. 3.7: discrete power-law MLE above k_min
        k_min = 20
        tail = degree[degree >= k_min]
        estimates.append(1 + len(tail) / np.sum(np.log(tail / (k_min - 0.5))))
        assert abs(estimates[-1] - exponent) < 0.35  # tolerance: rule of thumb for 20k nodes
    assert estimates[0] < estimates[1]


def test_targets_are_not_distributed_like_the_pool(demo):
    pool = np.bincount(demo["label"][np.isin(demo["split"], ["train", "valid"])], minlength=12)
    target = np.bincount(demo["label"][demo["split"] == "test"], minlength=12)
    expected = pool / pool.sum() * target.sum()
    # reference: scipy.stats.chisquare goodness of fit of the targets to the pool's proportions
    assert st.chisquare(target, expected).pvalue < 1e-6
    tvd = 0.5 * np.abs(pool / pool.sum() - target / target.sum()).sum()
    assert tvd > 0.15  # rule of thumb: a shift of 0.15 in total variation is far from noise
    # Targets also favour some neighbourhoods, so they link to each other more than chance.
    is_target = demo["split"] == "test"
    graph = nx.Graph()
    graph.add_nodes_from((i, {"target": bool(t)}) for i, t in enumerate(is_target))
    keep = demo["src"] != demo["dst"]
    graph.add_edges_from(zip(demo["src"][keep].tolist(), demo["dst"][keep].tolist()))
    # reference: networkx attribute assortativity (Newman 2003): 0 for a placement blind to the graph
    assert nx.attribute_assortativity_coefficient(graph, "target") > 0.02


def test_features_informative_but_noisy_and_smoothing_helps(demo):
    train, valid = demo["split"] == "train", demo["split"] == "valid"
    y = demo["label"]
    majority = np.bincount(y[train]).max() / train.sum()

    def accuracy(x):
        # reference: scikit-learn LogisticRegression; one BLAS thread, since a shared
        # two-core machine makes a threaded solver on a problem this small much slower
        with threadpool_limits(1):
            model = LogisticRegression(max_iter=300).fit(x[train], y[train])
        return model.score(x[valid], y[valid])

    raw = accuracy(demo["features"])
    assert majority + 0.15 < raw < 0.8
    # SGC (Wu et al., 2019): two products with D^-1/2 (A + I) D^-1/2 (scipy.sparse)
    adj = simple_adjacency(demo["src"], demo["dst"], len(y)) + sp.eye(len(y))
    scale = sp.diags(1 / np.sqrt(np.asarray(adj.sum(axis=1)).ravel()))
    norm = (scale @ adj @ scale).tocsr()
    smoothed = accuracy(norm @ (norm @ demo["features"].astype(np.float64)))
    assert smoothed > raw + 0.15


def _regions(g, seed, regions, classes=12):
    """Each node's neighbourhood, rebuilt from the generator's layout stream (checked on the labels)."""
    n = len(g["label"])
    dept, region, _ = scenario._layout(scenario._rng(seed, 0), n, classes, regions, 2.5, 10)
    known = g["label"] >= 0
    assert np.array_equal(dept[known], g["label"][known])  # the rebuild matches the files
    return region


def _smoothed(g):
    """Two SGC hops (Wu et al., 2019) with D^-1/2 (A + I) D^-1/2 (scipy.sparse)."""
    n = len(g["label"])
    adj = simple_adjacency(g["src"], g["dst"], n) + sp.eye(n)
    scale = sp.diags(1 / np.sqrt(np.asarray(adj.sum(axis=1)).ravel()))
    norm = (scale @ adj @ scale).tocsr()
    return norm @ (norm @ g["features"].astype(np.float64))


def test_local_style_makes_departments_look_different_by_neighbourhood(tmp_path):
    # A classifier learnt in other neighbourhoods (three times as many listings) against one
    # learnt in the neighbourhood itself, both scored on held-out listings there. Without local
    # style only the class-independent neighbourhood offset separates them.
    gaps = []
    for style in (0.0, 1.0, 2.0):
        g = read(generate(tmp_path / f"s{style}", nodes=20_000, regions=4, dim=16, seed=4,
                          local_style=style, busy_review=1.0))
        region, x, y = _regions(g, 4, 4), _smoothed(g), g["label"]
        pool = np.isin(g["split"], ["train", "valid"])
        rng = np.random.default_rng(0)
        gap = []
        for r in range(4):
            here = rng.permutation(np.flatnonzero(pool & (region == r)))
            learn, score = here[:len(here) // 2], here[len(here) // 2:]
            away = rng.choice(np.flatnonzero(pool & (region != r)), size=3 * len(learn), replace=False)
            # reference: scikit-learn LogisticRegression, one BLAS thread (see below)
            with threadpool_limits(1):
                inside = LogisticRegression(max_iter=500).fit(x[learn], y[learn])
                outside = LogisticRegression(max_iter=500).fit(x[away], y[away])
            gap.append(inside.score(x[score], y[score]) - outside.score(x[score], y[score]))
        gaps.append(np.mean(gap))
    # ~1,200 scored listings per neighbourhood: s.e. of a mean gap about 0.01
    assert gaps[0] < 0.06
    assert gaps[1] > gaps[0] + 0.03 and gaps[2] > gaps[1] + 0.05


@pytest.mark.parametrize("busy_review", [0.2, 1.0])
def test_pool_is_thin_in_busy_neighbourhoods(tmp_path, busy_review):
    g = read(generate(tmp_path / "out", nodes=20_000, seed=6, busy_review=busy_review))
    region = _regions(g, 6, 40)
    # The busy tenth of the neighbourhoods: where targets are densest.
    density = np.bincount(region[g["split"] == "test"], minlength=40) / np.bincount(region, minlength=40)
    busy = np.isin(region, np.argsort(density)[-4:])
    rest = g["split"] != "test"
    pool = np.isin(g["split"], ["train", "valid"])
    n_busy, n_else = np.sum(rest & busy), np.sum(rest & ~busy)
    # Efraimidis & Spirakis (2006): the k smallest of Exp(1) / w take an item of weight w with
    # probability 1 - exp(-w t) for the threshold t, solved here for the pool's size (scipy brentq).
    t = opt.brentq(lambda t: n_else * -np.expm1(-t) + n_busy * -np.expm1(-busy_review * t) - pool.sum(),
                   1e-9, 1e3)
    expected = -np.expm1(-busy_review * t) / -np.expm1(-t)
    measured = np.mean(pool[rest & busy]) / np.mean(pool[rest & ~busy])
    # ~1,500 busy non-targets: s.e. of the measured ratio about 0.03
    assert abs(measured - expected) < 0.1
    if busy_review < 1:
        assert measured < 0.5


# ---- validation -------------------------------------------------------------------------------
@pytest.mark.parametrize("kwargs,message", [
    ({"nodes": 1}, "nodes 1 is out of range: use an integer >= 2"),
    ({"nodes": 10.0}, "nodes 10.0 is out of range: use an integer >= 2"),
    ({"homophily": 1.5}, "homophily 1.5 is out of range: use a number in [0, 1]"),
    ({"exponent": 2.0}, "exponent 2.0 is out of range: use a number in [2.05, 10] "
                        "(above 2 keeps the mean degree finite)"),
    ({"avg_degree": float("nan")}, "avg_degree nan is out of range: use a number >= 0.5"),
    ({"test_fraction": 0}, "test_fraction 0 is out of range: use a number in (0, 1]"),
    ({"id_type": "uuid"}, "id_type 'uuid' is not supported: use one of int64, string"),
    ({"weighted": "yes"}, "weighted 'yes' must be True or False"),
    ({"train_fraction": 0.6, "test_fraction": 0.5},
     "train_fraction + valid_fraction + test_fraction = 1.15 must be at most 1"),
    ({"local_style": -1.0}, "local_style -1.0 is out of range: use a number in [0, 100]"),
    ({"busy_review": 2}, "busy_review 2 is out of range: use a number in [0, 1]"),
    ({"nodes": 10, "test_fraction": 0.01},
     "test_fraction 0.01 leaves no test node among 10: use at least 0.1"),
])
def test_bad_arguments_are_refused(tmp_path, kwargs, message):
    with pytest.raises(InputError) as info:
        generate(tmp_path / "out", **kwargs)
    assert str(info.value) == message
    assert not (tmp_path / "out").exists()


def test_split_counts_never_exceed_the_nodes(tmp_path):
    result = generate(tmp_path / "out", nodes=3, train_fraction=0.5, valid_fraction=0.0,
                      test_fraction=0.5)
    split = pq.read_table(result["nodes"])["split"].to_pylist()
    assert sorted(split) == ["test", "test", "train"]
    assert result["counts"]["test"] == 2 and result["counts"]["train"] == 1


def test_non_empty_directory_is_refused(tmp_path):
    (tmp_path / "keep.txt").write_text("mine")
    with pytest.raises(InputError, match=r"exists and is not an empty directory; pass a new or empty one"):
        generate(tmp_path, nodes=100)
    assert [p.name for p in tmp_path.iterdir()] == ["keep.txt"]

"""The demo scenario: a generated second-hand marketplace written as partitioned Parquet.

Listings are nodes; an edge joins two listings opened in the same browsing session. Each listing
has one of ``classes`` catalogue departments (the label), a neighbourhood (one of ``regions``
latent areas) and a degree propensity drawn from a power law. Edges follow a degree-corrected
stochastic block model: the first endpoint is drawn in proportion to the propensity, the second
too, restricted to the first endpoint's department with probability ``homophily`` and to its
neighbourhood with probability ``locality``. Features are ``dim``-dimensional description
embeddings: department mean + neighbourhood offset + a local style of the department in that
neighbourhood + noise, noisy enough that smoothing over the graph helps. The local style (local
vocabulary, the typical items of a department there) moves the boundary between departments from
one neighbourhood to the next, so a classifier learnt in some neighbourhoods transfers imperfectly
to others.

Moderated listings form the training pool (``train`` and ``valid``, labelled). This week's
listings are the targets (``test``, label null in the node table, true labels in
``answers.parquet``), drawn with weights that favour a few departments and a few busy
neighbourhoods, so they are not distributed like the pool; moderators reviewed the busy
neighbourhoods thinly (``busy_review``), so the pool has few listings there. Everything else has
split and label null.

Output layout::

    directory/edges/day=2026-11-24/part-000.parquet   src, dst[, weight]
    directory/nodes.parquet                           node_id, split, label, features
    directory/answers.parquet                         node_id, label

Everything is written in fixed-size blocks whose random streams are keyed by block position (a
local style's by its department and neighbourhood), so the output depends only on the arguments,
and memory holds a few per-node arrays (about 30 bytes per node, up to about 70 while they are
built) plus a block or two, never all features or all edges.
"""
import datetime
import os
import shutil
from pathlib import Path

import numpy as np

from ..common.errors import InputError
from ..common.runtime import progress

FIRST_DAY = datetime.date(2026, 11, 24)
NODE_BLOCK = 1 << 16     # rows per node-table block (64-d float32 features: 16 MiB)
EDGE_BLOCK = 1 << 19     # edges per block (~60 MiB of temporaries)
DUPLICATE_RATE = 0.01    # share of each edge block rewritten as a repeat of another edge
SELF_LOOP_RATE = 0.001   # share of each edge block rewritten as a self loop
CLASS_SKEW = 0.8         # department sizes fall as rank^-CLASS_SKEW (largest ~7x the smallest of 12)
REGION_SPREAD = 2.0      # Dirichlet concentration of neighbourhood sizes (larger: more even)
NOISE = 4.5              # per-dimension noise s.d.; department means are N(0, 1) per dimension
REGION_SCALE = 1.0       # per-dimension s.d. of neighbourhood offsets
TARGET_DEPT_BOOST = 4.0  # weight of an over-represented department when drawing targets
# Weight of a busy neighbourhood when drawing targets: the busy tenth of the neighbourhoods
# holds about half of this week's listings (40-65% in the demo's seeds 0 and 1).
TARGET_REGION_BOOST = 15.0
SPLIT_NAMES = ("train", "valid", "test")  # split codes 1, 2, 3; 0 is null
_ID_MASK = np.uint64((1 << 63) - 1)
_HEX = np.frombuffer(b"0123456789abcdef", dtype=np.uint8)

# Parameter bounds as data: (kind, low, high, low excluded, what would work); None = unbounded.
_BOUNDS = {
    "nodes": ("int", 2, None, False, "an integer >= 2"),
    "avg_degree": ("real", 0.5, None, False, "a number >= 0.5"),
    "seed": ("int", 0, None, False, "an integer >= 0"),
    "exponent": ("real", 2.05, 10.0, False,
                 "a number in [2.05, 10] (above 2 keeps the mean degree finite)"),
    "homophily": ("real", 0.0, 1.0, False, "a number in [0, 1]"),
    "locality": ("real", 0.0, 1.0, False, "a number in [0, 1]"),
    "classes": ("int", 2, 1000, False, "an integer in [2, 1000]"),
    "regions": ("int", 1, 1000, False, "an integer in [1, 1000]"),
    "dim": ("int", 1, 4096, False, "an integer in [1, 4096]"),
    "days": ("int", 1, 366, False, "an integer in [1, 366]"),
    "parts_per_day": ("int", 1, 1000, False, "an integer in [1, 1000]"),
    "train_fraction": ("real", 0.0, 1.0, True, "a number in (0, 1]"),
    "valid_fraction": ("real", 0.0, 1.0, False, "a number in [0, 1]"),
    "test_fraction": ("real", 0.0, 1.0, True, "a number in (0, 1]"),
    "local_style": ("real", 0.0, 100.0, False, "a number in [0, 100]"),
    "busy_review": ("real", 0.0, 1.0, False, "a number in [0, 1]"),
}
ID_TYPES = ("int64", "string")


def generate(directory, nodes=50_000, avg_degree=10, seed=0, exponent=2.5, homophily=0.7,
             classes=12, dim=64, days=4, parts_per_day=2, id_type="int64", weighted=False,
             train_fraction=0.4, valid_fraction=0.05, test_fraction=0.05, regions=40,
             locality=0.5, local_style=1.0, busy_review=0.2):
    """Write the marketplace scenario into ``directory`` (new or empty).

    Parameters
    ----------
    directory : path
        Created if missing; must be empty. Nothing but the Parquet files is left in it.
    nodes : int
        Number of listings ``n``.
    avg_degree : float
        Edge rows written: ``round(n * avg_degree / 2)``, including about 1% rewritten as
        repeats of other rows (half reversed) and 0.1% as self loops.
    seed : int
        The output is a function of all arguments; the same arguments give the same files.
    exponent : float
        Power-law exponent of the degree propensity (and so of the degree tail).
    homophily : float
        Probability that an edge's second endpoint is drawn from the first one's department.
    classes, regions, dim : int
        Departments (labels ``0 .. classes-1``), neighbourhoods, feature width.
    days, parts_per_day : int
        The edges are spread over ``days * parts_per_day`` files in per-day folders.
    id_type : {"int64", "string"}
        Random unique non-contiguous int64 ids, or strings ``"L-<16 hex digits>"``.
    weighted : bool
        Add a float32 ``weight`` column in (0, 1] to the edges.
    train_fraction, valid_fraction, test_fraction : float
        Shares of the nodes in each split; the rest have a null split.
    locality : float
        Probability that the second endpoint is drawn from the first one's neighbourhood.
    local_style : float
        Per-dimension s.d. of each (department, neighbourhood) offset; department means have
        s.d. 1, so at 1 a department looks about as different between neighbourhoods as two
        departments do on average. 0 makes features class mean + neighbourhood offset + noise.
    busy_review : float
        Weight of a listing in a busy neighbourhood (elsewhere: 1) in the weighted sample of
        non-targets that forms the pool; below 1 the pool covers the busy neighbourhoods thinly,
        at 1 it is a uniform sample.

    Returns
    -------
    dict
        ``{"edges": dir, "nodes": file, "answers": file, "counts": {...}}`` with counts of
        nodes, edge rows, injected duplicates and self loops (chance adds a few more of
        each), and nodes per split.
    """
    args = dict(nodes=nodes, avg_degree=avg_degree, seed=seed, exponent=exponent,
                homophily=homophily, classes=classes, dim=dim, days=days,
                parts_per_day=parts_per_day, train_fraction=train_fraction,
                valid_fraction=valid_fraction, test_fraction=test_fraction, regions=regions,
                locality=locality, local_style=local_style, busy_review=busy_review)
    for name, value in args.items():
        _check(name, value)
    if id_type not in ID_TYPES:
        raise InputError(f"id_type {id_type!r} is not supported: use one of {', '.join(ID_TYPES)}")
    if not isinstance(weighted, (bool, np.bool_)):
        raise InputError(f"weighted {weighted!r} must be True or False")
    total = train_fraction + valid_fraction + test_fraction
    if total > 1.0 + 1e-9:
        raise InputError(f"train_fraction + valid_fraction + test_fraction = {total:g} must be at most 1")
    counts, left = {}, nodes
    for split in ("test", "train", "valid"):  # rounding must not hand out more nodes than exist
        counts[split] = min(left, int(round(args[f"{split}_fraction"] * nodes)))
        left -= counts[split]
    for split in ("train", "test"):
        if counts[split] < 1:
            raise InputError(f"{split}_fraction {args[f'{split}_fraction']!r} leaves no {split} "
                             f"node among {nodes}: use at least {1 / nodes:.3g}")
    directory = Path(directory)
    if directory.exists() and (not directory.is_dir() or any(directory.iterdir())):
        raise InputError(f"directory {directory}: exists and is not an empty directory; "
                         "pass a new or empty one")
    for name in ("train_fraction", "valid_fraction", "test_fraction"):
        del args[name]  # counts carry them from here on
    return _generate(directory, counts, id_type=id_type, weighted=bool(weighted), **args)


def _check(name, value):
    kind, low, high, low_excluded, wanted = _BOUNDS[name]
    ok = isinstance(value, (int, np.integer)) and not isinstance(value, bool)
    if kind == "real":
        ok = ok or isinstance(value, (float, np.floating))
    ok = (ok and np.isfinite(value) and (value > low if low_excluded else value >= low)
          and (high is None or value <= high))
    if not ok:
        raise InputError(f"{name} {value!r} is out of range: use {wanted}")


def _generate(directory, counts, *, nodes, avg_degree, seed, exponent, homophily, classes, dim,
              days, parts_per_day, regions, locality, local_style, busy_review, id_type, weighted):
    """Validated twin of :func:`generate`: writes into a staging folder, then moves into place."""
    layout_rng = _rng(seed, 0)
    dept, region, theta = _layout(layout_rng, nodes, classes, regions, exponent, avg_degree)
    split = _splits(layout_rng, dept, region, counts, classes, regions, busy_review)
    mean = layout_rng.standard_normal((classes, dim)).astype(np.float32)
    offset = (REGION_SCALE * layout_rng.standard_normal((regions, dim))).astype(np.float32)
    id_key = int(layout_rng.integers(0, 1 << 62))
    by_dept = _ordering(theta, dept, region, classes, regions)
    by_region = _ordering(theta, region, dept, regions, classes)
    del theta

    directory.mkdir(parents=True, exist_ok=True)
    staging = directory / ".generating"
    try:
        staging.mkdir()
        _write_nodes(staging, seed, dept, region, split, mean, offset, local_style, id_key,
                     id_type)
        edges = round(nodes * avg_degree / 2)
        written = _write_edges(staging / "edges", seed, edges, days, parts_per_day, dept, region,
                               by_dept, by_region, homophily, locality, id_key, id_type, weighted)
        for name in ("edges", "nodes.parquet", "answers.parquet"):
            os.rename(staging / name, directory / name)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return {
        "edges": str(directory / "edges"),
        "nodes": str(directory / "nodes.parquet"),
        "answers": str(directory / "answers.parquet"),
        "counts": {"nodes": nodes, **written, **counts},
    }


def _rng(seed, *key):
    """An independent random stream per (seed, stage, block...), whatever the block sizes elsewhere."""
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=key)))


def _layout(rng, n, classes, regions, exponent, avg_degree):
    """Department (int16), neighbourhood (int16) and degree propensity (float64, mean 1) per node."""
    class_share = np.arange(1, classes + 1, dtype=np.float64) ** -CLASS_SKEW
    dept = rng.choice(classes, size=n, p=class_share / class_share.sum()).astype(np.int16)
    region_share = rng.dirichlet(np.full(regions, REGION_SPREAD))
    region = rng.choice(regions, size=n, p=region_share).astype(np.int16)
    # Pareto(exponent - 1) + 1 has density ~ x^-exponent; the expected degree avg_degree * theta
    # is capped at the structural cutoff sqrt(avg_degree * n) (Boguna, Pastor-Satorras &
    # Vespignani 2004) so the largest hubs stay plausible for a graph without multi-edges.
    theta = rng.pareto(exponent - 1.0, size=n) + 1.0
    theta /= theta.mean()
    np.minimum(theta, max(1.0, np.sqrt(n / avg_degree)), out=theta)
    theta /= theta.mean()
    return dept, region, theta


def _splits(rng, dept, region, counts, classes, regions, busy_review):
    """Split codes (int8: 0 null, 1 train, 2 valid, 3 test).

    Targets are a weighted sample without replacement (Efraimidis & Spirakis 2006: the k
    smallest of Exp(1) / w) favouring a few departments and busy neighbourhoods; the pool is a
    weighted sample of the rest in which a busy neighbourhood's listings weigh ``busy_review``.
    """
    n = len(dept)
    dept_weight = np.ones(classes)
    dept_weight[rng.choice(classes, size=max(1, classes // 4), replace=False)] = TARGET_DEPT_BOOST
    busy = np.zeros(regions, dtype=bool)
    busy[rng.choice(regions, size=max(1, regions // 10), replace=False)] = True
    key = rng.exponential(size=n) / (dept_weight[dept] * np.where(busy, TARGET_REGION_BOOST, 1.0)[region])
    split = np.zeros(n, dtype=np.int8)
    split[np.argpartition(key, counts["test"] - 1)[:counts["test"]]] = 3
    rest = np.flatnonzero(split == 0)
    pool = counts["train"] + counts["valid"]
    if pool < len(rest):
        # Exp(1) / 0 is inf: with busy_review 0 busy listings join only when nothing else is left
        with np.errstate(divide="ignore"):
            key = rng.exponential(size=len(rest)) / np.where(busy, busy_review, 1.0)[region[rest]]
        rest = rest[np.argpartition(key, pool - 1)[:pool]]
    del key
    rng.shuffle(rest)  # the pool's order is the weighted sample's, so shuffle before splitting
    split[rest[:counts["train"]]] = 1
    split[rest[counts["train"]:pool]] = 2
    return split


def _ordering(theta, major, minor, n_major, n_minor):
    """Nodes sorted by (major, minor) group with cumulative propensity, for drawing in a group.

    Returns ``(perm, cum, starts, n_major)``: ``perm`` (n,) node of each position; ``cum`` (n + 1,)
    float64 propensity before each position; ``starts`` (groups + 1,) int64 first position of
    group ``major * n_minor + minor``, so a whole major group is also one contiguous range.
    """
    group = major.astype(np.int64) * n_minor + minor
    perm = np.argsort(group, kind="stable").astype(np.int32 if len(theta) < 2**31 else np.int64)
    cum = np.zeros(len(theta) + 1)
    np.cumsum(theta[perm], out=cum[1:])
    groups = n_major * n_minor
    starts = np.zeros(groups + 1, dtype=np.int64)
    np.cumsum(np.bincount(group, minlength=groups), out=starts[1:])
    return perm, cum, starts, n_major


def _draw(rng, ordering, lo, hi):
    """One node per row drawn in proportion to propensity among positions ``[lo, hi)``."""
    perm, cum = ordering[:2]
    u = cum[lo] + rng.random(len(lo)) * (cum[hi] - cum[lo])
    # Searching sorted queries walks ``cum`` in order instead of missing cache at random:
    # about 5x faster for two million nodes, more than the sort costs.
    order = np.argsort(u)
    pos = np.empty(len(u), dtype=np.int64)
    pos[order] = np.searchsorted(cum, u[order], side="right") - 1
    np.clip(pos, lo, hi - 1, out=pos)  # rounding at a range's edge must not leave the range
    return perm[pos]


def _edge_block(rng, k, dept, region, by_dept, by_region, homophily, locality):
    """``k`` edges as (src, dst) int64 node indices, with injected repeats and self loops.

    ``by_dept`` and ``by_region`` are the (department, region) and (region, department)
    orderings of :func:`_ordering`.
    """
    n = len(dept)
    src = _draw(rng, by_dept, np.zeros(k, np.int64), np.full(k, n, np.int64)).astype(np.int64)
    same = rng.random(k) < homophily
    local = rng.random(k) < locality
    dst = _second_endpoints(rng, src, same, local, dept, region, by_dept, by_region)
    # A hub dominates its small (department, region) cell and so often draws itself; a session
    # never pairs a listing with itself, so redraw those outside the neighbourhood restriction
    # (the few left after two tries stay, as noise an ingest must drop).
    anywhere = np.zeros(k, dtype=bool)
    for _ in range(2):
        again = np.flatnonzero(dst == src)
        dst[again] = _second_endpoints(rng, src[again], same[again], anywhere[again], dept,
                                       region, by_dept, by_region)
    # Repeats (half of them reversed) and self loops that an ingest must clean up.
    dups = int(k * DUPLICATE_RATE)
    loops = max(1, int(k * SELF_LOOP_RATE)) if k > 2 * dups else 0
    # Rewritten positions and the edges they copy are disjoint, so every copy stays a repeat.
    where = rng.choice(k, size=min(k, 2 * dups + loops), replace=False)
    dup_at, copy_of, loop_at = where[:dups], where[dups:2 * dups], where[2 * dups:]
    flip = rng.random(len(copy_of)) < 0.5
    src[dup_at], dst[dup_at] = (np.where(flip, dst[copy_of], src[copy_of]),
                                np.where(flip, src[copy_of], dst[copy_of]))
    dst[loop_at] = src[loop_at]
    return src, dst, dups, loops


def _second_endpoints(rng, src, same, local, dept, region, by_dept, by_region):
    """Second endpoints (int64) of edges from ``src``, by the rule of :func:`_edge_block`."""
    n, classes, regions = len(dept), int(by_dept[3]), int(by_region[3])
    d, r = dept[src].astype(np.int64), region[src].astype(np.int64)
    dst = np.empty(len(src), dtype=np.int64)
    starts_d, starts_r = by_dept[2], by_region[2]
    # same department: the (department, region) cell, or the whole department
    sel = same
    cell = d[sel] * regions + np.where(local[sel], r[sel], 0)
    hi = np.where(local[sel], starts_d[cell + 1], starts_d[(d[sel] + 1) * regions])
    dst[sel] = _draw(rng, by_dept, starts_d[cell], hi)
    # any department: the source's region, or anywhere
    sel = ~same
    lo = np.where(local[sel], starts_r[r[sel] * classes], 0)
    hi = np.where(local[sel], starts_r[(r[sel] + 1) * classes], n)
    dst[sel] = _draw(rng, by_region, lo, hi)
    return dst


def _node_ids(index, key):
    """Unique positive int64 ids: a bijective mix of ``index + key`` on [0, 2^63)."""
    x = (np.asarray(index, dtype=np.uint64) + np.uint64(key)) & _ID_MASK
    # xor-shift-right and multiplication by an odd constant are both invertible mod 2^63
    x ^= x >> np.uint64(29)
    x = (x * np.uint64(0xBF58476D1CE4E5B9)) & _ID_MASK
    x ^= x >> np.uint64(32)
    x = (x * np.uint64(0x94D049BB133111EB)) & _ID_MASK
    x ^= x >> np.uint64(29)
    return x.view(np.int64)


def _id_array(index, key, id_type):
    """The ids of node indices as an Arrow array (int64, or ``L-`` + 16 hex digits)."""
    import pyarrow as pa

    ids = _node_ids(index, key)
    if id_type == "int64":
        return pa.array(ids, type=pa.int64())
    k = len(ids)
    text = np.empty((k, 18), dtype=np.uint8)
    text[:, 0], text[:, 1] = ord("L"), ord("-")
    shifts = np.arange(60, -4, -4, dtype=np.uint64)
    text[:, 2:] = _HEX[(ids.view(np.uint64)[:, None] >> shifts) & np.uint64(15)]
    offsets = np.arange(0, 18 * (k + 1), 18, dtype=np.int32)
    return pa.StringArray.from_buffers(k, pa.py_buffer(offsets), pa.py_buffer(text.reshape(-1)))


def _local_styles(seed, cells, dim, scale):
    """(len(cells), dim) float32 offsets of (department, region) cells, one stream per cell.

    A cell's offset is drawn from its own stream, so it is the same in every block without a
    table of all ``classes * regions`` cells in memory.
    """
    out = np.empty((len(cells), dim), dtype=np.float32)
    for i, cell in enumerate(cells.tolist()):
        out[i] = _rng(seed, 3, cell).standard_normal(dim, dtype=np.float32)
    out *= scale
    return out


def _write_nodes(staging, seed, dept, region, split, mean, offset, local_style, id_key, id_type):
    import pyarrow as pa
    import pyarrow.parquet as pq

    n, dim = len(dept), mean.shape[1]
    id_field = pa.int64() if id_type == "int64" else pa.string()
    node_schema = pa.schema([("node_id", id_field), ("split", pa.string()), ("label", pa.int64()),
                             ("features", pa.list_(pa.float32(), dim))])
    answer_schema = pa.schema([("node_id", id_field), ("label", pa.int64())])
    split_names = pa.array([None, *SPLIT_NAMES], type=pa.string())
    with pq.ParquetWriter(staging / "nodes.parquet", node_schema) as nodes_out, \
            pq.ParquetWriter(staging / "answers.parquet", answer_schema) as answers_out, \
            progress(total=n, desc="scenario nodes", unit="node") as bar:
        for block, start in enumerate(range(0, n, NODE_BLOCK)):
            stop = min(n, start + NODE_BLOCK)
            rng = _rng(seed, 1, block)
            d, s = dept[start:stop], split[start:stop]
            x = rng.standard_normal((stop - start, dim), dtype=np.float32)
            x *= NOISE
            x += mean[d]
            x += offset[region[start:stop]]
            if local_style > 0:
                cells, which = np.unique(d.astype(np.int64) * len(offset) + region[start:stop],
                                         return_inverse=True)
                x += _local_styles(seed, cells, dim, local_style)[which]
            ids = _id_array(np.arange(start, stop), id_key, id_type)
            labelled = (s == 1) | (s == 2)
            label = pa.array(d.astype(np.int64), mask=~labelled)
            features = pa.FixedSizeListArray.from_arrays(pa.array(x.reshape(-1)), dim)
            split_col = split_names.take(pa.array(s))
            nodes_out.write_table(pa.table([ids, split_col, label, features], schema=node_schema))
            test = np.flatnonzero(s == 3)
            answers_out.write_table(pa.table([ids.take(pa.array(test)),
                                              pa.array(d[test].astype(np.int64))],
                                             schema=answer_schema))
            bar.update(stop - start)


def _write_edges(edges_dir, seed, edges, days, parts_per_day, dept, region, by_dept, by_region,
                 homophily, locality, id_key, id_type, weighted):
    import pyarrow as pa
    import pyarrow.parquet as pq

    id_field = pa.int64() if id_type == "int64" else pa.string()
    fields = [("src", id_field), ("dst", id_field)] + ([("weight", pa.float32())] if weighted else [])
    schema = pa.schema(fields)
    parts = days * parts_per_day
    bounds = np.linspace(0, edges, parts + 1).round().astype(np.int64)
    written = {"edges": 0, "duplicates": 0, "self_loops": 0}
    with progress(total=edges, desc="scenario edges", unit="edge") as bar:
        for part in range(parts):
            day = FIRST_DAY + datetime.timedelta(days=part // parts_per_day)
            folder = edges_dir / f"day={day.isoformat()}"
            folder.mkdir(parents=True, exist_ok=True)
            path = folder / f"part-{part % parts_per_day:03d}.parquet"
            with pq.ParquetWriter(path, schema) as out:
                size = int(bounds[part + 1] - bounds[part])
                for block, start in enumerate(range(0, size, EDGE_BLOCK)):
                    k = min(size, start + EDGE_BLOCK) - start
                    rng = _rng(seed, 2, part, block)
                    src, dst, dups, loops = _edge_block(rng, k, dept, region, by_dept, by_region,
                                                        homophily, locality)
                    columns = [_id_array(src, id_key, id_type), _id_array(dst, id_key, id_type)]
                    if weighted:
                        columns.append(pa.array((1.0 - rng.random(k)).astype(np.float32)))
                    out.write_table(pa.table(columns, schema=schema))
                    written["edges"] += k
                    written["duplicates"] += dups
                    written["self_loops"] += loops
                    bar.update(k)
    return written

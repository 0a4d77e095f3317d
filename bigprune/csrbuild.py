"""Building the symmetric CSR from a stream of edge rows, in memory or in row blocks on disk.

When every edge row and the whole adjacency fit the budget, the rows are held in memory and
scattered once. Otherwise they are spilled to a scratch file, bucketed by row block (blocks sized
so that one block's entries fit), and each block is sorted and merged on its own.
"""
import numpy as np

from .arrayfile import NpyFile
from .kernels.csr import block_bounds, compact_rows, scatter_directed, scatter_edges, sort_unique_rows
from .memory import chunk_ranges

# Bytes per directed entry while a block is built: its bucket record (row, col, weight) plus its
# CSR slot (col, weight) plus per-row sort scratch.
ENTRY_BYTES = 8 + 8 + 4 + 8 + 4 + 8


def in_memory_bytes_per_row(index_dtype, weighted):
    """Bytes one input edge row costs on the in-memory path: its record and two CSR slots."""
    index, weight = np.dtype(index_dtype).itemsize, 4 if weighted else 0
    return (2 * index + weight) + 2 * (index + weight)


class EdgeRows:
    """The mapped edge rows ``(u, v[, w])`` of one ingest, in memory or spilled to ``scratch``."""

    def __init__(self, capacity, index_dtype, weighted, spill_path=None):
        self.index_dtype, self.weighted, self.count = np.dtype(index_dtype), weighted, 0
        fields = [("u", index_dtype), ("v", index_dtype)] + ([("w", np.float32)] if weighted else [])
        self.record = np.dtype(fields)
        self.spill_path = spill_path
        if spill_path is None:
            self.rows = np.empty(capacity, dtype=self.record)
        else:
            self._file = open(spill_path, "wb")

    def append(self, u, v, w):
        block = np.empty(len(u), dtype=self.record)
        block["u"], block["v"] = u, v
        if self.weighted:
            block["w"] = w
        if self.spill_path is None:
            self.rows[self.count:self.count + len(u)] = block
        else:
            block.tofile(self._file)
        self.count += len(u)

    def chunks(self, rows):
        """Yield the rows back in order, ``rows`` at a time."""
        if self.spill_path is None:
            for start, stop in chunk_ranges(self.count, rows):
                yield self.rows[start:stop]
            return
        self._file.close()
        with open(self.spill_path, "rb") as fh:
            for start, stop in chunk_ranges(self.count, rows):
                yield np.fromfile(fh, dtype=self.record, count=stop - start)


def build_in_memory(edge_rows, counts, writer):
    """Scatter all rows at once (they fit); write indptr, indices(, weight). Returns unique nnz."""
    n = len(counts)
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(counts, out=indptr[1:])
    indices = np.empty(int(indptr[-1]), dtype=edge_rows.index_dtype)
    weights = np.empty(len(indices) if edge_rows.weighted else 0, dtype=np.float32)
    rows = edge_rows.rows[:edge_rows.count]
    w = rows["w"] if edge_rows.weighted else np.empty(0, np.float32)
    scatter_edges(np.ascontiguousarray(rows["u"]), np.ascontiguousarray(rows["v"]), np.ascontiguousarray(w),
                  indptr[:-1].copy(), indices, weights)
    edge_rows.rows = None
    kept = np.empty(n, dtype=np.int64)
    sort_unique_rows(indptr, indices, weights, kept)
    new_indptr = np.empty_like(indptr)
    compact_rows(indptr, kept, indices, weights, new_indptr)
    unique = int(new_indptr[-1])
    writer.save("indptr", new_indptr)
    writer.save("indices", indices[:unique])
    if edge_rows.weighted:
        writer.save("weight", weights[:unique])
    return unique


def build_in_blocks(edge_rows, counts, writer, block_bytes, scratch, bar=None):
    """Bucket the spilled rows by row block, then sort and merge one block at a time."""
    n = len(counts)
    limit = max(1, block_bytes // ENTRY_BYTES)
    bounds = block_bounds(counts, limit)
    blocks = len(bounds) - 1
    entry = np.dtype([("r", edge_rows.index_dtype), ("c", edge_rows.index_dtype)]
                     + ([("w", np.float32)] if edge_rows.weighted else []))
    buckets = [open(scratch / f"bucket-{b}.bin", "wb") for b in range(blocks)]
    for rows in edge_rows.chunks(max(1, limit // 2)):
        rows = rows[rows["u"] != rows["v"]]
        both = np.empty(2 * len(rows), dtype=entry)
        both["r"][:len(rows)], both["c"][:len(rows)] = rows["u"], rows["v"]
        both["r"][len(rows):], both["c"][len(rows):] = rows["v"], rows["u"]
        if edge_rows.weighted:
            both["w"][:len(rows)] = both["w"][len(rows):] = rows["w"]
        which = np.searchsorted(bounds, both["r"], side="right") - 1
        order = np.argsort(which, kind="stable")
        cuts = np.searchsorted(which[order], np.arange(blocks + 1))
        for b in range(blocks):
            if cuts[b + 1] > cuts[b]:
                both[order[cuts[b]:cuts[b + 1]]].tofile(buckets[b])
    for fh in buckets:
        fh.close()
    kept = np.empty(n, dtype=np.int64)
    raw_indices = open(scratch / "indices.bin", "wb")
    raw_weights = open(scratch / "weights.bin", "wb") if edge_rows.weighted else None
    for b in range(blocks):
        lo, hi = int(bounds[b]), int(bounds[b + 1])
        bucket = np.fromfile(scratch / f"bucket-{b}.bin", dtype=entry)
        (scratch / f"bucket-{b}.bin").unlink()
        local = np.zeros(hi - lo + 1, dtype=np.int64)
        np.cumsum(counts[lo:hi], out=local[1:])
        indices = np.empty(len(bucket), dtype=edge_rows.index_dtype)
        weights = np.empty(len(bucket) if edge_rows.weighted else 0, dtype=np.float32)
        w = np.ascontiguousarray(bucket["w"]) if edge_rows.weighted else np.empty(0, np.float32)
        scatter_directed(np.ascontiguousarray(bucket["r"]), np.ascontiguousarray(bucket["c"]), w, lo,
                         local[:-1].copy(), indices, weights)
        del bucket
        sort_unique_rows(local, indices, weights, kept[lo:hi])
        compacted = np.empty_like(local)
        compact_rows(local, kept[lo:hi], indices, weights, compacted)
        indices[:compacted[-1]].tofile(raw_indices)
        if raw_weights is not None:
            weights[:compacted[-1]].tofile(raw_weights)
        if bar is not None:
            bar.update(1)
    raw_indices.close()
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(kept, out=indptr[1:])
    writer.save("indptr", indptr)
    unique = int(indptr[-1])
    _copy_raw(scratch / "indices.bin", writer, "indices", unique, edge_rows.index_dtype, block_bytes)
    if raw_weights is not None:
        raw_weights.close()
        _copy_raw(scratch / "weights.bin", writer, "weight", unique, np.float32, block_bytes)
    return unique, blocks


def _copy_raw(raw, writer, name, count, dtype, window_bytes):
    """Turn a raw binary file into a ``.npy`` of the stage, a window at a time."""
    created = writer.array(name, (count,), dtype)  # the file with its header; pages untouched
    del created
    rows = max(1, window_bytes // np.dtype(dtype).itemsize)
    with open(raw, "rb") as fh, NpyFile(writer.path / f"{name}.npy", writable=True) as out:
        for start, stop in chunk_ranges(count, rows):
            out.write(start, np.fromfile(fh, dtype=dtype, count=stop - start))
    raw.unlink()

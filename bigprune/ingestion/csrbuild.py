"""Building the symmetric CSR from a stream of edge rows, in memory or in row blocks on disk.

When every edge row and the whole adjacency fit the budget, the rows are held in memory and
scattered once. Otherwise they are spilled to a scratch file, bucketed by row block (blocks sized
so that one block's entries fit), and each block is sorted and merged on its own.
"""
import numpy as np

from ..common.arrayfile import NpyFile
from ..kernels.csr import (block_bounds, compact_rows, scatter_directed, scatter_edges, sort_unique_rows,
                          split_by_block)
from ..common.memory import MIB, chunk_ranges

# Bytes per directed entry while a block is built: its bucket record (row, col, weight) plus its
# CSR slot (col, weight) plus per-row sort scratch.
ENTRY_BYTES = 8 + 8 + 4 + 8 + 4 + 8
# Records of the bucketing pass per spilled edge row: the row, its columns, its two directed
# entries (as columns, then as one block's records).
BUCKET_RECORDS = 6
# The last copy (raw neighbour file -> .npy) needs no more than this at a time to run at disk speed.
COPY_WINDOW = 64 * MIB


def count_dtype(edge_rows):
    """The narrowest dtype for per-node entry counts: a node has at most two per edge row."""
    return np.int32 if 2 * int(edge_rows) < 2**31 else np.int64


def in_memory_bytes_per_row(index_dtype, weighted):
    """Bytes one input edge row costs on the in-memory path: its record and two CSR slots."""
    index, weight = np.dtype(index_dtype).itemsize, 4 if weighted else 0
    return (2 * index + weight) + 2 * (index + weight)


class EdgeRows:
    """The mapped edge rows ``(u, v[, w])`` of one ingest: in memory as one array per column,
    or spilled to ``spill_path`` as records."""

    def __init__(self, capacity, index_dtype, weighted, spill_path=None):
        self.index_dtype, self.weighted, self.count = np.dtype(index_dtype), weighted, 0
        fields = [("u", index_dtype), ("v", index_dtype)] + ([("w", np.float32)] if weighted else [])
        self.record = np.dtype(fields)
        self.spill_path = spill_path
        if spill_path is None:  # columns, not records: the scatter reads them without a copy
            self.u = np.empty(capacity, dtype=self.index_dtype)
            self.v = np.empty(capacity, dtype=self.index_dtype)
            self.w = np.empty(capacity if weighted else 0, dtype=np.float32)
        else:
            self._file = open(spill_path, "wb")

    def append(self, u, v, w):
        if self.spill_path is None:
            end = self.count + len(u)
            self.u[self.count:end], self.v[self.count:end] = u, v
            if self.weighted:
                self.w[self.count:end] = w
        else:
            block = np.empty(len(u), dtype=self.record)
            block["u"], block["v"] = u, v
            if self.weighted:
                block["w"] = w
            block.tofile(self._file)
        self.count += len(u)

    def chunks(self, rows):
        """Yield the spilled rows back in order, ``rows`` records at a time."""
        self._file.close()
        with open(self.spill_path, "rb") as fh:
            for start, stop in chunk_ranges(self.count, rows):
                yield np.fromfile(fh, dtype=self.record, count=stop - start)


def build_in_memory(edge_rows, counts, writer):
    """Scatter all rows at once (they fit); write indptr, indices(, weight). Returns unique nnz."""
    n = len(counts)
    # indptr[r + 1] starts as row r's first slot and is the scatter's cursor, so that it ends as
    # row r's end: the row pointers without a second array.
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(counts[:-1], out=indptr[2:])
    indices = np.empty(int(indptr[-1] + counts[-1]), dtype=edge_rows.index_dtype)
    weights = np.empty(len(indices) if edge_rows.weighted else 0, dtype=np.float32)
    count = edge_rows.count
    scatter_edges(edge_rows.u[:count], edge_rows.v[:count], edge_rows.w[:count], indptr[1:], indices, weights)
    edge_rows.u = edge_rows.v = edge_rows.w = None
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
    _bucket(edge_rows, bounds, entry, scratch, block_bytes)
    kept = np.empty(n, dtype=np.int64)
    raw_indices = open(scratch / "indices.bin", "wb")
    raw_weights = open(scratch / "weights.bin", "wb") if edge_rows.weighted else None
    for b in range(blocks):
        indices, weights = _merge_block(scratch / f"bucket-{b}.bin", entry, counts, int(bounds[b]),
                                        int(bounds[b + 1]), kept, edge_rows)
        indices.tofile(raw_indices)
        if raw_weights is not None:
            weights.tofile(raw_weights)
        del indices, weights  # before the next block's arrays exist
        if bar is not None:
            bar.update(1)
    raw_indices.close()
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(kept, out=indptr[1:])
    del kept
    writer.save("indptr", indptr)
    unique = int(indptr[-1])
    del indptr
    _copy_raw(scratch / "indices.bin", writer, "indices", unique, edge_rows.index_dtype)
    if raw_weights is not None:
        raw_weights.close()
        _copy_raw(scratch / "weights.bin", writer, "weight", unique, np.float32)
    return unique, blocks


def _bucket(edge_rows, bounds, entry, scratch, block_bytes):
    """Write each directed entry to the bucket file of its row block, ``bucket-<b>.bin``."""
    blocks = len(bounds) - 1
    buckets = [open(scratch / f"bucket-{b}.bin", "wb") for b in range(blocks)]
    cuts = np.empty(blocks + 1, dtype=np.int64)
    for rows in edge_rows.chunks(max(1, block_bytes // (BUCKET_RECORDS * entry.itemsize))):
        w = np.ascontiguousarray(rows["w"]) if edge_rows.weighted else np.empty(0, np.float32)
        r = np.empty(2 * len(rows), dtype=edge_rows.index_dtype)
        c = np.empty_like(r)
        ws = np.empty(len(r) if edge_rows.weighted else 0, dtype=np.float32)
        split_by_block(np.ascontiguousarray(rows["u"]), np.ascontiguousarray(rows["v"]), w, bounds,
                       r, c, ws, cuts)
        del rows, w
        for b in range(blocks):
            part = np.empty(cuts[b + 1] - cuts[b], dtype=entry)
            part["r"], part["c"] = r[cuts[b]:cuts[b + 1]], c[cuts[b]:cuts[b + 1]]
            if edge_rows.weighted:
                part["w"] = ws[cuts[b]:cuts[b + 1]]
            part.tofile(buckets[b])
    for fh in buckets:
        fh.close()


def _merge_block(path, entry, counts, lo, hi, kept, edge_rows):
    """Rows ``lo..hi`` from their bucket file: scattered, sorted and merged; fills ``kept[lo:hi]``
    and returns the block's unique neighbours and weights, row after row."""
    bucket = np.fromfile(path, dtype=entry)
    path.unlink()
    local = np.zeros(hi - lo + 1, dtype=np.int64)
    np.cumsum(counts[lo:hi], out=local[1:])
    indices = np.empty(len(bucket), dtype=edge_rows.index_dtype)
    weights = np.empty(len(bucket) if edge_rows.weighted else 0, dtype=np.float32)
    w = np.ascontiguousarray(bucket["w"]) if edge_rows.weighted else np.empty(0, np.float32)
    scatter_directed(np.ascontiguousarray(bucket["r"]), np.ascontiguousarray(bucket["c"]), w, lo,
                     local[:-1].copy(), indices, weights)
    del bucket, w
    sort_unique_rows(local, indices, weights, kept[lo:hi])
    compacted = np.empty_like(local)
    compact_rows(local, kept[lo:hi], indices, weights, compacted)
    return indices[:compacted[-1]], weights[:compacted[-1]]


def _copy_raw(raw, writer, name, count, dtype):
    """Turn a raw binary file into a ``.npy`` of the stage, ``COPY_WINDOW`` bytes at a time."""
    created = writer.array(name, (count,), dtype)  # the file with its header; pages untouched
    del created
    rows = max(1, COPY_WINDOW // np.dtype(dtype).itemsize)
    with open(raw, "rb") as fh, NpyFile(writer.path / f"{name}.npy", writable=True) as out:
        for start, stop in chunk_ranges(count, rows):
            out.write(start, np.fromfile(fh, dtype=dtype, count=stop - start))
    raw.unlink()

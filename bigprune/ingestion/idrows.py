"""Edge rows for integer ids without DuckDB: pyarrow reads the partitions, a hash table maps ids.

Yields the same ``(u, v, w, dropped)`` batches as ``edges.duckdb_rows`` so that the CSR build
downstream cannot tell the two apart; only the error paths reach for DuckDB.
"""
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from ..kernels.idhash import build_table, lookup
from ..common.memory import MIB

# Slots per node: half full, so a lookup probes about 1.5 slots for a hit and 2.5 for a miss.
SLOTS_PER_NODE = 2
SLOT_BYTES = 12  # int64 key + int32 row
# Read-ahead per column when streaming a Parquet file. pyarrow's default (pre_buffer) fetches
# every row group's column chunks before the first batch: a whole edge partition or the whole
# feature column held at once (measured: 1.1 GB more RSS and 50% slower on a 1 GB feature column).
READ_BUFFER = 4 * MIB


def table_bytes(nodes):
    """Bytes the id table of ``nodes`` ids holds."""
    return _slots(nodes) * SLOT_BYTES


def streamed(path, metadata=None):
    """``path`` opened to be read batch by batch with bounded read-ahead (see ``READ_BUFFER``)."""
    return pq.ParquetFile(path, metadata=metadata, pre_buffer=False, buffer_size=READ_BUFFER)


def hashable(node_id_type, edge_files, index_dtype, src="src", dst="dst"):
    """Whether the hash path applies: plain integer ids that fit int64 and int32 rows.

    uint64 ids above 2**63 would wrap when seen as int64, and dictionary columns would need
    decoding; both stay on the DuckDB path, as do tables too large for int32 rows.
    """
    if np.dtype(index_dtype) != np.int32:
        return False
    types = [node_id_type]
    for path in edge_files:
        schema = pq.read_schema(path)
        types += [schema.field(src).type, schema.field(dst).type]
    return all(pa.types.is_integer(t) and t != pa.uint64() for t in types)


class IdTable:
    """The node ids (node table row order is the dense row) as an open-addressing table;
    ``repeated`` is the first id given twice, or None."""

    def __init__(self, ids):
        ids = np.ascontiguousarray(ids, dtype=np.int64)
        self.table = np.empty((_slots(len(ids)), 3), dtype=np.uint32)
        row = build_table(ids, self.table)
        self.repeated = None if row < 0 else int(ids[row])

    @classmethod
    def from_table(cls, table):
        """The id table around slots built before (``self.table`` of another IdTable)."""
        ids = cls.__new__(cls)
        ids.table, ids.repeated = table, None
        return ids

    def rows(self, column):
        """Dense rows of an Arrow integer column, -1 for ids not in the table and for nulls."""
        ids = column if not column.null_count else pc.fill_null(column, 0)
        ids = np.ascontiguousarray(ids.to_numpy(), dtype=np.int64)
        out = np.empty(len(ids), dtype=np.int32)
        lookup(ids, self.table, out)
        if column.null_count:
            out[column.is_null().to_numpy(zero_copy_only=False)] = -1
        return out


def hashed_rows(edges, ids, batch_rows, drop_unknown, explain_unmapped, explain_weight):
    """Yield ``(u, v, w, dropped)`` per batch of the partitions, in file order.

    ``u``, ``v`` are int32 rows, ``w`` float32 weights (empty when unweighted), ``dropped``
    the rows of the batch naming an unknown node (only with ``drop_unknown``; otherwise
    ``explain_unmapped()`` raises). A weight that is not finite and > 0 calls
    ``explain_weight()``, which raises.
    """
    columns = [edges.src, edges.dst] + (["weight"] if edges.weighted else [])
    no_weight = np.empty(0, dtype=np.float32)
    for path in edges.files:
        for batch in streamed(path).iter_batches(batch_size=batch_rows, columns=columns):
            u, v = ids.rows(batch.column(0)), ids.rows(batch.column(1))
            known = (u >= 0) & (v >= 0)
            dropped = 0
            if not known.all():
                if not drop_unknown:
                    explain_unmapped()
                dropped = len(known) - int(np.count_nonzero(known))
                u, v = u[known], v[known]
            w = no_weight
            if edges.weighted:
                with np.errstate(over="ignore", invalid="ignore"):  # too large for float32 becomes inf
                    w = batch.column(2).to_numpy(zero_copy_only=False).astype(np.float32)
                if dropped:
                    w = w[known]
                if not np.all((w > 0) & (w < np.inf)):  # also false for NaN and null
                    explain_weight()
            yield u, v, w, dropped


def _slots(nodes):
    return max(16, SLOTS_PER_NODE * int(nodes))

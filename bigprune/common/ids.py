"""Translating the user's node ids to dense row indices: one place for every id file we read."""
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .errors import InputError
from .sources import open_parquet


def read_id_file(path, option, columns=("node_id",)):
    """The ``columns`` of a Parquet file of node ids (a selection, an answers file)."""
    if not Path(path).is_file():
        raise InputError(f"{option} {path}: no such file")
    file = open_parquet(path, option)
    missing = [c for c in columns if c not in file.schema_arrow.names]
    if missing and tuple(columns) == ("node_id",):
        raise InputError(f"{option} {path}: no node_id column; give a Parquet file with one "
                         "(a bigprune selection has it)")
    if missing:
        raise InputError(f"{option} {path}: no column {missing[0]!r}; it needs {' and '.join(columns)}")
    return file.read(columns=list(columns))


def store_ids(store):
    """The graph's ids (Arrow array), row ``i`` for dense index ``i``."""
    return store.table("graph", "node_id").column("node_id").combine_chunks()


def lookup(store, ids, option, path):
    """``ids`` cast to the graph's id type and their dense indices (int64, -1 where unknown)."""
    return lookup_in(store_ids(store), ids, option, path)


def lookup_in(known, ids, option, path):
    """:func:`lookup` against ``known`` (Arrow array of ids, row ``i`` for dense index ``i``)."""
    ids = ids.combine_chunks() if isinstance(ids, pa.ChunkedArray) else ids
    try:
        ids = ids.cast(known.type)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        raise InputError(f"{option} {path}: node_id holds {ids.type} values but the store's ids are "
                         f"{known.type}; write the ids as {known.type}") from None
    if ids.null_count:
        row = int(np.flatnonzero(ids.is_null().to_numpy(zero_copy_only=False))[0])
        raise InputError(f"{option} {path}: node_id is null at row {row}")
    dense = pc.index_in(ids, value_set=known).fill_null(-1).to_numpy(zero_copy_only=False)
    return ids, dense.astype(np.int64)


def to_dense(store, ids, option, path):
    """Dense indices of ``ids``; a one-line error names the first id the graph lacks."""
    ids, dense = lookup(store, ids, option, path)
    if (dense < 0).any():
        raise InputError(f"{option} {path}: node {ids[int(np.argmax(dense < 0))].as_py()!r} is not in the graph")
    return dense

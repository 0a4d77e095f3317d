"""Translating the user's node ids to dense row indices and back."""
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .errors import InputError
from .sources import open_parquet


def read_id_file(path, option, columns=("node_id",)):
    """The ``columns`` of a Parquet file of node ids, e.g. a selection or an answers file."""
    file = open_parquet(path, option)
    missing = [c for c in columns if c not in file.schema_arrow.names]
    if missing:
        raise InputError(f"{option} {path}: missing column {missing[0]!r} (has {', '.join(file.schema_arrow.names)})")
    return file.read(columns=list(columns))


def to_dense(store, ids, option, path):
    """Dense indices (int64) of ``ids``; a one-line error names the first id the graph lacks."""
    known = store.table("graph", "node_id").column("node_id").combine_chunks()
    ids = ids.combine_chunks() if isinstance(ids, pa.ChunkedArray) else ids
    try:
        ids = ids.cast(known.type)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        raise InputError(f"{option} {path}: node_id has type {ids.type}, the graph's ids are {known.type}") from None
    if ids.null_count:
        raise InputError(f"{option} {path}: node_id is null at row "
                         f"{int(np.flatnonzero(ids.is_null().to_numpy(zero_copy_only=False))[0])}")
    dense = pc.index_in(ids, value_set=known).fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int64)
    if (dense < 0).any():
        raise InputError(f"{option} {path}: node {ids[int(np.argmax(dense < 0))].as_py()!r} is not in the graph")
    return dense

"""Reading and checking the node table: ids, splits, labels and features."""
import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..common.arrayfile import NpyFile
from ..common.errors import InputError
from .columns import Columns
from .idrows import IdTable, streamed
from ..common.memory import MIB, chunk_ranges, rows_per_chunk
from ..common.schema import NO_LABEL, NO_SPLIT, SPLIT_CODES
from ..common.sources import id_kind, is_numeric, open_parquet, read_error

# Rows of ids, splits and labels read at a time (~25 MB of columns).
READ_ROWS = 1 << 20
# Feature values read at a time. Measured on a 4M x 64 float32 list column (1 GB), decoding
# alone: 8 MiB batches 2.9 s, 32 MiB 1.45 s, 128 MiB 2.05 s; batches of a quarter of the edge
# share (~770 MiB at 4 GiB) took 4.3 s and 2.5 GB, their fresh pages faulted in every time.
FEATURE_BATCH_BYTES = 32 * MIB


# What names another column when the default one is missing.
_RENAME_HINT = {"node_id": "--id-col NAME names another column",
                "label": "--label-col NAME names another column",
                "features": "--features-col NAME names another column, or give --features FILE.npy"}


class NodeTable:
    """``--nodes``: its schema and row count on opening; ``load()`` reads and checks the columns
    ``ids`` (int ids: a numpy array of their own dtype; string ids: Arrow), ``split`` (int8) and
    ``label`` (int64). String labels become class ids in sorted name order; ``class_names``
    then lists the names (index = class id), else it is None."""

    def __init__(self, path, needs_features, columns=Columns()):
        self.path = path
        self.names = columns
        self.file = open_parquet(path, "--nodes")
        schema = self.file.schema_arrow
        roles = ["node_id", "split", "label"] + (["features"] if needs_features else [])
        wanted = [getattr(columns, role, role) for role in roles]
        missing = [(role, c) for role, c in zip(roles, wanted) if c not in schema.names]
        if missing:
            role, name = missing[0]
            hint = f"; {_RENAME_HINT[role]}" if role in _RENAME_HINT else ""
            raise InputError(f"--nodes {path}: missing column {name!r} "
                             f"(needs {', '.join(wanted)}; has {', '.join(schema.names)}{hint})")
        self.id_kind = id_kind(schema.field(columns.node_id).type)
        if self.id_kind is None:
            raise InputError(f"--nodes {path}: column {columns.node_id!r} has type "
                             f"{schema.field(columns.node_id).type}; use int64 or string ids")
        ltype = schema.field(columns.label).type
        if pa.types.is_dictionary(ltype):
            ltype = ltype.value_type
        self.string_labels = pa.types.is_string(ltype) or pa.types.is_large_string(ltype)
        if not (pa.types.is_integer(ltype) or pa.types.is_null(ltype) or self.string_labels):
            raise InputError(f"--nodes {path}: column {columns.label!r} has type {ltype}; "
                             "use int64 class ids or class names (strings), null where unknown")
        self.class_names = None
        if needs_features:
            ftype = schema.field(columns.features).type
            if not (pa.types.is_list(ftype) or pa.types.is_large_list(ftype)
                    or pa.types.is_fixed_size_list(ftype)) or not is_numeric(ftype.value_type):
                raise InputError(f"--nodes {path}: column {columns.features!r} has type {ftype}; "
                                 "use a list of floats per node")
        self.rows = self.file.metadata.num_rows
        if self.rows == 0:
            raise InputError(f"--nodes {path}: the node table has no rows")
        self.id_table = None

    def load(self, hash_ids=False):
        """Read ids, splits and labels batch by batch and check them; returns self.

        With ``hash_ids`` (plain integer ids) the ids also go into ``self.id_table``, an
        :class:`IdTable` whose build finds repeated ids; otherwise a sorted copy does.
        """
        n = self.rows
        self.split = np.empty(n, dtype=np.int8)
        self.label = np.empty(n, dtype=np.int64)
        ids, chunks, row = None, [], 0
        if self.string_labels:
            self.class_names = self._class_names()
        for batch in self._batches([self.names.node_id, "split", self.names.label], READ_ROWS):
            column = batch.column(0)
            if pa.types.is_dictionary(column.type):
                column = column.dictionary_decode()
            if column.null_count:
                bad = int(np.flatnonzero(column.is_null().to_numpy(zero_copy_only=False))[0])
                raise InputError(f"--nodes {self.path}: column {self.names.node_id!r} is null at row {row + bad}")
            stop = row + len(batch)
            if self.id_kind == "int":  # one numpy array, filled in place: no second copy to concatenate
                ids = np.empty(n, dtype=column.type.to_pandas_dtype()) if ids is None else ids
                ids[row:stop] = column.to_numpy()
            else:
                chunks.append(column)
            self.split[row:stop] = self._split_codes(batch.column(1), row)
            self.label[row:stop] = self._labels(batch.column(2), self.split[row:stop], row)
            row = stop
        self.ids = ids if self.id_kind == "int" else pa.chunked_array(chunks).combine_chunks()
        del chunks
        self._check_classes()
        if hash_ids:
            self.id_table = IdTable(self.ids)
            repeated = self.id_table.repeated
        else:
            repeated = self._repeated_id()
        if repeated is not None:
            raise InputError(f"--nodes {self.path}: column {self.names.node_id!r} repeats id {repeated!r}; "
                             "ids must be unique")
        return self

    def id_array(self):
        """The ids as one Arrow array, as the store keeps them."""
        return pa.array(self.ids) if self.id_kind == "int" else self.ids

    def read_ids(self):
        """The ids read again (as Arrow) after ``load`` dropped them: only for error messages."""
        return pa.chunked_array([b.column(0) for b in self._batches([self.names.node_id], READ_ROWS)]).combine_chunks()

    def _split_codes(self, column, first_row):
        if not (pa.types.is_string(column.type) or pa.types.is_large_string(column.type)
                or pa.types.is_dictionary(column.type) or pa.types.is_null(column.type)):
            raise InputError(f"--nodes {self.path}: column 'split' has type {column.type}; "
                             "use strings train, valid, test or null")
        # Dictionary-encode so that the per-row work is on small integer codes, never on Python
        # strings (an object array of 10^8 strings would not fit any sensible budget).
        encoded = column.cast(pa.string()).dictionary_encode()
        names = encoded.dictionary.to_pylist()
        unknown = [i for i, name in enumerate(names) if name not in SPLIT_CODES]
        if unknown:
            row = int(np.flatnonzero(encoded.indices.to_numpy(zero_copy_only=False) == unknown[0])[0])
            raise InputError(f"--nodes {self.path}: column 'split' row {first_row + row} holds "
                             f"{names[unknown[0]]!r}; use train, valid, test or null")
        lookup = np.array([SPLIT_CODES[name] for name in names] + [NO_SPLIT], dtype=np.int8)
        return lookup[encoded.indices.fill_null(len(names)).to_numpy(zero_copy_only=False)]

    def _class_names(self):
        """The distinct non-null label strings, sorted (class id = position): one pass over the column."""
        seen = set()
        for batch in self._batches([self.names.label], READ_ROWS):
            column = batch.column(0)
            if pa.types.is_dictionary(column.type):
                column = column.dictionary_decode()
            seen.update(pc.unique(column.drop_null()).to_pylist())
        return sorted(seen)

    def _labels(self, column, split, first_row):
        name = self.names.label
        mask = column.is_null().to_numpy(zero_copy_only=False)
        if self.string_labels:
            if pa.types.is_dictionary(column.type):
                column = column.dictionary_decode()
            column = pc.index_in(column.cast(pa.string()), value_set=pa.array(self.class_names, pa.string()))
        label = column.cast(pa.int64()).fill_null(NO_LABEL).to_numpy(zero_copy_only=False)
        needs = (split == SPLIT_CODES["train"]) | (split == SPLIT_CODES["valid"])
        unlabeled = np.flatnonzero(needs & mask)
        if unlabeled.size:
            raise InputError(f"--nodes {self.path}: column {name!r} is null at row {first_row + unlabeled[0]}, "
                             "a train/valid row; every train and valid node needs a label")
        negative = np.flatnonzero(~mask & (label < 0))
        if negative.size:
            raise InputError(f"--nodes {self.path}: column {name!r} row {first_row + negative[0]} holds "
                             f"{label[negative[0]]}; labels are class ids >= 0")
        return np.where(mask, NO_LABEL, label)

    def _check_classes(self):
        label, split = self.label, self.split
        trained = set(np.unique(label[split == SPLIT_CODES["train"]]).tolist())
        valid = label[split == SPLIT_CODES["valid"]]
        orphans = sorted(set(np.unique(valid).tolist()) - trained)
        if orphans:
            row = int(np.flatnonzero((split == SPLIT_CODES["valid"]) & (label == orphans[0]))[0])
            shown = orphans[0] if self.class_names is None else repr(self.class_names[orphans[0]])
            raise InputError(f"--nodes {self.path}: class {shown} (row {row}, split valid) has no "
                             "train node; every class needs at least one train node")

    def _repeated_id(self):
        """The smallest id given twice, or None."""
        if self.id_kind == "int":  # a sorted copy costs 8 bytes a node; a hash table several times that
            ordered = np.sort(self.ids)
            repeats = np.flatnonzero(ordered[1:] == ordered[:-1])
            return int(ordered[repeats[0]]) if repeats.size else None
        counts = pc.value_counts(self.ids)
        repeated = counts.filter(pc.greater(counts.field("counts"), 1))
        return repeated[0]["values"].as_py() if len(repeated) else None

    # ---- features ------------------------------------------------------------------------
    def copy_features(self, out, chunk_bytes):
        """Fill ``out`` (n x d float32) from the ``features`` column, batch by batch.

        A batch is written by a second thread while the next one decodes (both release the
        GIL): 2.0 s against 2.4 s for a 1 GB column, best of three, on two cores.
        """
        dim = out.shape[1]
        name = self.names.features
        ftype = self.file.schema_arrow.field(name).type
        fixed = pa.types.is_fixed_size_list(ftype) and ftype.list_size == dim
        row = 0
        batch_rows = rows_per_chunk(min(chunk_bytes, FEATURE_BATCH_BYTES), 8 * dim, at_least=1024)
        with ThreadPoolExecutor(1) as writer:
            pending = None
            for batch in self._batches([name], batch_rows):
                column = batch.column(0)
                if column.null_count:
                    bad = int(np.flatnonzero(column.is_null().to_numpy(zero_copy_only=False))[0])
                    raise InputError(f"--nodes {self.path}: column {name!r} is null at row {row + bad}")
                if not fixed:  # a fixed-size list of d values cannot be ragged
                    lengths = pc.list_value_length(column).to_numpy()
                    wrong = np.flatnonzero(lengths != dim)
                    if wrong.size:
                        raise InputError(f"--nodes {self.path}: column {name!r} row {row + wrong[0]} has "
                                         f"{lengths[wrong[0]]} values, row 0 has {dim}; "
                                         "every row needs the same count")
                values = pc.list_flatten(column).to_numpy(zero_copy_only=False)
                block = values.astype(np.float32, copy=False).reshape(-1, dim)
                _check_finite(block, row, f"--nodes {self.path}: column {name!r}")
                if pending is not None:
                    pending.result()  # one write in flight: two batches in memory at most
                pending = writer.submit(out.__setitem__, slice(row, row + len(block)), block)
                row += len(block)
            if pending is not None:
                pending.result()

    def _batches(self, columns, rows):
        """``columns`` in record batches of ``rows`` rows; a damaged page is named."""
        batches = streamed(self.path, self.file.metadata).iter_batches(batch_size=rows, columns=columns)
        while True:
            try:
                batch = next(batches, None)
            except (OSError, pa.ArrowException) as exc:
                raise read_error(self.path, "--nodes", exc) from None
            if batch is None:
                return
            yield batch

    def feature_dim(self):
        """The length of row 0's feature list."""
        name = self.names.features
        first = next(self._batches([name], 1)).column(0)
        if first.null_count:
            raise InputError(f"--nodes {self.path}: column {name!r} is null at row 0")
        dim = len(first[0].values)
        if dim == 0:
            raise InputError(f"--nodes {self.path}: column {name!r} row 0 is empty")
        return dim


def copy_npy_features(path, rows, out_factory, chunk_bytes):
    """Check ``--features FILE.npy`` against the node table and copy it as float32 in chunks."""
    with open(path, "rb") as fh:
        if fh.read(6) != b"\x93NUMPY":  # else np.load tries pickle and talks about that
            raise InputError(f"--features {path}: not a .npy file (no NumPy header); write it with numpy.save")
    try:
        source = NpyFile(path)
    except (OSError, ValueError) as exc:
        raise InputError(f"--features {path}: not a readable .npy file ({exc})") from None
    expected = source.offset + int(np.prod(source.shape, dtype=np.int64)) * source.dtype.itemsize
    if os.path.getsize(path) < expected:
        source.close()
        raise InputError(f"--features {path}: not a readable .npy file (it ends before its "
                         f"{source.shape} {source.dtype} data does; was it cut short?)")
    with source:
        if len(source.shape) != 2 or not np.issubdtype(source.dtype, np.number):
            raise InputError(f"--features {path}: holds a {source.dtype} array of shape {source.shape}; "
                             "use a 2-D float array, one row per node")
        if source.shape[0] != rows:
            raise InputError(f"--features {path}: has {source.shape[0]} rows but the node table has {rows}; "
                             "row i must be the node in row i of --nodes")
        step = rows_per_chunk(chunk_bytes, 8 * source.shape[1], at_least=1024)
        with out_factory(source.shape[1]) as out:
            for start, stop in chunk_ranges(rows, step):
                block = source.read(start, stop).astype(np.float32, copy=False)
                _check_finite(block, start, f"--features {path}:")
                out[start:stop] = block
    return source.shape[1]


def _check_finite(block, first_row, where):
    # Cheap test first (the sum is finite iff no element is NaN/inf, barring overflow); scan only on failure.
    if np.isfinite(block.sum(dtype=np.float64)):
        return
    bad = np.argwhere(~np.isfinite(block))
    if bad.size:
        r, c = bad[0]
        raise InputError(f"{where} row {first_row + r} value {c} is {block[r, c]}; features must be finite")

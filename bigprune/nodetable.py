"""Reading and checking the node table: ids, splits, labels and features."""
import os

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .arrayfile import NpyFile
from .errors import InputError
from .memory import chunk_ranges, rows_per_chunk
from .schema import NO_LABEL, NO_SPLIT, SPLIT_CODES
from .sources import id_kind, is_numeric, open_parquet, read_error


class NodeTable:
    """``--nodes``: its schema and row count on opening; ``load()`` reads and checks the columns
    ``ids`` (Arrow), ``split`` (int8) and ``label`` (int64)."""

    def __init__(self, path, needs_features):
        self.path = path
        self.file = open_parquet(path, "--nodes")
        schema = self.file.schema_arrow
        wanted = ["node_id", "split", "label"] + (["features"] if needs_features else [])
        missing = [c for c in wanted if c not in schema.names]
        if missing:
            raise InputError(f"--nodes {path}: missing column {missing[0]!r} "
                             f"(needs {', '.join(wanted)}; has {', '.join(schema.names)})")
        self.id_kind = id_kind(schema.field("node_id").type)
        if self.id_kind is None:
            raise InputError(f"--nodes {path}: column 'node_id' has type {schema.field('node_id').type}; "
                             "use int64 or string ids")
        if not pa.types.is_integer(schema.field("label").type) and not pa.types.is_null(schema.field("label").type):
            raise InputError(f"--nodes {path}: column 'label' has type {schema.field('label').type}; "
                             "use int64 class ids (null where unknown)")
        if needs_features:
            ftype = schema.field("features").type
            if not (pa.types.is_list(ftype) or pa.types.is_large_list(ftype)
                    or pa.types.is_fixed_size_list(ftype)) or not is_numeric(ftype.value_type):
                raise InputError(f"--nodes {path}: column 'features' has type {ftype}; "
                                 "use a list of floats per node")
        self.rows = self.file.metadata.num_rows
        if self.rows == 0:
            raise InputError(f"--nodes {path}: the node table has no rows")

    def load(self):
        """Read ids, splits and labels and check them; returns self."""
        try:
            table = self.file.read(columns=["node_id", "split", "label"])
        except (OSError, pa.ArrowException) as exc:
            raise read_error(self.path, "--nodes", exc) from None
        self.ids = table.column("node_id").combine_chunks()
        if pa.types.is_dictionary(self.ids.type):
            self.ids = self.ids.dictionary_decode()
        self.split = self._split_codes(table.column("split"))
        self.label = self._labels(table.column("label"))
        self._check_ids()
        return self

    def _split_codes(self, column):
        if not (pa.types.is_string(column.type) or pa.types.is_large_string(column.type)
                or pa.types.is_dictionary(column.type) or pa.types.is_null(column.type)):
            raise InputError(f"--nodes {self.path}: column 'split' has type {column.type}; "
                             "use strings train, valid, test or null")
        # Dictionary-encode so that the per-row work is on small integer codes, never on Python
        # strings (an object array of 10^8 strings would not fit any sensible budget).
        encoded = column.cast(pa.string()).combine_chunks().dictionary_encode()
        names = encoded.dictionary.to_pylist()
        unknown = [i for i, name in enumerate(names) if name not in SPLIT_CODES]
        if unknown:
            row = int(np.flatnonzero(encoded.indices.to_numpy(zero_copy_only=False) == unknown[0])[0])
            raise InputError(f"--nodes {self.path}: column 'split' row {row} holds {names[unknown[0]]!r}; "
                             "use train, valid, test or null")
        lookup = np.array([SPLIT_CODES[name] for name in names] + [NO_SPLIT], dtype=np.int8)
        return lookup[encoded.indices.fill_null(len(names)).to_numpy(zero_copy_only=False)]

    def _labels(self, column):
        mask = column.is_null().to_numpy(zero_copy_only=False)
        label = column.cast(pa.int64()).fill_null(NO_LABEL).to_numpy().astype(np.int64)
        needs = (self.split == SPLIT_CODES["train"]) | (self.split == SPLIT_CODES["valid"])
        unlabeled = np.flatnonzero(needs & mask)
        if unlabeled.size:
            raise InputError(f"--nodes {self.path}: column 'label' is null at row {unlabeled[0]}, "
                             "a train/valid row; every train and valid node needs a label")
        negative = np.flatnonzero(~mask & (label < 0))
        if negative.size:
            raise InputError(f"--nodes {self.path}: column 'label' row {negative[0]} holds "
                             f"{label[negative[0]]}; labels are class ids >= 0")
        label = np.where(mask, NO_LABEL, label)
        trained = set(np.unique(label[self.split == SPLIT_CODES["train"]]).tolist())
        valid = label[self.split == SPLIT_CODES["valid"]]
        orphans = sorted(set(np.unique(valid).tolist()) - trained)
        if orphans:
            row = int(np.flatnonzero((self.split == SPLIT_CODES["valid"]) & (label == orphans[0]))[0])
            raise InputError(f"--nodes {self.path}: class {orphans[0]} (row {row}, split valid) has no "
                             "train node; every class needs at least one train node")
        return label

    def _check_ids(self):
        nulls = self.ids.null_count
        if nulls:
            row = int(np.flatnonzero(self.ids.is_null().to_numpy(zero_copy_only=False))[0])
            raise InputError(f"--nodes {self.path}: column 'node_id' is null at row {row}")
        if self.id_kind == "int":  # a sorted copy costs 8 bytes a node; a hash table several times that
            ordered = np.sort(self.ids.to_numpy())
            repeats = np.flatnonzero(ordered[1:] == ordered[:-1])
            dup = int(ordered[repeats[0]]) if repeats.size else None
            del ordered
        else:
            counts = pc.value_counts(self.ids)
            repeated = counts.filter(pc.greater(counts.field("counts"), 1))
            dup = repeated[0]["values"].as_py() if len(repeated) else None
        if dup is not None:
            raise InputError(f"--nodes {self.path}: column 'node_id' repeats id {dup!r}; ids must be unique")

    # ---- features ------------------------------------------------------------------------
    def copy_features(self, out, chunk_bytes):
        """Fill ``out`` (n x d float32) from the ``features`` column, batch by batch."""
        dim = out.shape[1]
        row = 0
        batch_rows = rows_per_chunk(chunk_bytes, 8 * dim, at_least=1024)
        for batch in self._batches(batch_rows):
            column = batch.column(0)
            if column.null_count:
                bad = int(np.flatnonzero(column.is_null().to_numpy(zero_copy_only=False))[0])
                raise InputError(f"--nodes {self.path}: column 'features' is null at row {row + bad}")
            lengths = pc.list_value_length(column).to_numpy()
            wrong = np.flatnonzero(lengths != dim)
            if wrong.size:
                raise InputError(f"--nodes {self.path}: column 'features' row {row + wrong[0]} has "
                                 f"{lengths[wrong[0]]} values, row 0 has {dim}; every row needs the same count")
            values = pc.list_flatten(column).to_numpy(zero_copy_only=False)
            block = values.astype(np.float32, copy=False).reshape(-1, dim)
            _check_finite(block, row, f"--nodes {self.path}: column 'features'")
            out[row:row + len(block)] = block
            row += len(block)

    def _batches(self, rows):
        """The ``features`` column in record batches of ``rows`` rows; a damaged page is named."""
        batches = self.file.iter_batches(batch_size=rows, columns=["features"])
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
        first = next(self._batches(1)).column(0)
        if first.null_count:
            raise InputError(f"--nodes {self.path}: column 'features' is null at row 0")
        dim = len(first[0].values)
        if dim == 0:
            raise InputError(f"--nodes {self.path}: column 'features' row 0 is empty")
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

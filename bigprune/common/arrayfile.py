"""Windows of a ``.npy`` file read and written with plain file I/O, never through a memory map.

Pages of a mapped file count in the process's RSS while they are mapped; bytes read with
``pread`` into an array the caller owns do not linger anywhere but in that array (the kernel's
page cache is not the process's). So every out-of-core stage reads and writes through here, and
its RSS is just the buffers it planned.
"""
import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from .memory import chunk_ranges

# Rows converted between storage and compute dtypes this many bytes at a time (float16 <-> float32),
# so that a conversion never needs a second full-size copy of a window.
PIECE_BYTES = 4 << 20


class NpyFile:
    """A ``.npy`` file on disk: its header, and row windows read or written on demand.

    ``shape``, ``dtype``, ``offset`` (bytes before the data) and ``row_items`` (items per row of
    the first axis) describe it. Use it as a context manager, or call :meth:`close`.
    """

    def __init__(self, path, writable=False):
        self.path = path
        self._fd = os.open(path, os.O_RDWR if writable else os.O_RDONLY)
        with open(path, "rb") as fh:
            major, _ = np.lib.format.read_magic(fh)
            header = (np.lib.format.read_array_header_1_0 if major == 1
                      else np.lib.format.read_array_header_2_0)
            shape, fortran, dtype = header(fh)
            self.offset = fh.tell()
        if fortran:
            raise ValueError(f"{path}: Fortran-ordered arrays are not supported")
        self.shape, self.dtype = tuple(shape), np.dtype(dtype)
        self.row_items = int(np.prod(self.shape[1:], dtype=np.int64))

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def close(self):
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None

    def read_into(self, start, out, piece_bytes=PIECE_BYTES):
        """Fill ``out`` (C-contiguous, any float or int dtype) with rows ``start..start+len(out)``;
        a cast goes through a buffer of about ``piece_bytes``."""
        count = out.shape[0]
        if out.dtype == self.dtype:
            self._pread(out, start)
            return out
        rows = max(1, piece_bytes // max(1, self.row_items * self.dtype.itemsize))
        piece = np.empty((min(rows, count),) + self.shape[1:], dtype=self.dtype)
        for lo in range(0, count, rows):
            hi = min(count, lo + rows)
            self._pread(piece[:hi - lo], start + lo)
            out[lo:hi] = piece[:hi - lo]
        return out

    def read_parallel(self, start, out, threads):
        """:meth:`read_into` split into ``threads`` runs of rows read at once.

        The reads (and any casts) release the GIL, so a large window fills in about 1/threads of
        the time: the copy out of the page cache and the first touch of ``out``'s pages are the
        cost, and each thread pays for its own part.
        """
        parts = chunk_ranges(out.shape[0], -(-out.shape[0] // max(1, int(threads))))
        if len(parts) < 2:
            return self.read_into(start, out)
        piece = PIECE_BYTES // len(parts)  # the cast buffers together stay within one piece
        with ThreadPoolExecutor(len(parts)) as pool:
            list(pool.map(lambda ab: self.read_into(start + ab[0], out[ab[0]:ab[1]], piece), parts))
        return out

    def read(self, start, stop):
        """Rows ``start..stop`` as a new array of the file's dtype."""
        return self.read_into(start, np.empty((stop - start,) + self.shape[1:], dtype=self.dtype))

    def write(self, start, values):
        """Write ``values`` as rows ``start..start+len(values)``, cast to the file's dtype in pieces."""
        values = np.ascontiguousarray(values)
        if values.dtype == self.dtype:
            self._pwrite(values, start)
            return
        rows = max(1, PIECE_BYTES // max(1, self.row_items * self.dtype.itemsize))
        for lo in range(0, values.shape[0], rows):
            self._pwrite(values[lo:lo + rows].astype(self.dtype), start + lo)

    def _at(self, row):
        return self.offset + row * self.row_items * self.dtype.itemsize

    def _pread(self, out, row):
        pread_into(self._fd, out, self._at(row), self.path)

    def _pwrite(self, values, row):
        pwrite_from(self._fd, values, self._at(row))


def pread_into(fd, out, position, name="file"):
    """Fill the C-contiguous array ``out`` with the bytes of open file ``fd`` from ``position``."""
    view = memoryview(out).cast("B")
    done = 0
    while done < len(view):
        got = os.preadv(fd, [view[done:]], position + done)
        if got == 0:
            raise ValueError(f"{name}: ends before byte {position + len(view)}")
        done += got


def pwrite_from(fd, values, position):
    """Write the C-contiguous array ``values`` into open file ``fd`` at byte ``position``."""
    view = memoryview(values).cast("B")
    done = 0
    while done < len(view):
        done += os.pwritev(fd, [view[done:]], position + done)


def edge_chunks(indices, weights, rows):
    """A function giving ``(first entry, indices chunk, weights chunk)`` over a CSR's entries.

    ``indices`` and ``weights`` are arrays (one chunk, no copy) or :class:`NpyFile` (chunks of
    ``rows`` entries, read into two reused buffers); ``weights`` is None for an unweighted graph,
    whose chunks carry a (0,) float32 array.
    """
    none = np.zeros(0, dtype=np.float32)
    if isinstance(indices, np.ndarray):
        return lambda: iter([(0, indices, none if weights is None else weights)])

    def chunks():
        nnz = indices.shape[0]
        size = max(1, min(int(rows), nnz))
        index_buffer = np.empty(size, dtype=indices.dtype)
        weight_buffer = none if weights is None else np.empty(size, dtype=np.float32)
        for start in range(0, nnz, size):
            stop = min(nnz, start + size)
            index_part = indices.read_into(start, index_buffer[:stop - start])
            weight_part = none if weights is None else weights.read_into(start, weight_buffer[:stop - start])
            yield start, index_part, weight_part

    return chunks

"""The propagate stage's memory plan, made from the budget before any data is read.

Two ways to run, each a sequence of phases whose data must fit ``budget - FIXED_OVERHEAD``:

- in memory: the CSR and ``X_k`` (float32) whole, two output blocks of rows (one
  computed while the other is written);
  phases: scales (CSR, degree, scales, needed rows), hops (CSR, X_k, scales, needed rows,
  two output blocks), PageRank (CSR, four float64 n-vectors, a mask);
- grid (when that does not fit): ``indptr`` and the per-row vectors of PageRank whole, the
  entries streamed in chunks; hops hold one output window and one source window of rows
  (see :mod:`bigprune.propagation.grid`).

Byte counts include every buffer the stage allocates, the conversions between float16 storage
and float32 compute among them; ``small`` covers the split and label windows of the needed-rows
pass, the kernels' cut lists and the grid's bucket offsets.
"""
import math
from collections import namedtuple

from ..common import memory
from ..common.arrayfile import PIECE_BYTES
from ..common.errors import BudgetError
from ..common.memory import GIB, KIB, MIB, format_size
from .restrict import WINDOW_ROWS

Plan = namedtuple("Plan", "grid block_rows out_rows src_rows edge_rows pagerank_whole")
Plan.__doc__ = """grid : bool, out of core. block_rows : output rows per block (in memory).
out_rows, src_rows : rows per output and source window; edge_rows : entries per chunk (grid).
pagerank_whole : whether PageRank holds the CSR whole (always in memory; in the grid way when
the CSR fits beside PageRank's vectors though the hops do not)."""

# In memory, the output is written one block of rows at a time: two blocks together at most
# this large, and at least MIN_BLOCK_ROWS rows each (or all of them).
BLOCK_BYTES = 64 * MIB
MIN_BLOCK_ROWS = 1024
# Grid: entries per chunk at most this many bytes; windows and chunks no smaller than these
# (only a budget near the refusal line gets them).
EDGE_BYTES = 64 * MIB
MIN_WINDOW_ROWS = 16
MIN_EDGE_ROWS = 256
LOCAL_ROWS = 2 ** 31 - 1  # buckets store row and column numbers within a window as int32
# split (int8), label (int64) and a few boolean masks per row of a needed-rows window
NEEDED_ROW = 16
# PageRank: indptr (int64) and four float64 n-vectors, plus a boolean mask, per row.
PAGERANK_ROW = 8 + 4 * 8 + 1


def plan(n, d, nnz, index_bytes, weighted, storage_bytes, restrict, budget):
    """The plan for ``n`` rows of ``d`` features over ``nnz`` CSR entries; BudgetError if none fits.

    index_bytes : 4 or 8 (int32 or int64 indices). storage_bytes : 2 or 4 (float16 or float32
    hop files). restrict : bool, whether an int8 per row of needed hops is held. The refusal
    names the smallest budget that has a plan (rounded up as printed).
    """
    shape = (n, d, nnz, index_bytes, weighted, storage_bytes, restrict)
    chosen = _fit(*shape, budget - memory.FIXED_OVERHEAD)
    if chosen is not None:
        return chosen
    lo, hi = max(0, budget - memory.FIXED_OVERHEAD), _in_memory_bytes(*shape)
    while hi - lo > 1:  # the plans only grow with the budget: bisect for the smallest that fits
        mid = (lo + hi) // 2
        lo, hi = (lo, mid) if _fit(*shape, mid) is not None else (mid, hi)
    least = _printed(hi + memory.FIXED_OVERHEAD)
    raise BudgetError(f"--memory-budget {format_size(budget)} is too small for propagating "
                      f"{n:,} x {d} features over {nnz:,} entries: use at least {format_size(least)}")


def _printed(nbytes):
    """``nbytes`` rounded up to one decimal of the unit :func:`format_size` prints it in, so that
    the printed figure, read back by ``parse_size``, is still at least ``nbytes``."""
    for scale in (GIB, MIB, KIB):
        if nbytes >= scale:
            return math.ceil(math.ceil(nbytes * 10 / scale) * scale / 10)
    return nbytes


def _sizes(n, d, nnz, index_bytes, weighted, storage_bytes, restrict):
    wb = 4 if weighted else 0
    mask = n if restrict else 0
    convert = d * storage_bytes if storage_bytes != 4 else 0  # a cast copy, per row
    csr = 8 * (n + 1) + (index_bytes + wb) * nnz
    small = NEEDED_ROW * min(n, WINDOW_ROWS) + 2 * KIB
    return wb, mask, convert, csr, small


def _in_memory_bytes(n, d, nnz, index_bytes, weighted, storage_bytes, restrict):
    """The largest phase of the in-memory way, with the smallest output block, and its base."""
    wb, mask, convert, csr, small = _sizes(n, d, nnz, index_bytes, weighted, storage_bytes, restrict)
    hops_base = csr + 4 * n * d + min(PIECE_BYTES, n * convert) + 8 * n + mask + small
    phases = (csr + 16 * n + mask + small,
              hops_base + 2 * (4 * d + convert) * min(n, MIN_BLOCK_ROWS),
              csr + PAGERANK_ROW * n + small)
    return max(phases)


def _fit(n, d, nnz, index_bytes, weighted, storage_bytes, restrict, spare):
    """The plan for ``spare`` bytes of data, or None."""
    wb, mask, convert, csr, small = _sizes(n, d, nnz, index_bytes, weighted, storage_bytes, restrict)
    # In memory: X_k (float32) whole beside the CSR, then the output one block at a time.
    block_row = 2 * (4 * d + convert)  # two output blocks: one computed, one being written
    if _in_memory_bytes(n, d, nnz, index_bytes, weighted, storage_bytes, restrict) <= spare:
        hops_base = csr + 4 * n * d + min(PIECE_BYTES, n * convert) + 8 * n + mask + small
        rows = min(n, max(MIN_BLOCK_ROWS, min(BLOCK_BYTES, spare - hops_base) // block_row))
        return Plan(False, max(1, rows), 0, 0, 0, True)

    # Grid. Scales phase: indptr, float64 degree, float32 scale, needed rows (with a mask per
    # window), and the bucketing buffers: a chunk in, its sorted copy out.
    edge_build = 2 * (index_bytes + wb) + 8
    edge_hop = 8 + wb
    window_row = 4 * d + 4 + 2 + convert  # values, a scale, two masks, a cast copy
    prepare_rows = 20 * n + 2 * mask + small
    pagerank_rows = PAGERANK_ROW * n + small
    hop_rows = mask + 2 * MIN_WINDOW_ROWS * window_row + small
    least = max(prepare_rows + MIN_EDGE_ROWS * edge_build,
                pagerank_rows + MIN_EDGE_ROWS * (index_bytes + wb),
                hop_rows + MIN_EDGE_ROWS * edge_hop)
    if least > spare:
        return None
    edge_rows = min(EDGE_BYTES // edge_build, spare // 8 // edge_build,
                    (spare - prepare_rows) // edge_build,
                    (spare - pagerank_rows) // (index_bytes + wb),
                    (spare - hop_rows) // (2 * edge_hop))  # half of the hop's room for windows
    edge_rows = max(MIN_EDGE_ROWS, min(edge_rows, max(nnz, 1)))
    room = spare - mask - small - edge_rows * edge_hop
    # Each output window reads all of X_k once, so output windows get most of the room (4/5:
    # fewer passes over X_k; paired runs at 600 MiB, 2M x 64, 40M entries: hop 4.3-6.3 s
    # against 7.1-8.3 s with 3/5 on a loaded machine); small source windows gather locally.
    for _ in range(64):  # the bucket offsets grow as windows shrink: make room for them
        out_rows = min(n, LOCAL_ROWS, max(MIN_WINDOW_ROWS, room * 4 // 5 // window_row))
        src_rows = min(n, LOCAL_ROWS, max(MIN_WINDOW_ROWS, (room - out_rows * window_row) // window_row))
        offsets = 8 * -(-n // out_rows) * (-(-n // src_rows) + 1)
        hop = mask + small + edge_rows * edge_hop + (out_rows + src_rows) * window_row + offsets
        room -= max(offsets, hop - spare)
        if hop <= spare:
            whole = csr + pagerank_rows <= spare
            return Plan(True, 0, out_rows, src_rows, edge_rows, whole)
    return None

"""An open-addressing hash table from int64 node ids to dense int32 rows.

Linear probing over ``slots`` entries (about twice the ids, so probes stay short). A slot is
three uint32 words, the key's low and high halves and the row, so that a probe touches one
cache line rather than one in a key array and one in a value array (12 bytes a slot); a row of
``FREE`` marks a free slot. The home slot of a key comes from a multiplicative hash scaled to
``slots`` (multiply-shift), so the table needs no power-of-two size.
"""
import numpy as np
from numba import njit, prange

FREE = np.uint32(0xFFFFFFFF)  # rows stay below 2**31 - 1, so no row is FREE
_MIX = np.uint64(0x9E3779B97F4A7C15)  # 2^64 / golden ratio: spreads clustered ids over the table
_SHIFT32 = np.uint64(32)
_LOW32 = np.uint64(0xFFFFFFFF)


@njit(cache=True, inline="always")
def _home(key, slots):
    mixed = (np.uint64(key) * _MIX) >> _SHIFT32  # high 32 bits: the well-mixed ones
    return np.int64((mixed * np.uint64(slots)) >> _SHIFT32)


@njit(cache=True)
def build_table(ids, table):
    """Insert ``ids[i] -> i`` for every i; return the first row whose id is already in, or -1.

    ids : int64 (n,), read. table : uint32 (slots, 3), filled; n < slots < 2**32. A repeated id
    keeps its first row.
    """
    slots = table.shape[0]
    table[:, 2] = FREE
    repeated = -1
    for i in range(ids.shape[0]):
        key = np.uint64(ids[i])
        low, high = np.uint32(key & _LOW32), np.uint32(key >> _SHIFT32)
        slot = _home(ids[i], slots)
        seen = False
        while table[slot, 2] != FREE:
            if table[slot, 0] == low and table[slot, 1] == high:
                seen = True
                break
            slot += 1
            if slot == slots:
                slot = 0
        if seen:
            if repeated == -1:
                repeated = i
            continue
        table[slot, 0] = low
        table[slot, 1] = high
        table[slot, 2] = np.uint32(i)
    return repeated


@njit(cache=True, parallel=True)
def lookup(query, table, out):
    """Write the row of each queried id, or -1 for an id not in the table; returns the misses.

    query : int64 (e,), read. table : uint32 (slots, 3) from ``build_table``, read.
    out : int32 (e,), filled.
    """
    slots = table.shape[0]
    misses = 0
    for i in prange(query.shape[0]):
        key = np.uint64(query[i])
        low, high = np.uint32(key & _LOW32), np.uint32(key >> _SHIFT32)
        slot = _home(query[i], slots)
        found = -1
        while table[slot, 2] != FREE:
            if table[slot, 0] == low and table[slot, 1] == high:
                found = np.int32(table[slot, 2])
                break
            slot += 1
            if slot == slots:
                slot = 0
        out[i] = found
        if found == -1:
            misses += 1
    return misses

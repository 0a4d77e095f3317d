"""The memory budget: parsing sizes, planning chunks, measuring peak RSS."""
import math
import os
import re
import resource

from .errors import BudgetError, InputError

KIB, MIB, GIB = 1 << 10, 1 << 20, 1 << 30
# What the interpreter, numpy, numba, pyarrow, duckdb and faiss cost before any data is
# touched (measured here: 199 MB after importing every stage), plus room for numba's compiled
# kernels and thread stacks.
FIXED_OVERHEAD = 320 * MIB
DEFAULT_BUDGET = "4GiB"

_UNITS = {"": 1, "b": 1, "k": KIB, "kb": KIB, "kib": KIB, "m": MIB, "mb": MIB, "mib": MIB,
          "g": GIB, "gb": GIB, "gib": GIB, "t": 1 << 40, "tb": 1 << 40, "tib": 1 << 40}


def parse_size(value, option="--memory-budget"):
    """Return a byte count from text with a unit (``4G``, ``512MiB``, ``1.5GB``, ``100B``; binary
    units) or a Python int (bytes, for callers that computed it). Text without a unit is refused:
    ``4`` would otherwise silently mean 4 bytes."""
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        size = int(value)
    else:
        match = re.fullmatch(r"\s*([0-9]*\.?[0-9]+)\s*([a-zA-Z]*)\s*", str(value))
        if not match or match.group(2).lower() not in _UNITS:
            raise InputError(f"{option} {value!r} is not a size: use a K/M/G suffix, e.g. 4G")
        if match.group(2) == "":
            number = float(match.group(1))
            raise InputError(f"{option} {match.group(1)}: give a unit, e.g. {number:.12g}GiB or "
                             f"{number * 1024:.12g}MiB")
        size = int(float(match.group(1)) * _UNITS[match.group(2).lower()])
    if size <= 0:
        raise InputError(f"{option} {value!r} must be positive")
    return size


def format_size(nbytes, up=False):
    """``1.5 GiB`` style text for messages; ``up`` rounds up (for "use at least" figures)."""
    for unit, scale in (("GiB", GIB), ("MiB", MIB), ("KiB", KIB)):
        if nbytes >= scale:
            tenths = nbytes / scale * 10
            return f"{(math.ceil(tenths) if up else round(tenths)) / 10:.1f} {unit}"
    return f"{int(nbytes)} B"


def working_memory(budget, what):
    """Bytes left for data once the fixed overhead is paid; exit 3 if nothing is left."""
    spare = budget - FIXED_OVERHEAD
    if spare < 64 * MIB:
        raise BudgetError(f"--memory-budget {format_size(budget)} is too small for {what}: "
                          f"use at least {format_size(FIXED_OVERHEAD + 64 * MIB, up=True)}")
    return spare


def require(budget, needed, what):
    """Refuse up front when ``needed`` bytes of data do not fit the budget."""
    spare = working_memory(budget, what)
    if needed > spare:
        raise BudgetError(f"--memory-budget {format_size(budget)} is too small for {what}: "
                          f"it needs about {format_size(needed + FIXED_OVERHEAD, up=True)}")


def rows_per_chunk(budget_bytes, bytes_per_row, at_least=1):
    """How many rows of ``bytes_per_row`` fit in ``budget_bytes`` (never fewer than ``at_least``)."""
    return max(int(at_least), int(budget_bytes // max(1, int(bytes_per_row))))


def chunk_ranges(n, rows):
    """Split ``range(n)`` into ``(start, stop)`` pairs of at most ``rows`` rows."""
    rows = max(1, int(rows))
    return [(start, min(n, start + rows)) for start in range(0, n, rows)]


def peak_rss():
    """The process's maximum resident set size so far, in bytes (Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * KIB


def available_threads():
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()

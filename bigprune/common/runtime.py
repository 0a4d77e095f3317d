"""Process-wide settings a stage applies once: thread counts and progress bars."""
import os
import sys
import time

from .errors import InputError
from .memory import available_threads

_QUIET = {"value": False}


def set_threads(threads=None):
    """Give numba and FAISS the same thread count so that pools never oversubscribe the cores.

    Returns the count used. DuckDB takes it per connection (see ``ingest``).
    """
    import faiss
    import numba

    limit = available_threads()
    if threads is None:
        threads = limit
    if int(threads) < 1:
        raise InputError(f"--threads {threads} must be at least 1")
    threads = min(int(threads), numba.config.NUMBA_NUM_THREADS)
    numba.set_num_threads(threads)
    faiss.omp_set_num_threads(threads)
    return threads


def set_quiet(quiet):
    """Silence progress bars for this process (``--quiet``)."""
    _QUIET["value"] = bool(quiet)


class _Silent:
    def update(self, n=1):
        pass

    def set_postfix_str(self, text):
        pass

    def close(self):
        pass

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False


class _Lines(_Silent):
    """For a log: one plain line on stderr when the loop finishes (``desc: N units in S s``)."""

    def __init__(self, desc, unit):
        self.desc, self.unit, self.n, self.started = desc, unit, 0, time.perf_counter()

    def update(self, n=1):
        self.n += n

    def __exit__(self, exc_type, *exc):
        if exc_type is None:
            print(f"{self.desc}: {self.n:,.0f} {self.unit}(s) in {time.perf_counter() - self.started:.1f} s",
                  file=sys.stderr, flush=True)
        return False


class _Nested:
    """Counts the bars open in this process: only the outermost one writes plain lines or stays."""

    depth = 0

    def __init__(self, bar):
        self.bar = bar

    def __enter__(self):
        _Nested.depth += 1
        return self.bar.__enter__()

    def __exit__(self, *exc):
        _Nested.depth -= 1
        return self.bar.__exit__(*exc)


def _columns(stream):
    """The terminal's width, or 0 when it reports none (a pseudo-terminal never sized)."""
    try:
        return os.get_terminal_size(stream.fileno()).columns
    except (OSError, ValueError, AttributeError):
        return 0


def progress(total=None, desc="", unit="it"):
    """Progress of one loop, used as a context manager.

    On a terminal: a tqdm bar (80 x 24 when the terminal reports no size: tqdm reads 0 x 0 as
    no room and draws nothing, which left every stage silent); the outermost bar stays, nested ones vanish when done. When stderr is a log:
    one plain line as the outermost loop finishes. Under ``--quiet``: nothing.
    """
    outer = _Nested.depth == 0
    if _QUIET["value"]:
        return _Silent()
    if not sys.stderr.isatty():
        return _Nested(_Lines(desc, unit) if outer else _Silent())
    from tqdm import tqdm

    sized = _columns(sys.stderr) > 0
    bar = tqdm(total=total, desc=desc, unit=unit, unit_scale=True, leave=outer, file=sys.stderr,
               dynamic_ncols=sized, ncols=None if sized else 80, nrows=None if sized else 24)
    return _Nested(bar)

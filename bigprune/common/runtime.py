"""Process-wide settings a stage applies once: thread counts and progress bars."""
import sys

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


def progress(total=None, desc="", unit="it"):
    """A tqdm bar on a terminal; a do-nothing bar under ``--quiet`` or when stderr is a log."""
    if _QUIET["value"] or not sys.stderr.isatty():
        return _Silent()
    from tqdm import tqdm

    return tqdm(total=total, desc=desc, unit=unit, unit_scale=True, leave=False, dynamic_ncols=True)

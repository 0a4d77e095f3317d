"""bigprune: choose the few labelled nodes worth training a node classifier on.

The Python API mirrors the command line: :func:`ingest`, :func:`propagate`, :func:`select`,
:func:`demo`.
"""
__version__ = "0.1.0"

# Imported on first use, so that ``import bigprune`` (and the CLI's ``--help``) stays light.
_API = {
    "demo": "bigprune.scenario.demo",
    "ingest": "bigprune.ingestion.ingest",
    "propagate": "bigprune.propagation.propagate",
    "select": "bigprune.selection.select",
    "study": "bigprune.learning.study",
    "train": "bigprune.learning.train",
    "run_job": "bigprune.job.job",
}

__all__ = [*_API, "__version__"]


def __getattr__(name):
    if name not in _API:
        raise AttributeError(f"module 'bigprune' has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(_API[name]), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted({*globals(), *_API})

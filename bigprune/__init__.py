"""bigprune: choose the few labelled nodes worth training a node classifier on.

The Python API mirrors the command line: :func:`ingest`, :func:`propagate`, :func:`select`,
:func:`demo`.
"""
__version__ = "0.1.0"

from .demo import demo  # noqa: E402  (the functions shadow their modules' names on purpose)
from .ingest import ingest  # noqa: E402
from .propagate import propagate  # noqa: E402
from .select import select  # noqa: E402

__all__ = ["demo", "ingest", "propagate", "select", "__version__"]

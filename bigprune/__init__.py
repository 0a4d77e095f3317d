"""bigprune: choose the few labelled nodes worth training a node classifier on.

The Python API mirrors the command line: :func:`ingest`, :func:`propagate`, :func:`select`,
:func:`demo`.
"""
__version__ = "0.1.0"

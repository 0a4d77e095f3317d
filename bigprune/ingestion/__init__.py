"""The ingest stage: Parquet edges and nodes into the graph stage of a store."""
from .ingest import ingest

__all__ = ["ingest"]

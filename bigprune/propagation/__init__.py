"""The propagate stage: smoothed feature hops and PageRank from the graph stage."""
from .propagate import propagate

__all__ = ["propagate"]

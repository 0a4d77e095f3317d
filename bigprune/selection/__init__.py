"""The select stage: the rules (k-median, k-means, k-center, hardness, ...) and the selection report."""
from .select import select

__all__ = ["select"]

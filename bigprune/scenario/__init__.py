"""The generated demo: the marketplace scenario and the whole pipeline run on it."""
from .demo import demo

__all__ = ["demo"]

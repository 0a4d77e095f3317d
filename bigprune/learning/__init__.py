"""The proxy model and the study: training, learning curves, power-law fits and the study report."""
from .study import study
from .train import train

__all__ = ["study", "train"]

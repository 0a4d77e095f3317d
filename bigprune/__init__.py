"""bigprune: choose the few labelled nodes worth training a node classifier on."""
__version__ = "0.1.0"

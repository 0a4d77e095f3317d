"""The select stage: strategies, the k-center greedy, hardness scores and the selection report."""
from .select import select

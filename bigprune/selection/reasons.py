"""Why each node is in a selection: the ``reason`` column of the selection table.

``include``: given by ``--include`` (or ``initial``); ``quota``: picked to meet
``--min-per-class`` (a pick the rule would not have made without the quota); ``fill``: picked by
kcenter's farthest-first fill once every target was served; ``rule``: picked by the rule itself.
"""
import numpy as np

INCLUDE, QUOTA, RULE, FILL = "include", "quota", "rule", "fill"
REASONS = (INCLUDE, QUOTA, RULE, FILL)


def reasons(count, included, quota=(), fill=()):
    """Reasons (object array (count,)) of ``count`` picks whose first ``included`` are
    ``include``, those at positions ``quota`` and ``fill`` are so, and the others ``rule``."""
    out = np.full(count, RULE, dtype=object)
    out[:included] = INCLUDE
    out[np.asarray(quota, dtype=np.int64)] = QUOTA
    out[np.asarray(fill, dtype=np.int64)] = FILL
    return out


def forced(klass, deficit):
    """Which picks a greedy made in its quota-forced mode (bool (p,)).

    klass : int64 (p,), the class index of each pick after the included ones, in order.
    deficit : int64 (classes,), picks each class still needed after the included ones.
    The mode of ``kmedian`` and ``kmeans``: once the picks left are no more than the picks the
    short classes still need, only nodes of those classes are taken.
    """
    deficit = np.asarray(deficit, dtype=np.int64).copy()
    short = int(np.maximum(deficit, 0).sum())
    out = np.zeros(len(klass), dtype=bool)
    for i, c in enumerate(np.asarray(klass, dtype=np.int64).tolist()):
        out[i] = len(klass) - i <= short
        short -= int(deficit[c] > 0)
        deficit[c] -= 1
    return out

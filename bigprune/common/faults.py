"""Test-only fault injection: kill this process at a named step of a commit.

``BIGPRUNE_FAULT=<stage>:<point>`` makes the first :func:`fault` call with that stage and point
SIGKILL the process (no ``finally`` block, no cleanup: the same as a kill from outside). Stages:
``graph`` and ``propagate`` (the store's commit), ``select`` and ``study`` (their output files).
Points, in the order a writer reaches them: ``after-temp-write``, ``before-rename``,
``after-rename``, ``before-manifest``. The variable is read once at import; unset, a call is one
comparison with None.
"""
import os
import signal

ENV = "BIGPRUNE_FAULT"
POINTS = ("after-temp-write", "before-rename", "after-rename", "before-manifest")
STAGES = ("graph", "propagate", "select", "study")
_ARMED = os.environ.get(ENV) or None


def fault(stage, point):
    """Die here when ``BIGPRUNE_FAULT`` names ``stage:point``."""
    if _ARMED is not None and _ARMED == f"{stage}:{point}":
        os.kill(os.getpid(), signal.SIGKILL)

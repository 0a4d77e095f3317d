"""Temporary files beside an output: ``.NAME.<pid>.tmp``, renamed over ``NAME`` when complete.

A writer killed before its rename leaves its temporary behind; the next writer in the same
folder removes the temporaries whose process no longer runs (a live writer's are left alone).
"""
import os
from pathlib import Path


def sweep_temps(folder):
    """Remove the temporaries in ``folder`` left by processes that no longer run."""
    folder = Path(folder)
    if not folder.is_dir():
        return
    for tmp in folder.glob(".*.tmp"):
        pid = tmp.name.split(".")[-2]
        if pid.isdigit() and not alive(int(pid)):
            tmp.unlink(missing_ok=True)


def alive(pid):
    """Whether process ``pid`` runs on this host."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True

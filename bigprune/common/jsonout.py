"""Strict JSON for everything bigprune writes or prints: no NaN or Infinity, plain numbers.

Python's ``json`` writes ``NaN`` and ``Infinity`` by default, which strict parsers (RFC 8259,
JavaScript's ``JSON.parse``, ``jq``) refuse. Here a non-finite float becomes ``null`` (callers
add a reason field where the gap matters), numpy scalars and arrays become plain numbers and
lists, paths become text, and ``allow_nan=False`` makes any miss an error, not a bad file.
"""
import json
import math
from pathlib import PurePath

import numpy as np


def plain(value):
    """``value`` with every part a JSON type: finite floats, ints, text, lists, dicts, null."""
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [plain(v) for v in value]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else None
    if isinstance(value, PurePath):
        return str(value)
    return value


def dumps(value, **options):
    """``json.dumps`` of :func:`plain` ``(value)``, refusing anything non-finite left over."""
    return json.dumps(plain(value), allow_nan=False, **options)

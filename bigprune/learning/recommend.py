"""The study's verdicts: the smallest sufficient budget of each rule, the rule that needs the
fewest nodes, and the power-law fits of error against training-set size."""
import math

import numpy as np

from .powerlaw import fit_power_law, smallest_sufficient

BOOTSTRAP = 1000


def recommend(rows, tolerance):
    """The smallest sufficient budget of each rule and the rule that needs the fewest nodes.

    rows : dicts with ``rule``, ``budget``, ``training_nodes``, ``accuracy``, ``per_class``; the
    full pool is the largest ``training_nodes``. A budget is sufficient when its mean accuracy
    over repeats is at least the full pool's mean accuracy minus ``tolerance``; the full pool
    itself does not count, so a rule sufficient only there is not reached (``None``, listed in
    ``not_reached``). Each reached rule names its ``lower_classes``: the classes whose mean
    accuracy there is more than ``tolerance`` below the full pool's. ``best`` has the fewest
    nodes; rules tied on nodes are named in ``tie`` with what broke the tie (the higher mean
    accuracy, then the order the rules were given in).
    """
    pool = max(r["training_nodes"] for r in rows)
    first = rows[0]["rule"]
    full = float(np.mean([r["accuracy"] for r in rows if r["training_nodes"] == pool and r["rule"] == first]))
    full_class = _class_means([r for r in rows if r["training_nodes"] == pool and r["rule"] == first])
    per_rule = {}
    for rule in dict.fromkeys(r["rule"] for r in rows):
        mine = [r for r in rows if r["rule"] == rule and r["training_nodes"] < pool]
        sizes = sorted({r["training_nodes"] for r in mine})
        means = [float(np.mean([r["accuracy"] for r in mine if r["training_nodes"] == n])) for n in sizes]
        enough = smallest_sufficient(np.array(sizes), np.array(means), full, tolerance) if sizes else None
        if enough is None:
            per_rule[rule] = None
            continue
        at = sizes.index(int(enough))
        cells = [r for r in mine if r["training_nodes"] == sizes[at]]
        fills = [r["fill_picks"] for r in cells
                 if not math.isnan(r.get("fill_picks", math.nan))]  # NaN: not recorded
        classes = _class_means(cells)
        lower = [c for c in sorted(full_class, key=int)
                 if c in classes and classes[c] < full_class[c] - tolerance]
        per_rule[rule] = {"budget": cells[0]["budget"], "training_nodes": sizes[at], "accuracy": means[at],
                          "fill_picks": int(round(np.mean(fills))) if fills else 0,
                          "lower_classes": lower, "classes": len(full_class)}
    best, tie = _fewest(per_rule)
    return {"full_accuracy": full, "pool": pool, "tolerance": tolerance, "rules": per_rule,
            "not_reached": [rule for rule, v in per_rule.items() if v is None], "best": best, "tie": tie}


def _class_means(rows):
    """``{class: mean accuracy over rows}`` from the rows' ``per_class``, NaN left out."""
    seen = {}
    for r in rows:
        for c, value in r["per_class"].items():
            if value is not None and not math.isnan(value):
                seen.setdefault(str(c), []).append(value)
    return {c: float(np.mean(v)) for c, v in seen.items()}


def _fewest(per_rule):
    """The reached rule with the fewest training nodes, and the tie it won (None if alone):
    ``{"rules", "broken_by"}``, broken by the higher mean accuracy, then the order given."""
    reached = [(rule, v) for rule, v in per_rule.items() if v is not None]
    if not reached:
        return None, None
    least = min(v["training_nodes"] for _, v in reached)
    tied = [(rule, v) for rule, v in reached if v["training_nodes"] == least]
    top = max(v["accuracy"] for _, v in tied)
    best = next(rule for rule, v in tied if v["accuracy"] == top)  # the first given, on equal accuracy
    if len(tied) == 1:
        return best, None
    equal = sum(v["accuracy"] == top for _, v in tied) > 1
    return best, {"rules": [rule for rule, _ in tied], "training_nodes": least,
                  "broken_by": "order given (equal mean accuracy)" if equal else "higher mean accuracy"}


def fit_rules(rows, bootstrap=BOOTSTRAP):
    """``error ≈ a · n^(-alpha)`` per rule over all its cells (the full pool included)."""
    fits = {}
    for rule in dict.fromkeys(r["rule"] for r in rows):
        mine = [r for r in rows if r["rule"] == rule]
        fits[rule] = fit_power_law([r["training_nodes"] for r in mine], [r["error"] for r in mine],
                                   bootstrap=bootstrap, seed=0)
    return fits

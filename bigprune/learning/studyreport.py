"""The study's outputs: table (Parquet, CSV), fits, plots (PNG) and the report (Markdown, HTML).

The report is built once as a list of blocks and rendered twice, so the Markdown and the
self-contained HTML (plots inlined as base64 PNG) always say the same. Plots need matplotlib
(the ``plot`` extra); without it they are skipped and the report says so.
"""
import base64
import html
import io
import math
import os
from pathlib import Path

import numpy as np

from ..common.jsonout import dumps
from .powerlaw import MIN_BUDGETS

CAUTION = ("A subset that matches the full pool's overall accuracy can still do worse on the "
           "classes and sub-groups it holds few examples of: a rare class or a small community "
           "of the graph may lose many points while the average moves by less than the "
           "tolerance. Read the per-class table below, and check the groups that matter to you, "
           "before training the production model on a pruned set.")
CURVES, PER_CLASS, PREFERENCE = "error_curves.png", "per_class.png", "preference.png"
# What the recommendation says of a rule that is within the tolerance only with the full pool.
NOT_REACHED = "not reached"
# The measures of a ranking's profile (bigprune.selection.report.ranking_profile), as shown.
MEASURES = {"degree": "degree", "pagerank": "PageRank", "homophily": "homophily"}


def write_outputs(out, rows, summary):
    """Write every output of the study under ``out``; return their paths by name."""
    out = Path(out)
    classes = sorted({int(c) for r in rows for c in r["per_class"]})
    table = _columns(rows, classes)
    paths = {"table": out / "table.parquet", "csv": out / "table.csv", "fits": out / "fits.json",
             "summary": out / "study.json", "markdown": out / "report.md", "html": out / "report.html"}
    _atomic(paths["table"], lambda p: _parquet(p, table))
    _atomic(paths["csv"], lambda p: _csv(p, table))
    _atomic(paths["fits"], lambda p: p.write_text(dumps(summary["fits"], indent=2)))
    _atomic(paths["summary"], lambda p: p.write_text(dumps(summary, indent=2)))
    images = _plots(rows, summary, classes)
    for name, png in images.items():
        paths[name.split(".")[0]] = out / name
        _atomic(out / name, lambda p, png=png: p.write_bytes(png))
    blocks = report_blocks(rows, summary, classes, images)
    _atomic(paths["markdown"], lambda p: p.write_text(markdown(blocks)))
    _atomic(paths["html"], lambda p: p.write_text(to_html(blocks)))
    return {name: str(path) for name, path in paths.items()}


# ---- table -------------------------------------------------------------------------------------
def _columns(rows, classes):
    names = ["rule", "budget", "training_nodes", "repeat", "accuracy", "error", "macro_f1"]
    table = {name: [r[name] for r in rows] for name in names}
    for c in classes:
        table[f"acc_class_{c}"] = [r["per_class"].get(str(c), math.nan) for r in rows]
    for name in ("seconds", "coverage_radius", "mean_degree", "fill_picks"):
        table[name] = [r[name] for r in rows]
    table["l2"] = [r.get("l2", math.nan) for r in rows]  # the penalty the cell's proxy used
    return table


def _parquet(path, table):
    import pyarrow as pa
    import pyarrow.parquet as pq

    pq.write_table(pa.table(table), path)


def _csv(path, table):
    import pyarrow as pa
    import pyarrow.csv as pc

    pc.write_csv(pa.table(table), path)


def _atomic(path, write):
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        write(tmp)
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


# ---- summaries the report and plots share -----------------------------------------------------
def curve(rows, rule):
    """(training nodes, mean error) of ``rule`` over repeats, sorted by training nodes."""
    sizes = sorted({r["training_nodes"] for r in rows if r["rule"] == rule})
    return [(n, float(np.mean([r["error"] for r in rows if r["rule"] == rule and r["training_nodes"] == n])))
            for n in sizes]


def per_class_at(rows, rule, nodes, classes):
    """Mean per-class accuracy of ``rule`` at ``nodes`` training nodes, NaN where a class is absent."""
    mine = [r["per_class"] for r in rows if r["rule"] == rule and r["training_nodes"] == nodes]
    return [float(np.mean([m.get(str(c), math.nan) for m in mine])) for c in classes]


# ---- plots -------------------------------------------------------------------------------------
def _plots(rows, summary, classes):
    """PNG bytes by file name."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    rec = summary["recommendation"]
    colours = {rule: f"C{i % 10}" for i, rule in enumerate(summary["fits"])}
    fig = Figure(figsize=(7, 4.8))
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    for rule, fit in summary["fits"].items():
        mine = [r for r in rows if r["rule"] == rule and r["error"] > 0]
        ax.scatter([r["training_nodes"] for r in mine], [r["error"] for r in mine], s=10,
                   alpha=0.35, color=colours[rule])
        n, err = zip(*curve(rows, rule))
        ax.plot(n, err, "o-", color=colours[rule], lw=1.2, ms=4,
                label=f"{rule} (alpha {fit['alpha']:.2f})" if math.isfinite(fit["alpha"]) else rule)
        if math.isfinite(fit["alpha"]):
            grid = np.geomspace(min(n), max(n), 50)
            ax.plot(grid, fit["a"] * grid ** -fit["alpha"], "--", color=colours[rule], lw=0.9)
    ax.axhline(1 - rec["full_accuracy"] + rec["tolerance"], color="grey", ls=":", lw=1,
               label="full pool error + tolerance")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("training nodes")
    ax.set_ylabel("proxy error on held-out nodes")
    ax.set_title("Error against training nodes (dashed: power-law fit)")
    ax.legend(fontsize=8)
    images = {CURVES: _png(fig)}

    shown = [(f"full pool ({rec['pool']:,})", per_class_at(rows, next(iter(summary["fits"])), rec["pool"], classes))]
    for rule, pick in rec["rules"].items():
        if pick is not None:
            shown.append((f"{rule} ({pick['training_nodes']:,})",
                          per_class_at(rows, rule, pick["training_nodes"], classes)))
    fig = Figure(figsize=(max(7, 0.18 * len(classes) * len(shown) + 2), 4.2))
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    width = 0.8 / len(shown)
    for i, (name, values) in enumerate(shown):
        ax.bar(np.arange(len(classes)) + (i - (len(shown) - 1) / 2) * width, values, width, label=name)
    ax.set_xticks(np.arange(len(classes)), [str(c) for c in classes])
    ax.set_xlabel("class")
    ax.set_ylabel("accuracy (recall)")
    ax.set_ylim(0, 1)
    ax.set_title("Per-class accuracy at each rule's recommended budget")
    ax.legend(fontsize=8, loc="lower right")
    images[PER_CLASS] = _png(fig)
    preferences = summary.get("preferences", {}).get("rules")
    if preferences:
        images[PREFERENCE] = _preference_plot(summary["preferences"], Figure, FigureCanvasAgg)
    return images


def _preference_plot(preferences, Figure, FigureCanvasAgg):
    """One panel per measure: each ranking rule's fifths (x) beside the pool (dotted line)."""
    fig = Figure(figsize=(10, 3.4))
    FigureCanvasAgg(fig)
    pool = preferences["pool"] or {}
    for at, (name, title) in enumerate(MEASURES.items()):
        ax = fig.add_subplot(1, len(MEASURES), at + 1)
        for i, (rule, parts) in enumerate(preferences["rules"].items()):
            values = [math.nan if p[name] is None else p[name] for p in parts]
            ax.plot(np.arange(1, len(parts) + 1), values, "o-", color=f"C{i % 10}", lw=1.2, ms=4,
                    label=rule)
        if pool.get(name) is not None:
            ax.axhline(pool[name], color="grey", ls=":", lw=1, label="pool")
        ax.set_xticks(np.arange(1, 6), ["top", "2", "3", "4", "last"])
        ax.set_xlabel("fifth of the ranking")
        ax.set_title(title, fontsize=10)
    ax.legend(fontsize=7)
    return _png(fig)


def _png(fig):
    buffer = io.BytesIO()
    fig.subplots_adjust(left=0.1, right=0.97, bottom=0.12, top=0.92)  # tight_layout costs ~1 s
    fig.savefig(buffer, format="png", dpi=110)
    return buffer.getvalue()


# ---- the report as blocks --------------------------------------------------------------------
def _l2_text(settings, rows):
    """The penalty policy, and which values the cells chose when it was tuned."""
    policy = settings.get("l2_policy")
    if policy is None:  # a summary written before the penalty was tuned
        return f"l2 = {settings['l2']:g}."
    if settings.get("l2") is not None:
        return policy
    chosen = [r["l2"] for r in rows if isinstance(r.get("l2"), float) and not math.isnan(r["l2"])]
    if not chosen:
        return policy
    values, counts = np.unique(chosen, return_counts=True)
    spread = ", ".join(f"{v:g} ({c})" for v, c in sorted(zip(values, counts), key=lambda t: -t[0]))
    return f"{policy} Chosen (rows of the table): {spread}."


def _cluster_text(cells):
    """Where the cells ran, when on a cluster."""
    if not cells.get("cluster"):
        return ""
    workers = cells["workers"]
    return f" Ran on a Dask cluster with {workers} worker{'s' if workers != 1 else ''}."


def report_blocks(rows, summary, classes, images):
    """``[(kind, ...)]`` with kinds h1, h2, p, table (header, rows), img (name, png)."""
    rec, fits, settings = summary["recommendation"], summary["fits"], summary["settings"]
    ev = settings["evaluation"]
    blocks = [("h1", "bigprune study: how many training nodes are enough"),
              ("p", f"Proxy: L2 softmax regression on {settings['embedding']}"
                    f"{', features standardised' if settings.get('standardize') else ''}; "
                    f"{_l2_text(settings, rows)} "
                    f"Training pool: {settings['pool']:,} nodes. Rules cover the {settings['targets']} "
                    f"nodes. Scored on {ev['nodes']:,} held-out nodes ({ev['source']}). "
                    f"Repeats: {settings['repeats']} (seed = repeat; rules that ignore the seed run "
                    f"once). Cells run this time: {summary['cells']['run']}, reused: "
                    f"{summary['cells']['skipped']}.{_cluster_text(summary['cells'])}")]
    blocks.append(("h2", "Recommendation"))
    lines = [f"Full pool accuracy {rec['full_accuracy']:.4f}; a budget is enough when its mean "
             f"accuracy is at least {rec['full_accuracy'] - rec['tolerance']:.4f} "
             f"(tolerance {rec['tolerance']:g})."]
    if rec["best"] is not None:
        best = rec["rules"][rec["best"]]
        lines.append(f"Fewest nodes: {rec['best']} reaches it with {best['training_nodes']:,} "
                     f"training nodes (budget {best['budget']:g}, accuracy {best['accuracy']:.4f}).")
        if best["fill_picks"]:
            lines.append(f"Of those, {best['fill_picks']:,} came from the greedy's farthest-first fill, "
                         "chosen after every target was already served: that part of the subset does "
                         "not follow the targets.")
        lines += recommendation_notes(rec)
    else:
        lines.append("No rule reaches it below the full pool.")
    blocks.append(("p", " ".join(lines)))
    blocks.append(("table", ["rule", "smallest enough budget", "training nodes", "mean accuracy"],
                   [[rule, NOT_REACHED if v is None else f"{v['budget']:g}",
                     "" if v is None else f"{v['training_nodes']:,}",
                     "" if v is None else f"{v['accuracy']:.4f}"] for rule, v in rec["rules"].items()]))

    blocks.append(("h2", "Accuracy by budget"))
    sizes = sorted({r["training_nodes"] for r in rows})
    header = ["rule"] + [f"{n:,}" for n in sizes]
    body = []
    for rule in fits:
        means = {n: 1 - e for n, e in curve(rows, rule)}
        body.append([rule] + [f"{means[n]:.4f}" if n in means else "" for n in sizes])
    blocks.append(("p", "Mean accuracy over repeats; columns are training nodes."))
    blocks.append(("table", header, body))

    blocks.append(("h2", "Power-law fits: error ≈ a · n^(-alpha)"))
    blocks.append(("table", ["rule", "alpha", "95% interval", "a", "R²", "points", "reliable"],
                   [[rule, _num(f["alpha"]), f"{_num(f['alpha_low'])} to {_num(f['alpha_high'])}",
                     _num(f["a"]), _num(f["r2"]), str(f["points"]), _reliable_text(f)]
                    for rule, f in fits.items()]))
    if any(not f.get("reliable", True) for f in fits.values()):
        blocks.append(("p", f"A fit is unreliable from fewer than {MIN_BUDGETS} budgets or when "
                            "its interval of alpha holds 0: do not extrapolate from it."))
    blocks.append(("img", CURVES, images[CURVES], "Error against training nodes, log-log"))

    blocks.append(("h2", "Per-class accuracy at the recommended budget"))
    blocks.append(("p", CAUTION))
    full = per_class_at(rows, next(iter(fits)), rec["pool"], classes)
    header = ["class", "full pool"] + [r for r, v in rec["rules"].items() if v is not None]
    body = []
    for i, c in enumerate(classes):
        line = [str(c), f"{full[i]:.3f}"]
        for rule, v in rec["rules"].items():
            if v is not None:
                value = per_class_at(rows, rule, v["training_nodes"], classes)[i]
                worse = str(c) in v.get("lower_classes", ())
                line.append(f"{value:.3f}" + (" (lower)" if worse else ""))
        body.append(line)
    blocks.append(("table", header, body))
    blocks.append(("p", "\"(lower)\" marks a class more than the tolerance below the full pool."))
    blocks.append(("img", PER_CLASS, images[PER_CLASS], "Per-class accuracy"))

    blocks.append(("h2", "What the subsets look like"))
    diag = summary["diagnostics"]
    pool = diag["pool"] or {}
    blocks.append(("p", "Mean over repeats of the selection reports: degree, PageRank and label "
                        "homophily of the chosen nodes, and the coverage radius (largest L2 "
                        "distance from a target to its nearest chosen node) and mean distance. "
                        f"Whole pool: degree {_num(pool.get('degree'))}, PageRank "
                        f"{_num(pool.get('pagerank'))}, homophily {_num(pool.get('homophily'))}."))
    body = []
    for rule, by_k in diag["rules"].items():
        for k, d in sorted(by_k.items(), key=lambda item: int(item[0])):
            body.append([rule, f"{d['budget']:g}", f"{int(k):,}", _num(d["degree"]), _num(d["pagerank"]),
                         _num(d["homophily"]), _num(d["radius"]), _num(d["mean_distance"])])
    blocks.append(("table", ["rule", "budget", "nodes", "degree", "PageRank", "homophily",
                             "radius", "mean distance"], body))
    return blocks + _preference_blocks(summary.get("preferences"), images)


def _preference_blocks(preferences, images):
    """What each ranking rule prefers, by fifths of its ranking, beside the pool."""
    if not preferences or not preferences["rules"]:
        return []
    pool = preferences["pool"] or {}
    blocks = [("h2", "What each rule prefers"),
              ("p", "Each ranking rule orders the whole pool; the table splits that order into "
                    "fifths (top 20 % first) and gives each fifth's mean degree, PageRank and "
                    "label homophily beside the whole pool's, averaged over the rule's cells. A "
                    "top fifth far below the pool's degree or homophily means the rule reaches "
                    "first for sparse or heterophilous nodes, which small budgets pay for.")]
    header = ["rule", "measure", "top 20 %", "20-40 %", "40-60 %", "60-80 %", "80-100 %", "pool"]
    body = []
    for rule, parts in preferences["rules"].items():
        for name, title in MEASURES.items():
            body.append([rule, title] + [_num(p[name]) for p in parts] + [_num(pool.get(name))])
    blocks.append(("table", header, body))
    return blocks + [("img", PREFERENCE, images[PREFERENCE],
                      "What each rule prefers, by fifths of its ranking")]


def recommendation_notes(rec):
    """Sentences on the recommended rule's weak classes, a tie it won and the rules that never
    reached the tolerance below the full pool."""
    notes = []
    best = rec["rules"][rec["best"]]
    lower = best.get("lower_classes", [])
    if lower:
        notes.append(f"At that budget {len(lower)} of {best['classes']} classes fall more than the "
                     f"tolerance below the full pool: {', '.join(lower)} (see the per-class table).")
    tie = rec.get("tie")
    if tie:
        notes.append(f"Tie: {', '.join(tie['rules'])} each reach it with {tie['training_nodes']:,} "
                     f"nodes; {rec['best']} is named by the {tie['broken_by']}.")
    if rec.get("not_reached"):
        notes.append(f"{NOT_REACHED.capitalize()} below the full pool: {', '.join(rec['not_reached'])}.")
    return notes


def _reliable_text(fit):
    if fit.get("reliable", True):
        return "yes"
    return "no: " + "; ".join(fit["unreliable_because"])


def _num(value):
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "n/a"
    return f"{value:.4g}"


# ---- rendering -------------------------------------------------------------------------------
def markdown(blocks):
    parts = []
    for kind, *rest in blocks:
        if kind == "h1":
            parts.append(f"# {rest[0]}")
        elif kind == "h2":
            parts.append(f"## {rest[0]}")
        elif kind == "p":
            parts.append(rest[0])
        elif kind == "table":
            header, body = rest
            lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
            lines += ["| " + " | ".join(row) + " |" for row in body]
            parts.append("\n".join(lines))
        else:  # img: the PNG sits beside the report
            parts.append(f"![{rest[2]}]({rest[0]})")
    return "\n\n".join(parts) + "\n"


def to_html(blocks):
    body = []
    for kind, *rest in blocks:
        if kind in ("h1", "h2", "p"):
            body.append(f"<{kind}>{html.escape(rest[0])}</{kind}>")
        elif kind == "table":
            header, rows = rest
            head = "".join(f"<th>{html.escape(h)}</th>" for h in header)
            cells = "".join("<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in row) + "</tr>"
                            for row in rows)
            body.append(f"<table><thead><tr>{head}</tr></thead><tbody>{cells}</tbody></table>")
        else:
            data = base64.b64encode(rest[1]).decode("ascii")
            body.append(f'<img alt="{html.escape(rest[2])}" src="data:image/png;base64,{data}">')
    style = ("body{font-family:sans-serif;max-width:60em;margin:2em auto;line-height:1.45}"
             "table{border-collapse:collapse;margin:1em 0}td,th{border:1px solid #ccc;"
             "padding:.25em .6em;text-align:right}td:first-child{text-align:left}img{max-width:100%}")
    return ("<!DOCTYPE html>\n<html><head><meta charset=\"utf-8\"><title>bigprune study</title>"
            f"<style>{style}</style></head><body>\n" + "\n".join(body) + "\n</body></html>\n")

"""The job file (TOML): one place naming inputs, store, budget, stages and outputs.

Its keys and their types are declared as data below and checked once; a wrong key or type gives
one line naming the file, the table and the key. Relative paths are read from the file's folder.

Example::

    store = "store"
    memory_budget = "4GiB"
    threads = 2
    cluster = "scheduler.internal:8786"   # optional: run the stages as Dask tasks (or "local:2")

    [ingest]
    edges = "data/edges"
    nodes = "data/nodes.parquet"

    [propagate]
    hops = 2
    norm = "sym"

    [[select]]
    strategy = "kmedian"
    budget = 0.02                # a float is a fraction of the pool (1.0 = all), an int a count
    out = "selections/kmedian.parquet"

    [study]                      # optional: see bigprune.learning.study
    out = "study"
    strategies = ["kmedian", "random"]
"""
import tomllib
from pathlib import Path

from ..common.errors import InputError
from ..common.memory import DEFAULT_BUDGET, parse_size
from ..common.options import Names, read_budget

# key: (type, required, default); "path" values are resolved against the file's folder.
TOP = {"store": ("path", True, None), "memory_budget": ("size", False, DEFAULT_BUDGET),
       "threads": ("int", False, None), "log": ("path", False, None), "cluster": ("str", False, None)}
# *_col: the input columns to read instead of src, dst, node_id, label and features (see --src-col).
INGEST = {"edges": ("path", True, None), "nodes": ("path", True, None), "features": ("path", False, None),
          "drop_unknown": ("bool", False, False), "src_col": ("str", False, None), "dst_col": ("str", False, None),
          "id_col": ("str", False, None), "label_col": ("str", False, None), "features_col": ("str", False, None)}
PROPAGATE = {"hops": ("int", False, 2), "norm": ("str", False, "sym"), "dtype": ("str", False, "float32"),
             "restrict": ("bool", False, False)}
# keep_previous: start from the selection already at ``out`` (last night's) as the include list.
SELECT = {"strategy": ("str", True, None), "budget": ("number", False, None), "targets": ("str", False, "test"),
          "seed": ("int", False, 0), "out": ("path", True, None), "radius": ("number", False, None),
          "cover": ("number", False, None), "ensemble": ("int", False, None),
          "min_per_class": ("number", False, None), "include": ("path", False, None),
          "exclude": ("path", False, None), "keep_previous": ("bool", False, False)}
STUDY = {"out": ("path", True, None), "budgets": ("numbers", False, [0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1.0]),
         "strategies": ("strs", False, None), "repeats": ("int", False, 3), "answers": ("path", False, None),
         "tolerance": ("number", False, 0.01), "targets": ("str", False, "test")}
TABLES = {"ingest": INGEST, "propagate": PROPAGATE}
LISTS = {"select": SELECT}
OPTIONAL = {"study": STUDY}  # tables that may be absent: job[name] is None then

_CHECKS = {
    "int": lambda v: isinstance(v, int) and not isinstance(v, bool),
    "number": lambda v: isinstance(v, (int, float)) and not isinstance(v, bool),
    "bool": lambda v: isinstance(v, bool),
    "str": lambda v: isinstance(v, str),
    "path": lambda v: isinstance(v, str) and v != "",
    "size": lambda v: isinstance(v, (str, int)) and not isinstance(v, bool),  # int: refused with the units
    "numbers": lambda v: isinstance(v, list) and v != [] and all(_CHECKS["number"](x) for x in v),
    "strs": lambda v: isinstance(v, list) and v != [] and all(isinstance(x, str) for x in v),
}
_WANTED = {"bool": "true or false", "int": "an integer", "number": "a number", "str": "a string", "path": "a path string",
           "size": "a size such as \"4GiB\"",
           "numbers": "a list of numbers", "strs": "a list of strings"}


def load_job(path):
    """Read and check a job file; return a plain dict with defaults filled and paths resolved."""
    path = Path(path)
    try:
        raw = tomllib.loads(path.read_text())
    except FileNotFoundError:
        raise InputError(f"{path}: no such job file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: cannot read the job file ({exc})") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{path}: not valid TOML ({exc})") from None
    base = path.resolve().parent
    known = set(TOP) | set(TABLES) | set(LISTS) | set(OPTIONAL)
    unknown = sorted(set(raw) - known)
    if unknown:
        raise InputError(f"{path}: unknown key {unknown[0]!r} (known: {', '.join(sorted(known))})")
    job = _section(path, "top level", raw, TOP, base, skip=set(TABLES) | set(LISTS) | set(OPTIONAL))
    if "ingest" not in raw:
        raise InputError(f"{path}: missing table [ingest]")
    for name, spec in TABLES.items():
        value = raw.get(name, {})
        if not isinstance(value, dict):
            raise InputError(f"{path}: {name!r} must be a table [{name}]")
        job[name] = _section(path, f"[{name}]", value, spec, base)
    for name, spec in LISTS.items():
        entries = raw.get(name, [])
        if not isinstance(entries, list) or not all(isinstance(e, dict) for e in entries):
            raise InputError(f"{path}: {name!r} must be an array of tables [[{name}]]")
        job[name] = [_section(path, f"[[{name}]] #{i + 1}", e, spec, base) for i, e in enumerate(entries)]
    for name, spec in OPTIONAL.items():
        value = raw.get(name)
        if value is not None and not isinstance(value, dict):
            raise InputError(f"{path}: {name!r} must be a table [{name}]")
        job[name] = None if value is None else _section(path, f"[{name}]", value, spec, base)
    _check_meanings(path, job)
    outs = [entry["out"] for entry in job["select"]]
    if len(set(outs)) != len(outs):
        raise InputError(f"{path}: two [[select]] tables write the same out file")
    job["path"] = str(path)
    return job


def select_names(path, index):
    """How errors name the keys of the ``index``-th (from 0) ``[[select]]`` table."""
    return Names(f"{path}: [[select]] #{index + 1}:")


def study_names(path):
    """How errors name the keys of the ``[study]`` table."""
    return Names(f"{path}: [study]:")


def _check_meanings(path, job):
    """Values whose meaning needs no data: the memory budget's unit and every budget's rule
    (a TOML float is a fraction in (0, 1], an int a count)."""
    parse_size(str(job["memory_budget"]), f"{path}: top level: memory_budget =")
    if job["cluster"] is not None:
        from ..cluster.connect import parse_address

        parse_address(job["cluster"], f"{path}: top level: cluster =")
    for index, entry in enumerate(job["select"]):
        names = select_names(path, index)
        for key in ("budget", "min_per_class"):
            if entry[key] is not None:
                read_budget(entry[key], key, names)
    if job["study"] is not None:
        from ..learning.study import parse_budgets

        parse_budgets(job["study"]["budgets"], study_names(path))


def _section(path, where, values, spec, base, skip=()):
    unknown = sorted(set(values) - set(spec) - set(skip))
    if unknown:
        raise InputError(f"{path}: {where}: unknown key {unknown[0]!r} (known: {', '.join(sorted(spec))})")
    out = {}
    for key, (kind, required, default) in spec.items():
        if key not in values:
            if required:
                raise InputError(f"{path}: {where}: missing key {key!r}")
            out[key] = default
            continue
        value = values[key]
        if not _CHECKS[kind](value):
            raise InputError(f"{path}: {where}: {key} = {value!r} should be {_WANTED[kind]}")
        out[key] = str(base / value) if kind == "path" else value
    return out

"""Class names: string labels become class ids (sorted name order) at ingest; reports show both."""
import numpy as np
import pyarrow as pa


def class_table(names):
    """The graph stage's ``classes`` table: ``label`` (the class id) and ``name``, in id order."""
    return pa.table({"label": pa.array(np.arange(len(names), dtype=np.int64)), "name": pa.array(names, pa.string())})


def class_names(store):
    """``{"id": name}`` for a store ingested with string labels (string keys, as in the reports'
    class counts and per-class accuracy), or None when the labels were class ids already."""
    if not (store.stage_dir("graph") / "classes.parquet").exists():
        return None
    table = store.table("graph", "classes")
    return {str(i): name for i, name in zip(table.column("label").to_pylist(), table.column("name").to_pylist())}

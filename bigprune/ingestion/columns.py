"""Which input columns hold the ids, endpoints, labels and features (``--src-col`` and friends)."""
from typing import NamedTuple


class Columns(NamedTuple):
    """Column names in the user's Parquet inputs; the defaults are the names the README gives."""

    src: str = "src"
    dst: str = "dst"
    node_id: str = "node_id"
    label: str = "label"
    features: str = "features"

    def renamed(self):
        """Only the names that differ from the defaults (``{}`` for the defaults): the stage's
        parameters, so that a store ingested under the default names keeps the same manifest."""
        return {field: name for field, name in self._asdict().items() if name != Columns._field_defaults[field]}


def columns(src=None, dst=None, node_id=None, label=None, features=None):
    """A :class:`Columns` with ``None`` meaning the default name."""
    given = {"src": src, "dst": dst, "node_id": node_id, "label": label, "features": features}
    return Columns(**{field: name for field, name in given.items() if name is not None})

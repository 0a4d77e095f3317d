"""Finding and opening the user's Parquet inputs, with one-line errors that name the file."""
import glob
import os
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from .errors import InputError


def edge_files(spec):
    """The Parquet files named by ``--edges``: a file, a directory (recursive) or a glob."""
    path = Path(spec)
    if path.is_dir():
        files = sorted(p for p in path.rglob("*") if p.is_file() and not p.name.startswith((".", "_")))
        if not files:
            raise InputError(f"--edges {spec}: directory holds no files")
    elif path.exists():
        files = [regular_file(path, "--edges")]
    elif glob.has_magic(str(spec)):
        files = sorted(Path(p) for p in glob.glob(str(spec), recursive=True) if os.path.isfile(p))
        if not files:
            raise InputError(f"--edges {spec}: the pattern matches no files")
    else:
        raise InputError(f"--edges {spec}: no such file or directory")
    return files


def regular_file(path, option):
    """``path`` if it is a regular file; a FIFO or device would block or never end when read."""
    path = Path(path)
    if not path.exists():
        raise InputError(f"{option} {path}: no such file")
    if not path.is_file():
        raise InputError(f"{option} {path}: not a regular file (a directory, FIFO or device); "
                         "give a file")
    return path


def open_parquet(path, option):
    """A ``pyarrow.parquet.ParquetFile``, or an error naming the file and why it is unusable."""
    try:
        return pq.ParquetFile(path)
    except PermissionError:
        raise InputError(f"{option} {path}: permission denied") from None
    except (OSError, pa.ArrowException) as exc:
        raise InputError(f"{option} {path}: not a readable Parquet file ({_reason(exc)})") from None


def read_error(path, option, exc):
    """The error for a Parquet file whose footer opens but whose pages do not decode."""
    return InputError(f"{option} {path}: cannot be read, the file is damaged ({_reason(exc)})")


def first_damaged(files, columns, option):
    """The error for the first file in ``files`` with a row group that fails to decode, or None.

    Used only after a scan failed, to name the file; reads one row group at a time.
    """
    for path in files:
        file = open_parquet(path, option)
        for group in range(file.num_row_groups):
            try:
                file.read_row_group(group, columns=columns)
            except (OSError, pa.ArrowException) as exc:
                return read_error(path, option, exc)
    return None


def _reason(exc):
    return str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__


def id_kind(arrow_type):
    """``"int"``, ``"string"`` or None for an Arrow type usable as a node id."""
    if pa.types.is_dictionary(arrow_type):
        arrow_type = arrow_type.value_type
    if pa.types.is_integer(arrow_type):
        return "int"
    if pa.types.is_string(arrow_type) or pa.types.is_large_string(arrow_type):
        return "string"
    return None


def is_numeric(arrow_type):
    return pa.types.is_integer(arrow_type) or pa.types.is_floating(arrow_type)

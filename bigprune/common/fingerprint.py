"""Input fingerprints: what a stage read, cheap enough to compute every night."""
import hashlib
import json
import struct
from pathlib import Path

FOOTER_TAIL = 8  # a Parquet file ends with a 4-byte footer length and the magic "PAR1"


def file_fingerprint(path):
    """Size, modification time and a hash of the Parquet footer (or of a small file's bytes).

    The footer holds the schema, row counts and column statistics, so a rewritten partition
    changes it even when size and time are kept.
    """
    path = Path(path)
    stat = path.stat()
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        fh.seek(max(0, stat.st_size - FOOTER_TAIL))
        tail = fh.read(FOOTER_TAIL)
        if len(tail) == FOOTER_TAIL and tail[4:] == b"PAR1":
            fh.seek(max(0, stat.st_size - FOOTER_TAIL - struct.unpack("<I", tail[:4])[0]))
            digest.update(fh.read())
        else:  # not Parquet (an .npy, say): its first MiB with size and time
            fh.seek(0)
            digest.update(fh.read(1 << 20))
    return {"path": str(path), "bytes": stat.st_size, "mtime": stat.st_mtime, "sha256": digest.hexdigest()[:32]}


def fingerprints(paths):
    return [file_fingerprint(p) for p in paths]


def key(*parts):
    """A short stable hash of JSON-able parts (parameters, fingerprints, upstream keys)."""
    text = json.dumps(parts, sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:24]

"""The on-disk store: one directory, plain ``.npy`` arrays and Parquet tables, a JSON manifest.

Each stage writes into a staging directory and commits by renaming it to ``<stage>-<token>``
and then replacing ``manifest.json`` atomically; the manifest is the single commit point, so a
stage that dies leaves the store exactly as it was.

Readers against a committing writer. A reader (``select``, ``train``, ``study``: see
:meth:`Store.reading`) holds a shared ``flock`` on the store directory itself and reads the
manifest once, after taking it; every stage directory it opens comes from that one manifest
(pinned), so it never mixes two commits. A commit renames its new directory in and replaces the
manifest without waiting: a reader that pinned the old manifest still finds the old directories.
Only removing the superseded directories could pull data away from a reader, so the writer does
that under an exclusive ``flock`` taken without blocking; while any reader holds the store the
removal is deferred, and the directories (named by no manifest) are removed by the next locked
writer that finds no reader. Deferring rather than waiting keeps a nightly job from stalling
behind an hours-long study; the lock is on the directory, so a reader writes nothing (and works
on a read-only store). ``status`` reads only ``manifest.json``, replaced atomically, so it sees
one commit without a lock. Locks are advisory and local: a store on a network filesystem
without ``flock`` support is not protected.
"""
import fcntl
import functools
import json
import os
import shutil
import socket
import time
import uuid
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from .. import __version__
from .errors import InputError, LockedError
from .faults import fault
from .memory import peak_rss
from .tempfiles import alive as _alive, sweep_temps

FORMAT_VERSION = 1
MANIFEST = "manifest.json"
STAGING = ".staging"
LOCK = ".lock"
_HELD = set()  # stores this process has locked (a locked job calls locked stages)
# A committed stage makes the stages computed from it stale: they are dropped on commit.
DOWNSTREAM = {"graph": ("propagate",), "propagate": ()}
RUN_HINT = {"graph": "bigprune ingest", "propagate": "bigprune propagate"}


class Store:
    """A store directory; ``Store(path)`` opens it without touching the disk."""

    def __init__(self, path, manifest=None):
        """``manifest``: a manifest pinned by a reader that holds this store (see :meth:`reading`)."""
        self.path = Path(path)
        self._pinned = manifest

    # ---- reading ---------------------------------------------------------------------------
    @contextmanager
    def reading(self):
        """Hold the store for reading: a shared lock, and the manifest read once and pinned.

        Inside, :meth:`manifest` (so :meth:`entry`, :meth:`stage_dir`, :meth:`load`) returns the
        pinned manifest, and no writer removes a directory it names. Nested use keeps the pin.
        """
        if self._pinned is not None:
            yield self
            return
        held = _share(self.path)
        try:
            self._pinned = self.manifest()
            yield self
        finally:
            self._pinned = None
            if held is not None:
                os.close(held)

    def manifest(self):
        """The committed manifest (an empty one for a store that does not exist yet)."""
        if self._pinned is not None:
            return self._pinned
        file = self.path / MANIFEST
        if not file.exists():
            return {"format_version": FORMAT_VERSION, "stages": {}}
        try:
            manifest = json.loads(file.read_text())
        except (OSError, ValueError) as exc:
            raise InputError(f"{file}: not a readable bigprune manifest ({exc})") from None
        version = manifest.get("format_version")
        if not isinstance(version, int) or version > FORMAT_VERSION:
            raise InputError(f"{file}: store format version {version!r} is newer than this "
                             f"bigprune understands ({FORMAT_VERSION}); upgrade bigprune")
        return manifest

    def entry(self, stage):
        """The manifest entry of a committed stage; a clear error naming the command otherwise."""
        if not self.path.is_dir():
            raise InputError(f"--store {self.path}: no such store; create it with bigprune ingest")
        entry = self.manifest()["stages"].get(stage)
        if entry is None:
            raise InputError(f"--store {self.path}: has no {stage} stage yet; run {RUN_HINT[stage]} first")
        return entry

    def stage_dir(self, stage):
        return self.path / self.entry(stage)["dir"]

    def load(self, stage, name, mmap=True):
        """Array ``name`` of a committed stage, memory-mapped read-only by default."""
        return np.load(self.stage_dir(stage) / f"{name}.npy", mmap_mode="r" if mmap else None)

    def table(self, stage, name):
        import pyarrow.parquet as pq

        return pq.read_table(self.stage_dir(stage) / f"{name}.parquet")

    # ---- writing ---------------------------------------------------------------------------
    @contextmanager
    def locked(self):
        """Hold the store's lock: a second run on the same store is refused with a clear line.

        A lock left by a process that no longer runs on this host is taken over.
        """
        key = str(self.path.resolve())
        if key in _HELD:
            yield self
            return
        if self.path.exists() and not self.path.is_dir():
            raise InputError(f"--store {self.path}: exists and is not a directory")
        created = not self.path.exists()
        self.path.mkdir(parents=True, exist_ok=True)
        lock = self.path / LOCK
        _take_lock(lock)
        _HELD.add(key)
        try:
            yield self
        finally:
            _HELD.discard(key)
            lock.unlink(missing_ok=True)
            if created:
                _remove_if_empty(self.path)

    def record_output(self, path, key):
        """Note in the manifest that ``path`` was written for job key ``key``."""
        manifest = self.manifest()
        manifest.setdefault("outputs", {})[str(Path(path).resolve())] = {
            "key": key, "bytes": Path(path).stat().st_size,
            "committed_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())}
        _write_json_atomic(self.path / MANIFEST, manifest)

    def begin(self, stage, params, inputs=None):
        """A :class:`StageWriter` for ``stage``; use it as a context manager."""
        return StageWriter(self, stage, params, inputs or {})


def reads_store(function):
    """Run ``function(store, ...)`` inside ``store.reading()`` (``store`` a path or a Store)."""
    @functools.wraps(function)
    def wrapper(store, *args, **kwargs):
        store = store if isinstance(store, Store) else Store(store)
        with store.reading():
            return function(store, *args, **kwargs)
    return wrapper


class StageWriter:
    """Collects one stage's outputs in a staging directory and commits them on success."""

    def __init__(self, store, stage, params, inputs):
        self.store, self.stage, self.params, self.inputs = store, stage, params, inputs
        self.info = {}
        self._created_store = False
        self.path = None

    def __enter__(self):
        root = self.store.path
        if root.exists() and not root.is_dir():
            raise InputError(f"--store {root}: exists and is not a directory")
        if not root.exists():
            root.mkdir(parents=True)
            self._created_store = True
        manifest = self.store.manifest()  # refuse a store of a newer format before writing anything
        _sweep_staging(root / STAGING)
        if str(root.resolve()) in _HELD:
            _remove_unread(root, _orphans(root, manifest))
        token = f"{self.stage}-{os.getpid()}-{uuid.uuid4().hex[:8]}"
        self.path = root / STAGING / token
        self.path.mkdir(parents=True)
        self._started = time.time()
        return self

    def array(self, name, shape, dtype):
        """A writeable ``.npy`` memory map to fill in place."""
        path = self.path / f"{name}.npy"
        out = np.lib.format.open_memmap(path, mode="w+", dtype=dtype, shape=tuple(int(s) for s in shape))
        # On a full disk, writing a page of a sparse mapped file kills the process with SIGBUS.
        with open(path, "r+b") as fh:
            _reserve(fh, os.fstat(fh.fileno()).st_size, path)
        return out

    def save(self, name, values):
        values = np.ascontiguousarray(values)
        path = self.path / f"{name}.npy"
        with open(path, "wb") as fh:
            # On a full disk np.save reports a short write without an errno. (Header <= 4 KiB.)
            _reserve(fh, values.nbytes + 4096, path)
            np.save(fh, values)
            fh.truncate()

    def write_table(self, name, table):
        import pyarrow.parquet as pq

        pq.write_table(table, self.path / f"{name}.parquet")

    def scratch(self):
        """A directory for temporary files (DuckDB spill); removed at commit or failure."""
        path = self.path / "scratch"
        path.mkdir(exist_ok=True)
        return path

    def __exit__(self, exc_type, exc, tb):
        root = self.store.path
        if exc_type is not None:
            shutil.rmtree(self.path, ignore_errors=True)
            _remove_if_empty(root / STAGING)
            if self._created_store:
                shutil.rmtree(root, ignore_errors=True)
            return False
        shutil.rmtree(self.path / "scratch", ignore_errors=True)
        self._commit()
        return False

    def _commit(self):
        root = self.store.path
        manifest = self.store.manifest()
        final = self.path.name.split("-", 1)[0] + "-" + uuid.uuid4().hex[:12]
        fault(self.stage, "after-temp-write")
        artifacts = {p.stem: _describe(p) for p in sorted(self.path.iterdir())}
        _fsync_tree(self.path)
        fault(self.stage, "before-rename")
        os.rename(self.path, root / final)
        fault(self.stage, "after-rename")
        stages = manifest["stages"]
        stale = [stages.pop(s)["dir"] for s in (self.stage, *DOWNSTREAM[self.stage]) if s in stages]
        stages[self.stage] = {
            "dir": final,
            "params": self.params,
            "inputs": self.inputs,
            "artifacts": artifacts,
            "info": self.info,
            "tool_version": __version__,
            "committed_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "seconds": round(time.time() - self._started, 3),
            "peak_rss": peak_rss(),
        }
        manifest["format_version"] = FORMAT_VERSION
        fault(self.stage, "before-manifest")
        try:
            _write_json_atomic(root / MANIFEST, manifest)
        except OSError:  # not committed after all (disk full): leave no orphan directory
            shutil.rmtree(root / final, ignore_errors=True)
            raise
        held = str(root.resolve()) in _HELD
        _remove_unread(root, _orphans(root, manifest) if held else stale)
        _remove_if_empty(root / STAGING)


def _take_lock(lock):
    me = f"{os.getpid()} {socket.gethostname()}"
    for _ in range(2):
        try:
            fd = os.open(lock, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            try:
                pid, host = lock.read_text().split(" ", 1)
            except (OSError, ValueError):
                pid, host = "0", socket.gethostname()
            if host.strip() == socket.gethostname() and not _alive(int(pid)):
                lock.unlink(missing_ok=True)  # stale: its process is gone
                continue
            raise LockedError(f"--store {lock.parent}: in use by process {pid} on {host.strip()} "
                             f"(lock file {lock}); wait for it to finish") from None
        try:
            with os.fdopen(fd, "w") as fh:
                fh.write(me)
        except OSError:  # an empty lock file would read as held by process 0 forever
            lock.unlink(missing_ok=True)
            raise
        return
    raise InputError(f"--store {lock.parent}: could not take the lock {lock}")


def _reserve(fh, nbytes, path):
    """Allocate the first ``nbytes`` of open file ``fh`` now: a full disk fails here with ENOSPC."""
    try:
        os.posix_fallocate(fh.fileno(), 0, nbytes)
    except OSError as exc:
        raise OSError(exc.errno, exc.strerror, str(path)) from None


def _describe(path):
    if path.suffix == ".npy":
        arr = np.load(path, mmap_mode="r")
        return {"file": path.name, "shape": list(arr.shape), "dtype": str(arr.dtype)}
    return {"file": path.name, "bytes": path.stat().st_size}


def _write_json_atomic(path, payload):
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        with open(tmp, "w") as fh:
            json.dump(payload, fh, indent=2, sort_keys=True)
            fh.flush()
            os.fsync(fh.fileno())
    except OSError:
        tmp.unlink(missing_ok=True)
        raise
    os.replace(tmp, path)


def _fsync_tree(path):
    for file in path.iterdir():
        if file.is_file():
            with open(file, "rb") as fh:
                os.fsync(fh.fileno())


def _sweep_staging(staging):
    """Remove staging directories (and manifest temporaries) left by processes that no longer run."""
    sweep_temps(staging.parent)
    if not staging.is_dir():
        return
    for leftover in staging.iterdir():
        parts = leftover.name.split("-")
        pid = int(parts[1]) if len(parts) > 2 and parts[1].isdigit() else None
        if pid is None or not _alive(pid):
            shutil.rmtree(leftover, ignore_errors=True)


def _orphans(root, manifest):
    """Stage directories the manifest does not name: superseded ones whose removal was deferred,
    or left by a process killed between renaming its stage in and committing the manifest.
    Only the lock holder may remove them (another writer's may not be committed yet)."""
    named = {entry["dir"] for entry in manifest["stages"].values()}
    found = []
    for path in root.iterdir():
        stage, _, token = path.name.partition("-")
        if (path.is_dir() and stage in DOWNSTREAM and len(token) == 12 and path.name not in named):
            found.append(path.name)
    return found


def _share(root):
    """A descriptor holding a shared flock on directory ``root`` (None when it does not exist).

    Blocks only while a writer removes superseded stage directories."""
    try:
        fd = os.open(root, os.O_RDONLY | os.O_DIRECTORY)
    except (FileNotFoundError, NotADirectoryError):
        return None
    try:
        fcntl.flock(fd, fcntl.LOCK_SH)
    except BaseException:
        os.close(fd)
        raise
    return fd


def _remove_unread(root, names):
    """Remove stage directories ``names`` of ``root`` unless a reader holds the store (then
    leave them for a later writer): never waits."""
    if not names:
        return
    fd = os.open(root, os.O_RDONLY | os.O_DIRECTORY)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            return  # a reader may have pinned one of them
        for name in names:
            shutil.rmtree(root / name, ignore_errors=True)
    finally:
        os.close(fd)


def _remove_if_empty(path):
    try:
        path.rmdir()
    except OSError:
        pass

"""The store layer: the only module that touches store directories.

A store is a directory (a disk's mount point, or a remote mount) laid out as::

    <store>/shoal-store.json                  the label: ties the store to its pool
    <store>/shards/<id[:2]>/<id>.<stripe>.<version>.<shard>.shd
    <store>/catalog/<name>                    small named files (catalog mirrors)

Contracts:

* Every public method of ``Store`` is async. Its blocking part runs in a
  worker thread behind the store's own ``trio.CapacityLimiter`` and under the
  store's deadline, which covers waiting for a thread as well as the I/O.
  Past the deadline the call raises ``StoreStalled`` and the thread is
  abandoned.
* OS errors map to ``StoreFull`` (ENOSPC, EDQUOT), ``ShardMissing`` (ENOENT
  when reading) and ``StoreUnavailable`` (anything else), with the OSError as
  ``__cause__``. Bad arguments (an invalid catalog file name, say) are
  programming errors and raise ``ValueError``.
* ``put`` is atomic and durable on return: a reader sees the old state or the
  whole new file, never part of one, and after a crash at most a temporary
  file is left (``list_temp`` / ``remove_temp`` clean those up).
* ``put`` never creates ``shards/`` itself, only the fan-out directory below
  it. ``write_label`` creates the layout; a missing ``shards/`` therefore
  means "not this store" (most often a disk that is not mounted), so shards
  never land on the root filesystem under an empty mount point.
* The label helpers are plain functions (``shoal init`` calls them from a
  thread) and are also offered async on ``Store``.
"""
from __future__ import annotations

import errno
import functools
import json
import math
import os
import re
import secrets
import stat
import time
import uuid
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

import trio

from .errors import (
    ShardCorrupt, ShardError, ShardMissing, ShoalError, StoreError, StoreForeign, StoreFull, StoreStalled,
    StoreUnavailable, StoreUnlabelled,
)
from .stats import Histogram, HistogramSnapshot

__all__ = [
    "LABEL_NAME", "LABEL_FORMAT", "Label", "read_label", "write_label", "check_label",
    "same_device_as_parent", "is_empty_dir", "ShardName", "SpaceInfo", "ProbeResult",
    "StoreStats", "FileOps", "Store",
]

T = TypeVar("T")

LABEL_NAME = "shoal-store.json"
LABEL_FORMAT = 1
SHARDS_DIR = "shards"
CATALOG_DIR = "catalog"
_LABEL_MAX = 64 * 1024  # a label is a few hundred bytes; anything bigger is not ours
_IOV_MAX = os.sysconf("SC_IOV_MAX") if hasattr(os, "sysconf") else 1024
_COPY_CHUNK = 1 << 20
_HEX32 = re.compile(r"[0-9a-f]{32}")
_POOL_NAME = re.compile(r"[A-Za-z0-9._-]{1,64}")
_FILE_NAME = re.compile(r"[A-Za-z0-9_-][A-Za-z0-9._-]{0,127}")
# Temporary files: writes in progress (".tmp-") and probes (".probe-").
_TEMP_BASE = re.compile(r"\.(?:tmp|probe)-[0-9a-f]{16}")
_TEMP_REL = re.compile(r"(?:shards/[0-9a-f]{2}/|catalog/)?\.(?:tmp|probe)-[0-9a-f]{16}")
_UNMOUNTED_HINT = ("if this is a disk's mount point, the disk is probably not mounted; "
                   "run `shoal init` only for a new empty store")


# ---------------------------------------------------------------- labels

@dataclass(frozen=True, kw_only=True)
class Label:
    """What ties a store to its pool. Validates itself when built."""

    format: int = LABEL_FORMAT
    pool_id: str
    pool_name: str
    store_id: str
    created: float  # unix time
    replaces: str | None = None  # the store_id this store took over from, if any

    def __post_init__(self) -> None:
        if self.format != LABEL_FORMAT or isinstance(self.format, bool):
            raise ValueError(f"label format {self.format!r} is not {LABEL_FORMAT} (written by a newer version?)")
        for key in ("pool_id", "store_id"):
            v = getattr(self, key)
            if not isinstance(v, str) or not _HEX32.fullmatch(v):
                raise ValueError(f"{key} {v!r} is not 32 lower-case hex digits")
        if self.replaces is not None and (not isinstance(self.replaces, str) or not _HEX32.fullmatch(self.replaces)):
            raise ValueError(f"replaces {self.replaces!r} is not 32 lower-case hex digits")
        if not isinstance(self.pool_name, str) or not _POOL_NAME.fullmatch(self.pool_name):
            raise ValueError(f"pool_name {self.pool_name!r} is not 1-64 letters, digits, '.', '_' or '-'")
        if isinstance(self.created, bool) or not isinstance(self.created, (int, float)) \
                or not math.isfinite(self.created) or self.created < 0:
            raise ValueError(f"created {self.created!r} is not a unix time")

    @classmethod
    def new(cls, *, pool_id: str, pool_name: str, replaces: str | None = None) -> Label:
        """A label for a new store: a fresh random store_id, created now."""
        return cls(pool_id=pool_id, pool_name=pool_name, store_id=uuid.uuid4().hex,
                   created=time.time(), replaces=replaces)

    def to_json(self) -> bytes:
        d = {"format": self.format, "pool_id": self.pool_id, "pool_name": self.pool_name,
             "store_id": self.store_id, "created": float(self.created), "replaces": self.replaces}
        return (json.dumps(d, indent=2, sort_keys=True) + "\n").encode()

    @classmethod
    def from_json(cls, raw: bytes) -> Label:
        """Raises ValueError if raw is not a well-formed label."""
        try:
            d = json.loads(raw.decode("utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError) as e:
            raise ValueError(f"not JSON ({e})") from None
        if not isinstance(d, dict):
            raise ValueError("not a JSON object")
        missing = {"format", "pool_id", "pool_name", "store_id", "created"} - d.keys()
        if missing:
            raise ValueError(f"missing {', '.join(sorted(missing))}")
        return cls(format=d["format"], pool_id=d["pool_id"], pool_name=d["pool_name"],
                   store_id=d["store_id"], created=d["created"], replaces=d.get("replaces"))


def _require_dir(path: Path) -> None:
    """StoreUnavailable unless path is a directory we can list."""
    try:
        st = os.stat(path)
    except FileNotFoundError as e:
        raise StoreUnavailable(str(path), "directory does not exist") from e
    except OSError as e:
        raise StoreUnavailable(str(path), f"cannot stat the directory: {e.strerror}") from e
    if not stat.S_ISDIR(st.st_mode):
        raise StoreUnavailable(str(path), "is not a directory")
    try:
        with os.scandir(path):
            pass
    except OSError as e:
        raise StoreUnavailable(str(path), f"cannot list the directory: {e.strerror}") from e


def read_label(path: str | os.PathLike) -> Label | None:
    """The store's label, or None if the directory holds none.

    Raises StoreUnavailable if the directory is missing or unreadable, or the
    label is corrupt, oversized, not a regular file or from a newer format.
    """
    p = Path(path)
    lp = p / LABEL_NAME
    try:
        fd = os.open(lp, os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | os.O_CLOEXEC)
    except FileNotFoundError:
        _require_dir(p)  # "no label" only if the directory itself is there
        return None
    except OSError as e:
        raise StoreUnavailable(str(p), f"cannot open the label {LABEL_NAME}: {e.strerror}") from e
    try:
        st = os.fstat(fd)
        if not stat.S_ISREG(st.st_mode):
            raise StoreUnavailable(str(p), f"the label {LABEL_NAME} is not a regular file")
        raw = _read_upto(fd, _LABEL_MAX + 1)
    except OSError as e:
        raise StoreUnavailable(str(p), f"cannot read the label {LABEL_NAME}: {e.strerror}") from e
    finally:
        os.close(fd)
    if len(raw) > _LABEL_MAX:
        raise StoreUnavailable(str(p), f"the label {LABEL_NAME} is larger than {_LABEL_MAX} bytes: not a store label")
    try:
        return Label.from_json(raw)
    except ValueError as e:
        raise StoreUnavailable(str(p), f"the label {LABEL_NAME} is corrupt: {e}") from e


def write_label(path: str | os.PathLike, label: Label, *, fsops: FileOps | None = None) -> None:
    """Create the store layout (shards/, catalog/) and write the label atomically.

    The layout comes first, so a label always implies the layout. Replaces an
    existing label: deciding whether that is allowed is the caller's job.
    Raises StoreFull or StoreUnavailable.
    """
    p = Path(path)
    ops = fsops or FileOps()
    _require_dir(p)
    try:
        for sub in (SHARDS_DIR, CATALOG_DIR):
            try:
                ops.mkdir(str(p / sub))
            except FileExistsError:
                pass
        _atomic_write(ops, str(p), LABEL_NAME, [[label.to_json()]])
    except OSError as e:
        raise _map_os_error(str(p), "write the label", e, missing=StoreUnavailable) from e


def check_label(path: str | os.PathLike, pool_id: str, store_id: str | None = None) -> Label:
    """The label, if it says this store belongs to pool_id (and is store_id).

    Never writes. Raises StoreUnavailable (directory missing, not a
    directory, unreadable, corrupt label, other store_id), StoreUnlabelled
    (no label) or StoreForeign (another pool's label).
    """
    p = Path(path)
    _require_dir(p)
    label = read_label(p)
    if label is None:
        why = f"has no label {LABEL_NAME}"
        try:
            if same_device_as_parent(p):
                why += " and lies on the same filesystem as its parent directory"
        except OSError:
            pass
        raise StoreUnlabelled(str(p), f"{why}; {_UNMOUNTED_HINT}")
    if label.pool_id != pool_id:
        raise StoreForeign(str(p), f"belongs to another pool, {label.pool_name!r} ({label.pool_id}), "
                                   f"not this one ({pool_id}); it is never written")
    if store_id is not None and label.store_id != store_id:
        raise StoreUnavailable(str(p), f"its label names store {label.store_id}, but {store_id} was expected here "
                                       "(was a disk swapped or a path changed?)")
    return label


def same_device_as_parent(path: str | os.PathLike) -> bool:
    """True if path is on the same filesystem as its parent: probably an
    unmounted mount point (a mounted one has its own st_dev). Raises OSError."""
    return os.stat(path).st_dev == os.stat(os.path.join(path, "..")).st_dev


def is_empty_dir(path: str | os.PathLike) -> bool:
    """True if the directory holds nothing but, perhaps, a lost+found directory."""
    with os.scandir(path) as it:
        for e in it:
            if e.name == "lost+found" and e.is_dir(follow_symlinks=False):
                continue
            return False
    return True


# ---------------------------------------------------------------- names and results

# Decimal without leading zeros, so a name has one spelling; [0-9] because
# \d would accept other scripts' digits.
_NUM = r"(0|[1-9][0-9]{0,18})"
_SHARD_REL = re.compile(rf"shards/([0-9a-f]{{2}})/([0-9a-f]{{32}})\.{_NUM}\.{_NUM}\.{_NUM}\.shd")
_SHARD_BASE = re.compile(rf"([0-9a-f]{{32}})\.{_NUM}\.{_NUM}\.{_NUM}\.shd")
_MAX_STRIPE = (1 << 63) - 1
_MAX_VERSION = (1 << 63) - 1
_MAX_SHARD = 254  # n <= 255


@dataclass(frozen=True)
class ShardName:
    """Where one shard lives in a store; raises ValueError if out of range."""

    file_id: str
    stripe_index: int
    version: int
    shard_index: int

    def __post_init__(self) -> None:
        if not isinstance(self.file_id, str) or not _HEX32.fullmatch(self.file_id):
            raise ValueError(f"file_id {self.file_id!r} is not 32 lower-case hex digits")
        for key, top in (("stripe_index", _MAX_STRIPE), ("version", _MAX_VERSION), ("shard_index", _MAX_SHARD)):
            v = getattr(self, key)
            if isinstance(v, bool) or not isinstance(v, int) or not 0 <= v <= top:
                raise ValueError(f"{key} {v!r} is not an integer in 0..{top}")

    def basename(self) -> str:
        return f"{self.file_id}.{self.stripe_index}.{self.version}.{self.shard_index}.shd"

    def relpath(self) -> str:
        return f"{SHARDS_DIR}/{self.file_id[:2]}/{self.basename()}"

    @classmethod
    def from_relpath(cls, rel: str) -> ShardName | None:
        """The name a relpath() spells, or None for anything else.

        Strict by design: only the exact canonical form parses, so no file
        name found on a store can lead outside it.
        """
        if not isinstance(rel, str) or len(rel) > 120:
            return None
        m = _SHARD_REL.fullmatch(rel)
        if not m or m.group(1) != m.group(2)[:2]:
            return None
        return cls._build(m.group(2), m.group(3), m.group(4), m.group(5))

    @classmethod
    def from_basename(cls, base: str) -> ShardName | None:
        if not isinstance(base, str) or len(base) > 110:
            return None
        m = _SHARD_BASE.fullmatch(base)
        return cls._build(*m.groups()) if m else None

    @classmethod
    def _build(cls, fid: str, s: str, v: str, i: str) -> ShardName | None:
        try:
            return cls(fid, int(s), int(v), int(i))
        except ValueError:
            return None


@dataclass(frozen=True)
class SpaceInfo:
    free_bytes: int  # available to an unprivileged writer (f_bavail)
    total_bytes: int

    @property
    def used_bytes(self) -> int:
        """Bytes we cannot use, including blocks reserved for root."""
        return max(0, self.total_bytes - self.free_bytes)


@dataclass(frozen=True)
class ProbeResult:
    space: SpaceInfo
    latency: float  # seconds for label read + write + fsync + read + delete


@dataclass(frozen=True, kw_only=True)
class StoreStats:
    puts: int  # successful put, put_file, copy_file_in
    gets: int  # successful get, get_prefix, get_file, fetch_file_to
    deletes: int
    put_errors: int  # failed writes, stalls included
    get_errors: int  # failed reads, stalls included; a missing shard is not a store error
    other_errors: int  # failed delete, list, probe, space, label calls
    get_missing: int  # reads of a file that is not there
    stalls: int  # calls of any kind past the deadline
    unparsed_names: int  # entries under shards/ that are not shard names, as of the last list_shards
    bytes_written: int
    bytes_read: int
    write_latency: HistogramSnapshot
    read_latency: HistogramSnapshot


# ---------------------------------------------------------------- the OS layer of the write path

class FileOps:
    """The OS calls the write path makes (put, catalog files, labels, probe,
    delete). Swappable so that a test can fail or drop them (tests/faults.py
    simulates a crash this way); reads and listings call os directly."""

    def open_new(self, path: str) -> int:
        return os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_NOFOLLOW | os.O_CLOEXEC, 0o644)

    def writev(self, fd: int, views: Sequence[memoryview]) -> int:
        return os.writev(fd, views)

    def fsync(self, fd: int) -> None:
        os.fsync(fd)

    def close(self, fd: int) -> None:
        os.close(fd)

    def rename(self, src: str, dst: str) -> None:
        os.rename(src, dst)

    def unlink(self, path: str) -> None:
        os.unlink(path)

    def mkdir(self, path: str) -> None:
        os.mkdir(path, 0o755)

    def fsync_dir(self, path: str) -> None:
        fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY | os.O_CLOEXEC)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def _write_all(ops: FileOps, fd: int, buffers: Sequence[bytes | memoryview]) -> int:
    """Write every byte, resuming after partial writes (a filling disk
    returns a short count before it returns ENOSPC)."""
    views = [memoryview(b).cast("B") for b in buffers]
    views = [v for v in views if len(v)]
    total, i = 0, 0
    while i < len(views):
        n = ops.writev(fd, views[i:i + _IOV_MAX])
        if n <= 0:
            raise OSError(errno.EIO, "write made no progress")
        total += n
        while n:
            if n >= len(views[i]):
                n -= len(views[i])
                i += 1
            else:
                views[i] = views[i][n:]
                n = 0
    return total


def _temp_name(kind: str = "tmp") -> str:
    return f".{kind}-{secrets.token_hex(8)}"


def _atomic_write(ops: FileOps, directory: str, base: str,
                  parts: Iterable[Sequence[bytes | memoryview]]) -> int:
    """Temp file in the same directory, write each group of buffers, fsync,
    rename, fsync the directory. On failure the temp file is removed (if the
    OS still lets us). Returns the bytes written."""
    tmp = os.path.join(directory, _temp_name())
    fd = ops.open_new(tmp)
    try:
        try:
            n = sum(_write_all(ops, fd, buffers) for buffers in parts)
            ops.fsync(fd)
        finally:
            ops.close(fd)
        ops.rename(tmp, os.path.join(directory, base))
    except BaseException:
        try:
            ops.unlink(tmp)
        except OSError:
            pass
        raise
    ops.fsync_dir(directory)
    return n


def _chunks(fd: int, wrap: Callable[[OSError], BaseException]) -> Iterator[list[bytes]]:
    """Read fd to its end in chunks; an OSError is raised as wrap(e)."""
    while True:
        try:
            c = os.read(fd, _COPY_CHUNK)
        except OSError as e:
            raise wrap(e) from e
        if not c:
            return
        yield [c]


def _read_upto(fd: int, limit: int) -> bytes:
    chunks, got = [], 0
    while got < limit:
        c = os.read(fd, limit - got)
        if not c:
            break
        chunks.append(c)
        got += len(c)
    return chunks[0] if len(chunks) == 1 else b"".join(chunks)


def _map_os_error(store: str, what: str, e: OSError, *, missing: type[ShoalError]) -> ShoalError:
    """One place for OSError -> ShoalError; `missing` is what ENOENT means here."""
    where = ""
    if isinstance(e.filename, str):
        where = " " + (os.path.relpath(e.filename, store) if e.filename.startswith(store + os.sep) else e.filename)
    detail = f"{what}{where}: {e.strerror or e}"
    if e.errno in (errno.ENOSPC, errno.EDQUOT):
        return StoreFull(store, detail)
    if e.errno == errno.ENOENT:
        if missing is ShardMissing:
            return ShardMissing(f"{what}{where}: not on store {store}")
        return missing(store, detail)
    return StoreUnavailable(store, detail)


class _LocalFileError(ShoalError):
    """A local file (not the store) failed in copy_file_in / fetch_file_to."""


class _StoreSide(Exception):
    """Carries a store-side OSError through code whose own OSErrors are local."""


_WRITE_OPS = frozenset({"put", "put_file", "copy_file_in"})
_READ_OPS = frozenset({"get", "get_prefix", "get_file", "fetch_file_to"})


# ---------------------------------------------------------------- the store

class Store:
    """One store directory. See the module docstring for the contracts."""

    def __init__(self, *, path: Path, pool_id: str, store_id: str | None = None,
                 deadline: float = 10.0, concurrency: int = 4, fsops: FileOps | None = None):
        if deadline <= 0 or concurrency < 1:
            raise ValueError("deadline must be positive and concurrency at least 1")
        self.path = Path(path)
        self.pool_id = pool_id
        self.store_id = store_id  # None: learnt from the label at the first probe / check_label
        self.deadline = float(deadline)
        self.fsops = fsops or FileOps()
        # trio releases a limiter token only when the thread has really
        # finished, even after abandon_on_cancel gave up on it (checked in
        # trio 0.35: to_thread.run_sync releases in the thread's report-back
        # callback, and its docs say so). So a hung mount ties up at most
        # `concurrency` threads of its own, and later calls on it wait for a
        # token under their deadline and stall too, while other stores go on.
        self._limiter = trio.CapacityLimiter(concurrency)
        self._root = str(self.path)
        self._write_hist = Histogram()
        self._read_hist = Histogram()
        self._n = dict.fromkeys(("puts", "gets", "deletes", "put_errors", "get_errors", "other_errors",
                                 "get_missing", "stalls", "unparsed_names", "bytes_written", "bytes_read"), 0)

    def __repr__(self) -> str:
        return f"Store({self._root!r})"

    # ---- the one way into a worker thread

    async def run_blocking(self, op: str, fn: Callable[..., T], *args: Any) -> T:
        """Run fn(*args) in this store's worker threads under its deadline.

        For wrappers (tests' FaultyStore) as well as this class; fn must touch
        only this store. Raises StoreStalled past the deadline, maps OSError
        as the module docstring says, and counts the failure under `op`.
        """
        try:
            with trio.move_on_after(self.deadline):
                try:
                    return await trio.to_thread.run_sync(fn, *args, abandon_on_cancel=True, limiter=self._limiter)
                except OSError as e:
                    missing = ShardMissing if op in _READ_OPS else StoreUnavailable
                    raise _map_os_error(self._root, op, e, missing=missing) from e
            self._n["stalls"] += 1
            raise StoreStalled(self._root, f"{op} did not finish within the {self.deadline:g}s deadline "
                                           "(a hung mount or a failing disk?)")
        except ShardMissing:
            self._n["get_missing"] += 1
            raise
        except (ShardError, _LocalFileError):
            raise  # a bad shard or a local file says nothing about the store's health
        except ShoalError:
            key = "put_errors" if op in _WRITE_OPS else "get_errors" if op in _READ_OPS else "other_errors"
            self._n[key] += 1
            raise

    async def _timed(self, op: str, hist: Histogram, fn: Callable[..., T], *args: Any) -> T:
        start = time.monotonic()
        out = await self.run_blocking(op, fn, *args)
        hist.observe(time.monotonic() - start)
        return out

    def _abs(self, rel: str) -> str:
        return os.path.join(self._root, rel)

    # ---- shards

    async def put(self, name: ShardName, buffers: Sequence[bytes | memoryview]) -> None:
        """Write the shard file; durable on return. Raises StoreFull,
        StoreUnavailable (also when shards/ is missing), StoreStalled."""
        n = await self._timed("put", self._write_hist, self._put_sync, name, buffers)
        self._n["puts"] += 1
        self._n["bytes_written"] += n

    def _put_sync(self, name: ShardName, buffers: Sequence[bytes | memoryview]) -> int:
        top = self._abs(SHARDS_DIR)
        fan = os.path.join(top, name.file_id[:2])
        try:
            self.fsops.mkdir(fan)
            self.fsops.fsync_dir(top)  # make the new fan-out directory itself durable
        except FileExistsError:
            pass
        except FileNotFoundError as e:
            raise StoreUnavailable(self._root, f"it has no {SHARDS_DIR}/ directory: not an initialised store; "
                                               f"{_UNMOUNTED_HINT}") from e
        return _atomic_write(self.fsops, fan, name.basename(), [buffers])

    async def get(self, name: ShardName, *, max_bytes: int | None = None) -> bytes:
        """The whole shard file. Raises ShardMissing, ShardCorrupt (larger than
        max_bytes, not a regular file, a symlink), StoreUnavailable, StoreStalled."""
        data = await self._timed("get", self._read_hist, self._read_sync, name.relpath(), None, max_bytes)
        self._n["gets"] += 1
        self._n["bytes_read"] += len(data)
        return data

    async def get_checked(self, name: ShardName, *, check: Callable[[bytes], T], max_bytes: int | None = None) -> T:
        """get(), then check(data) in the same worker thread: one round trip
        for a read and its verification. check must be pure (it touches no
        store); its ShardCorrupt passes through as the shard's fault, not the store's."""
        def read_and_check(rel: str) -> tuple[int, T]:
            data = self._read_sync(rel, None, max_bytes)
            return len(data), check(data)

        size, out = await self._timed("get", self._read_hist, read_and_check, name.relpath())
        self._n["gets"] += 1
        self._n["bytes_read"] += size
        return out

    async def get_many_checked(self, names: Sequence[ShardName], *, check: Callable[[int, bytes], T],
                               max_bytes: int | None = None) -> list[T | ShoalError]:
        """get_checked() for several shards in one worker-thread call, under
        one deadline (keep batches small enough to finish within it). The
        result for each name, in order, is check(position, data) or the
        error that shard met: ShardMissing, ShardCorrupt, or a StoreError.
        Raises StoreStalled past the deadline (for the whole batch)."""
        rels = [n.relpath() for n in names]

        def read_all() -> list[tuple[float, int, Any]]:
            out = []
            for pos, rel in enumerate(rels):
                start, size = time.monotonic(), -1  # -1: nothing read
                try:
                    data = self._read_sync(rel, None, max_bytes)
                    size = len(data)
                    out.append((time.monotonic() - start, size, check(pos, data)))
                except ShardError as e:
                    out.append((time.monotonic() - start, size, e))
                except OSError as e:
                    out.append((time.monotonic() - start, size, _map_os_error(self._root, "get", e, missing=ShardMissing)))
            return out

        results = await self.run_blocking("get", read_all)
        values: list[T | ShoalError] = []
        for took, size, value in results:
            if size >= 0:  # counted as get() counts: a read that returned bytes
                self._read_hist.observe(took)
                self._n["gets"] += 1
                self._n["bytes_read"] += size
            if isinstance(value, ShardMissing):
                self._n["get_missing"] += 1
            elif isinstance(value, ShoalError) and not isinstance(value, ShardError):
                self._n["get_errors"] += 1
            values.append(value)
        return values

    async def put_many(self, items: Sequence[tuple[ShardName, Sequence[bytes | memoryview]]]) -> list[StoreError | None]:
        """put() for several shards in one worker-thread call, under one
        deadline: each is written atomically and durably as put() does. The
        result for each, in order, is None (written) or its StoreError.
        Raises StoreStalled past the deadline (for the whole batch)."""
        def put_all() -> list[tuple[float, int, StoreError | None]]:
            out = []
            for name, buffers in items:
                start = time.monotonic()
                try:
                    size = self._put_sync(name, buffers)
                    out.append((time.monotonic() - start, size, None))
                except StoreError as e:
                    out.append((time.monotonic() - start, 0, e))
                except OSError as e:
                    out.append((time.monotonic() - start, 0, _map_os_error(self._root, "put", e, missing=StoreUnavailable)))
            return out

        results = await self.run_blocking("put", put_all)
        errors: list[StoreError | None] = []
        for took, size, err in results:
            if err is None:
                self._write_hist.observe(took)
                self._n["puts"] += 1
                self._n["bytes_written"] += size
            else:
                self._n["put_errors"] += 1
            errors.append(err)
        return errors

    async def get_prefix(self, name: ShardName, size: int) -> bytes:
        """The first `size` bytes (fewer if the file is shorter), for header scans."""
        if size < 0:
            raise ValueError("size must not be negative")
        data = await self._timed("get_prefix", self._read_hist, self._read_sync, name.relpath(), size, None)
        self._n["gets"] += 1
        self._n["bytes_read"] += len(data)
        return data

    def _read_sync(self, rel: str, prefix: int | None, max_bytes: int | None) -> bytes:
        try:
            # O_NONBLOCK: a FIFO planted under a shard's name must not hang the thread.
            fd = os.open(self._abs(rel), os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | os.O_CLOEXEC)
        except OSError as e:
            if e.errno == errno.ELOOP:
                raise ShardCorrupt(f"{rel} on store {self._root} is a symbolic link") from e
            raise
        try:
            st = os.fstat(fd)
            if not stat.S_ISREG(st.st_mode):
                raise ShardCorrupt(f"{rel} on store {self._root} is not a regular file")
            if prefix is not None:
                return _read_upto(fd, prefix)
            if max_bytes is not None and st.st_size > max_bytes:
                raise ShardCorrupt(f"shard file too large: {rel} on store {self._root} has {st.st_size} bytes, "
                                   f"more than the {max_bytes} allowed")
            # Bound the read too: the file may grow while we read it.
            data = _read_upto(fd, st.st_size + 1 if max_bytes is None else max_bytes + 1)
            if max_bytes is not None and len(data) > max_bytes:
                raise ShardCorrupt(f"shard file too large: {rel} on store {self._root} grew past {max_bytes} bytes")
            return data
        finally:
            os.close(fd)

    async def delete(self, name: ShardName) -> bool:
        """Remove the shard file; True if it existed. Not fsynced: a deletion
        lost in a crash leaves an orphan, which scrub finds."""
        existed = await self.run_blocking("delete", self._unlink_sync, name.relpath())
        self._n["deletes"] += 1
        return existed

    async def delete_many(self, names: Sequence[ShardName]) -> int:
        """Remove several shard files in one worker-thread call (garbage
        collection would otherwise cost a thread round trip per shard).
        Returns how many existed. Keep batches small enough to finish within
        the deadline."""
        rels = [n.relpath() for n in names]
        existed = await self.run_blocking("delete", self._unlink_many_sync, rels)
        self._n["deletes"] += len(rels)
        return existed

    def _unlink_many_sync(self, rels: Sequence[str]) -> int:
        return sum(1 for rel in rels if self._unlink_sync(rel))

    def _unlink_sync(self, rel: str) -> bool:
        try:
            self.fsops.unlink(self._abs(rel))
        except FileNotFoundError:
            return False
        return True

    async def exists(self, name: ShardName) -> bool:
        return await self.run_blocking("exists", self._exists_sync, name.relpath())

    def _exists_sync(self, rel: str) -> bool:
        try:
            os.stat(self._abs(rel), follow_symlinks=False)
        except FileNotFoundError:
            return False
        return True

    async def list_shards(self) -> list[tuple[ShardName, float]]:
        """Every shard file with its mtime. Entries that are not shard names
        are skipped and counted (statistics().unparsed_names); temporary
        files are ignored. Each fan-out directory is listed in its own call,
        so the deadline bounds one directory, not the whole store."""
        fans, unparsed = await self.run_blocking("list_shards", self._list_top_sync)
        out: list[tuple[ShardName, float]] = []
        for fan in fans:
            found, bad = await self.run_blocking("list_shards", self._list_fan_sync, fan)
            out.extend(found)
            unparsed += bad
        self._n["unparsed_names"] = unparsed
        return out

    def _list_top_sync(self) -> tuple[list[str], int]:
        fans, bad = [], 0
        with os.scandir(self._abs(SHARDS_DIR)) as it:
            for e in it:
                if re.fullmatch(r"[0-9a-f]{2}", e.name) and e.is_dir(follow_symlinks=False):
                    fans.append(e.name)
                else:
                    bad += 1
        return sorted(fans), bad

    def _list_fan_sync(self, fan: str) -> tuple[list[tuple[ShardName, float]], int]:
        found, bad = [], 0
        try:
            it = os.scandir(self._abs(f"{SHARDS_DIR}/{fan}"))
        except FileNotFoundError:
            return found, bad  # removed since we listed shards/
        with it:
            for e in it:
                if _TEMP_BASE.fullmatch(e.name):
                    continue
                sn = ShardName.from_basename(e.name)
                if sn is None or sn.file_id[:2] != fan or not e.is_file(follow_symlinks=False):
                    bad += 1
                    continue
                try:
                    found.append((sn, e.stat(follow_symlinks=False).st_mtime))
                except FileNotFoundError:
                    pass  # deleted while we listed
        return found, bad

    async def list_temp(self, older_than: float) -> list[str]:
        """Relative names of temporary files (left by a crash) whose mtime is
        more than older_than seconds ago; for remove_temp."""
        return await self.run_blocking("list_temp", self._list_temp_sync, time.time() - older_than)

    def _list_temp_sync(self, cutoff: float) -> list[str]:
        dirs = ["", CATALOG_DIR]
        try:
            with os.scandir(self._abs(SHARDS_DIR)) as it:
                dirs += [f"{SHARDS_DIR}/{e.name}" for e in it
                         if re.fullmatch(r"[0-9a-f]{2}", e.name) and e.is_dir(follow_symlinks=False)]
        except FileNotFoundError:
            pass
        out = []
        for d in dirs:
            try:
                with os.scandir(self._abs(d) if d else self._root) as it:
                    for e in it:
                        if _TEMP_BASE.fullmatch(e.name) and e.is_file(follow_symlinks=False) \
                                and e.stat(follow_symlinks=False).st_mtime <= cutoff:
                            out.append(f"{d}/{e.name}" if d else e.name)
            except FileNotFoundError:
                continue
        return sorted(out)

    async def remove_temp(self, relname: str) -> bool:
        """Remove one temporary file named by list_temp; True if it existed.
        Raises ValueError for any other name, so it cannot delete a shard."""
        if not isinstance(relname, str) or not _TEMP_REL.fullmatch(relname):
            raise ValueError(f"{relname!r} is not a temporary file name")
        return await self.run_blocking("remove_temp", self._unlink_sync, relname)

    async def space(self) -> SpaceInfo:
        return await self.run_blocking("space", self._space_sync)

    def _space_sync(self) -> SpaceInfo:
        v = os.statvfs(self._root)
        return SpaceInfo(free_bytes=v.f_bavail * v.f_frsize, total_bytes=v.f_blocks * v.f_frsize)

    async def probe(self) -> ProbeResult:
        """Check the label (pool_id, and store_id once known), then write,
        fsync, read back and delete a small file, then statvfs. The label is
        checked before anything is written, so a foreign or unlabelled store
        is never written. Adopts the label's store_id if none was given."""
        label, result = await self.run_blocking("probe", self._probe_sync, self.store_id)
        if self.store_id is None:
            self.store_id = label.store_id
        return result

    def _probe_sync(self, store_id: str | None) -> tuple[Label, ProbeResult]:
        start = time.monotonic()
        label = check_label(self.path, self.pool_id, store_id)
        payload = secrets.token_bytes(64)
        tmp = self._abs(_temp_name("probe"))
        fd = self.fsops.open_new(tmp)
        try:
            try:
                _write_all(self.fsops, fd, [payload])
                self.fsops.fsync(fd)
            finally:
                self.fsops.close(fd)
            rfd = os.open(tmp, os.O_RDONLY | os.O_NOFOLLOW | os.O_CLOEXEC)
            try:
                back = _read_upto(rfd, len(payload) + 1)
            finally:
                os.close(rfd)
        finally:
            try:
                self.fsops.unlink(tmp)
            except FileNotFoundError:
                pass
        if back != payload:
            raise StoreUnavailable(self._root, "the probe file read back different bytes")
        space = self._space_sync()
        return label, ProbeResult(space=space, latency=time.monotonic() - start)

    # ---- labels, async

    async def read_label(self) -> Label | None:
        return await self.run_blocking("read_label", read_label, self.path)

    async def check_label(self) -> Label:
        """check_label() for this store's pool (and store_id once known)."""
        label = await self.run_blocking("check_label", check_label, self.path, self.pool_id, self.store_id)
        if self.store_id is None:
            self.store_id = label.store_id
        return label

    async def write_label(self, label: Label) -> None:
        await self.run_blocking("write_label", functools.partial(write_label, fsops=self.fsops), self.path, label)

    # ---- small named files (catalog mirrors)

    @staticmethod
    def _file_rel(name: str) -> str:
        if not isinstance(name, str) or not _FILE_NAME.fullmatch(name) or ".." in name:
            raise ValueError(f"{name!r} is not a catalog file name (use [A-Za-z0-9._-], "
                             "no leading dot, no '..', at most 128 characters)")
        return f"{CATALOG_DIR}/{name}"

    async def put_file(self, name: str, buffers: Sequence[bytes | memoryview]) -> None:
        """Write catalog/<name> atomically and durably (replacing any)."""
        self._file_rel(name)
        n = await self._timed("put_file", self._write_hist, self._put_file_sync, name, buffers)
        self._n["puts"] += 1
        self._n["bytes_written"] += n

    def _catalog_dir(self) -> str:
        d = self._abs(CATALOG_DIR)
        if not os.path.isdir(d):
            raise StoreUnavailable(self._root, f"it has no {CATALOG_DIR}/ directory: not an initialised store; "
                                               f"{_UNMOUNTED_HINT}")
        return d

    def _put_file_sync(self, name: str, buffers: Sequence[bytes | memoryview]) -> int:
        return _atomic_write(self.fsops, self._catalog_dir(), name, [buffers])

    async def get_file(self, name: str) -> bytes:
        """The content of catalog/<name>. Raises ShardMissing if absent."""
        data = await self._timed("get_file", self._read_hist, self._read_sync, self._file_rel(name), None, None)
        self._n["gets"] += 1
        self._n["bytes_read"] += len(data)
        return data

    async def list_files(self) -> list[tuple[str, int, float]]:
        """(name, size, mtime) of each valid catalog file, sorted by name."""
        return await self.run_blocking("list_files", self._list_files_sync)

    def _list_files_sync(self) -> list[tuple[str, int, float]]:
        out = []
        with os.scandir(self._abs(CATALOG_DIR)) as it:
            for e in it:
                if _FILE_NAME.fullmatch(e.name) and ".." not in e.name and e.is_file(follow_symlinks=False):
                    st = e.stat(follow_symlinks=False)
                    out.append((e.name, st.st_size, st.st_mtime))
        return sorted(out)

    async def delete_file(self, name: str) -> bool:
        existed = await self.run_blocking("delete_file", self._unlink_sync, self._file_rel(name))
        self._n["deletes"] += 1
        return existed

    async def copy_file_in(self, name: str, local_path: str | os.PathLike) -> None:
        """Copy a local file to catalog/<name> (temp, fsync, rename, fsync dir).
        A failing local file raises ShoalError; the store's errors as usual."""
        self._file_rel(name)
        n = await self._timed("copy_file_in", self._write_hist, self._copy_in_sync, name, os.fspath(local_path))
        self._n["puts"] += 1
        self._n["bytes_written"] += n

    def _copy_in_sync(self, name: str, local: str) -> int:
        try:
            src = os.open(local, os.O_RDONLY | os.O_CLOEXEC)
        except OSError as e:
            raise _LocalFileError(f"local file {local}: {e.strerror}") from e
        try:
            wrap = lambda e: _LocalFileError(f"local file {local}: {e.strerror}")  # noqa: E731
            return _atomic_write(self.fsops, self._catalog_dir(), name, _chunks(src, wrap))
        finally:
            os.close(src)

    async def fetch_file_to(self, name: str, local_path: str | os.PathLike) -> int:
        """Copy catalog/<name> to local_path atomically and durably; returns
        its size. Raises ShardMissing if absent; a failing local side raises
        ShoalError (it says nothing about the store)."""
        rel = self._file_rel(name)
        n = await self._timed("fetch_file_to", self._read_hist, self._fetch_sync, rel, os.fspath(local_path))
        self._n["gets"] += 1
        self._n["bytes_read"] += n
        return n

    def _fetch_sync(self, rel: str, local: str) -> int:
        # Streamed, as a catalog mirror may be large. The store side's
        # OSErrors are carried out in _StoreSide and re-raised as themselves
        # (mapped as store errors); the local side's never mark the store
        # full or unavailable.
        src = os.open(self._abs(rel), os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | os.O_CLOEXEC)
        try:
            if not stat.S_ISREG(os.fstat(src).st_mode):
                raise ShardCorrupt(f"{rel} on store {self._root} is not a regular file")
            ldir, lbase = os.path.split(os.path.abspath(local))
            try:
                return _atomic_write(FileOps(), ldir, lbase, _chunks(src, _StoreSide))
            except _StoreSide as e:
                raise e.args[0] from None
            except OSError as e:
                raise _LocalFileError(f"local file {local}: {e.strerror}") from e
        finally:
            os.close(src)

    # ---- statistics

    def statistics(self) -> StoreStats:
        return StoreStats(**self._n, write_latency=self._write_hist.snapshot(),
                          read_latency=self._read_hist.snapshot())

"""The pool: namespace, stripe writer with the write-quorum gate, stripe
reader with degraded decode, a decoded-stripe cache and a memory cap.

Write path: ``write`` copies bytes into the open file's dirty stripe. A
stripe whose every byte has been written is dispatched at once: encoded in a
worker thread, its n shards put in parallel on the stores placement chose.
``commit`` (the mount's flush and fsync) dispatches what is left, waits
until every stripe has at least w durable shards, then makes the new
stripe versions current in one durable catalog transaction. Shards still
travelling finish in the background and their fate is recorded later; a
failed one is recorded missing and queued for repair. If any stripe cannot
reach w, the commit raises QuorumError and the catalog keeps the file's
previous content: a commit is all or nothing for the file.

Overwrites are copy-on-write per stripe: a new version, then the catalog
swap, then the old shards go to the garbage list and are deleted.

Memory: every dirty or in-flight stripe holds ``stripe_size`` bytes of the
pool-wide budget (``[pool] memory_cap``). A writer that would pass the cap
first pushes the oldest dirty stripe out, then waits for puts to finish.

Readers see uncommitted writes (dirty and in-flight stripes) of files that
are open, as POSIX requires.
"""
from __future__ import annotations

import collections
import dataclasses
import functools
import logging
import math
import stat
import time
from contextlib import asynccontextmanager
from dataclasses import dataclass, field
from typing import AsyncIterator, Callable

import trio

from . import catalog as cat
from .catalog import Catalog, Inode, NewStripe, ShardLoc
from .config import PoolConfig, spread_cap
from .errors import (
    CatalogError, InvalidArgument, IsADirectory, NoAttribute, PoolUnavailable, QuorumError, ReadOnly,
    ShoalError, StoreError, StripeLost,
)
from .ids import FileId, Ino, PoolId, StoreId
from .placement import Candidate, place, stripe_key
from .stats import Histogram
from .store import ShardName, Store
from .stripeio import StoreSlot, StripeIO, StripeRef

log = logging.getLogger(__name__)

VERSION_BLOCK = 1024  # stripe versions reserved per durable catalog write
GC_INTERVAL = 2.0
GC_BATCH = 128  # shard deletions per worker-thread call
PREFETCH_STRIPES = 2  # a sequential reader keeps this many stripes coming ahead of it
PRESSURE_WINDOW = 0.5  # seconds background work keeps off the budget after a user write was short of room


def pad(data: bytes, length: int) -> bytes:
    """data cut or zero-filled to exactly length bytes."""
    if len(data) < length:
        return data + bytes(length - len(data))
    return data[:length] if len(data) > length else data


class ByteBudget:
    """Bytes of buffered plus in-flight data, capped pool-wide.

    User writes take what fits (wait_fit); background work (repair) takes
    room only below its own limit and only while no user write has been
    short of room for PRESSURE_WINDOW seconds (wait_room), so it uses memory
    users leave idle and gives way as soon as they need it."""

    def __init__(self, cap: int):
        self.cap, self.used, self.peak = cap, 0, 0
        self._lot = trio.lowlevel.ParkingLot()
        self._pressed = -math.inf  # trio time a user write last found no room

    def fits(self, n: int) -> bool:
        return self.used + n <= self.cap or self.used == 0

    def note_pressure(self) -> None:
        """A user write is short of room (it waits, or pushes stripes out)."""
        self._pressed = trio.current_time()

    def pressed(self) -> bool:
        return trio.current_time() - self._pressed < PRESSURE_WINDOW

    async def wait_fit(self, n: int) -> None:
        while not self.fits(n):
            self.note_pressure()
            await self._lot.park()

    async def wait_room(self, n: int, limit: int) -> None:
        """For background work: wait until n more bytes keep the budget
        within limit and users are not short of room (or the budget is idle)."""
        while self.used and (self.used + n > limit or self.pressed()):
            with trio.move_on_after(PRESSURE_WINDOW / 4):
                await self._lot.park()

    def take(self, n: int) -> None:
        self.used += n
        self.peak = max(self.peak, self.used)

    def give(self, n: int) -> None:
        self.used -= n
        self._lot.unpark_all()


class DirtyStripe:
    """Bytes written to one stripe and not yet dispatched."""

    def __init__(self, idx: int, base: StripeRef | bytes | None, base_length: int):
        self.idx = idx
        # Sequential writes from offset 0 keep the caller's buffers as they
        # are (no copy on the trio loop); the join happens in the encoding
        # thread. Any other write pattern switches to one bytearray.
        self.chunks: list[memoryview] | None = []
        self.clen = 0
        self._buf = bytearray()
        self.spans: list[list[int]] = []  # merged [start, end) ranges written
        self.base = base  # previous content, fetched only if needed
        self.base_length = base_length
        self.touched = time.monotonic()

    @property
    def buf(self) -> bytearray:
        """The written bytes as one bytearray (leaves chunk mode)."""
        if self.chunks is not None:
            self._buf = bytearray(b"".join(self.chunks))
            self.chunks = None
        return self._buf

    @buf.setter
    def buf(self, value: bytearray) -> None:
        self.chunks = None
        self._buf = value

    def write(self, off: int, data: memoryview) -> None:
        """Take data at off. `data` must not change afterwards (pyfuse3 hands
        over immutable bytes)."""
        end = off + len(data)
        if self.chunks is not None and off == self.clen:
            self.chunks.append(data)
            self.clen = end
        else:
            buf = self.buf
            if off == len(buf):
                buf += data  # sequential, after a random write: one copy
            else:
                if len(buf) < end:
                    buf.extend(bytes(end - len(buf)))
                buf[off:end] = data
        self.touched = time.monotonic()
        if len(self.spans) == 1 and self.spans[0][0] <= off <= self.spans[0][1]:
            self.spans[0][1] = max(self.spans[0][1], end)
            return
        spans, merged = self.spans, []
        for a, b in spans:
            if b < off or a > end:
                merged.append([a, b])
            else:
                off, end = min(a, off), max(b, end)
        merged.append([off, end])
        merged.sort()
        self.spans = merged

    def covers(self, a: int, b: int) -> bool:
        return any(s <= a and b <= e for s, e in self.spans)



@dataclass(eq=False)
class Inflight:
    """A dispatched stripe version, not yet current in the catalog."""
    idx: int
    version: int
    length: int
    k: int
    n: int
    placement: list[StoreId | None]
    data: bytes | None
    states: list[str] = field(default_factory=list)
    quorum: trio.Event = field(default_factory=trio.Event)
    done: trio.Event = field(default_factory=trio.Event)
    ok: int = 0
    failed: int = 0
    quorum_met: bool = False
    errors: list[str] = field(default_factory=list)
    committing: bool = False  # commit has taken its snapshot of states
    recorded: bool = False  # the catalog holds this version
    late: list[tuple[int, str]] = field(default_factory=list)
    abandoned: bool = False  # superseded or failed: delete its shards when done
    started: float = field(default_factory=time.monotonic)
    chunks: list | None = None  # the data, not yet joined (see DirtyStripe)

    def content(self) -> bytes | bytearray | None:
        """The stripe's bytes while they are still in memory."""
        if self.data is None and self.chunks is not None:
            self.data = pad(b"".join(self.chunks), self.length)
            self.chunks = None
        return self.data

    def ref(self, file_id: FileId) -> StripeRef:
        return StripeRef(ino=None, file_id=file_id, idx=self.idx, version=self.version, length=self.length,
                         coded_length=self.length, k=self.k, n=self.n,
                         shards=tuple((i, sid, st) for i, (sid, st) in enumerate(zip(self.placement, self.states))))


@dataclass(eq=False)
class OpenFile:
    ino: Ino
    file_id: FileId
    size: int
    committed_size: int
    handles: int = 0
    mtime_ns: int | None = None
    dirty: dict[int, DirtyStripe] = field(default_factory=dict)
    inflight: dict[int, Inflight] = field(default_factory=dict)
    records: dict[int, cat.StripeRecord | None] = field(default_factory=dict)
    error: ShoalError | None = None
    unlinked: bool = False
    cut: int | None = None  # truncated to this size since the last commit (committed bytes past it are gone)
    lock: trio.Lock = field(default_factory=trio.Lock)

    @property
    def changed(self) -> bool:
        return bool(self.dirty or self.inflight or self.size != self.committed_size or self.mtime_ns is not None
                    or self.cut is not None)

    def visible(self, idx: int, length: int, stripe_size: int) -> int:
        """How many bytes of committed stripe idx survive the pending cut."""
        if self.cut is None:
            return length
        return max(0, min(length, self.cut - idx * stripe_size))


@dataclass(eq=False)
class Handle:
    fh: int
    of: OpenFile
    append: bool = False
    next_offset: int = -1  # where a sequential reader will read next
    # A commit failed while this handle was open: its next flush or fsync
    # reports it. flush carries no owner, so without this another close of
    # the same file (a dup, a child's close-on-exec) could take the error
    # and the writer's own close() would then return 0 for lost data.
    pending_error: ShoalError | None = None


@dataclass(frozen=True, kw_only=True)
class PoolStats:
    bytes_written: int
    bytes_read: int
    degraded_reads: int
    checksum_failures: int
    quorum_failures: int
    quorum_wait: object
    memory_used: int
    memory_peak: int
    cache_bytes: int
    open_files: int
    inflight_stripes: int


@dataclass(frozen=True, kw_only=True)
class StatFs:
    block_size: int
    total_bytes: int
    free_bytes: int
    files: int


class StripeCache:
    """Decoded stripes, least recently used out first, bounded in bytes."""

    def __init__(self, cap: int):
        self.cap, self.used = cap, 0
        self._d: collections.OrderedDict[tuple, bytes] = collections.OrderedDict()

    def get(self, key: tuple) -> bytes | None:
        v = self._d.get(key)
        if v is not None:
            self._d.move_to_end(key)
        return v

    def put(self, key: tuple, data: bytes) -> None:
        if len(data) > self.cap:
            return
        old = self._d.pop(key, None)
        if old is not None:
            self.used -= len(old)
        self._d[key] = data
        self.used += len(data)
        while self.used > self.cap:
            _, v = self._d.popitem(last=False)
            self.used -= len(v)

    def drop_file(self, file_id: str) -> None:
        for key in [k for k in self._d if k[0] == file_id]:
            self.used -= len(self._d.pop(key))


class Pool:
    """One mounted pool. Build it with ``open_pool``; all methods run on the trio loop."""

    def __init__(self, cfg: PoolConfig, catalog: Catalog, slots: dict[StoreId, StoreSlot], nursery: trio.Nursery):
        self.cfg = cfg
        self.catalog = catalog
        self.slots = slots
        self.nursery = nursery
        self.pool_id = PoolId(catalog.pool_id)
        self.stripe_size = int(catalog.get_meta("stripe_size", cfg.stripe_size))
        self.k, self.n, self.w = cfg.k, cfg.n, cfg.write_quorum
        self.cap = spread_cap(self.n, len({s.domain for s in slots.values() if s.admin == "active"}) or 1)
        self.forced_read_only = False
        self._db_limiter = trio.CapacityLimiter(1)
        self.io = StripeIO(pool_id=self.pool_id, slots=slots, on_bad_shard=self._bad_shard)
        # The memory cap covers the decoded-stripe cache, dirty stripes, and
        # in-flight stripes with their parity.
        self.cache = StripeCache(min(64 << 20, cfg.memory_cap // 8))
        self.budget = ByteBudget(cfg.memory_cap - self.cache.cap)
        self.parity_charge = self.stripe_size * (self.n - self.k) // self.k
        self.open_files: dict[Ino, OpenFile] = {}
        self.handles: dict[int, Handle] = {}
        self._next_fh = 1
        self._versions = (0, 0)  # [next, end) reserved
        self._repair_news: list[tuple[int, int, str]] = []
        self._state_news: list[tuple] = []
        self._garbage_news: list[tuple] = []
        self._flush_lock = trio.Lock()
        self._fetching: dict[tuple, trio.Event] = {}
        self._xattr_cache: dict[int, dict[bytes, bytes]] = {}
        self._gc_wake = trio.Event()
        self.bytes_written = 0
        self.quorum_failures = 0
        self.quorum_wait = Histogram()
        self.closing = False

    # -- plumbing -----------------------------------------------------------
    async def db(self, fn: Callable, *args, **kw):
        """Run a catalog method in the catalog's worker thread."""
        return await trio.to_thread.run_sync(functools.partial(fn, *args, **kw), limiter=self._db_limiter)

    @property
    def read_only(self) -> bool:
        return self.forced_read_only or self.writable_count() < self.w

    def writable_count(self) -> int:
        return sum(1 for s in self.slots.values() if s.writable)

    def readable_count(self) -> int:
        return sum(1 for s in self.slots.values() if s.readable)

    def _bad_shard(self, ref: StripeRef, shard: int, why: str) -> None:
        """Every read that meets a missing or corrupt shard feeds the repair
        queue, and marks the shard's row, so that repair reads it again
        (repair trusts rows that say 'ok'). A store that failed the read is
        the health monitor's business: its rows stay as they are."""
        if ref.ino is not None:
            self._repair_news.append((ref.ino, ref.idx, f"read-{why}"))
            if why in ("missing", "corrupt"):
                self._state_news.append((ref.ino, ref.idx, ref.version, shard, None, why))
            self._gc_wake.set()

    async def _next_version(self) -> int:
        nxt, end = self._versions
        if nxt >= end:
            first = await self.db(self.catalog.reserve_versions, VERSION_BLOCK)
            nxt, end = first, first + VERSION_BLOCK
        self._versions = (nxt + 1, end)
        return nxt

    def placement(self, file_id: FileId, idx: int) -> list[StoreId]:
        cands = [Candidate(store_id=s.store_id, domain=s.domain, weight=float(max(s.free_bytes, 1)))
                 for s in self.slots.values() if s.writable]
        return place(stripe_key(file_id, idx), cands, self.n, self.cap)

    # -- namespace ----------------------------------------------------------
    def _live(self, node: Inode) -> Inode:
        of = self.open_files.get(node.ino)
        if of is None:
            return node
        return dataclasses.replace(node, size=of.size, mtime_ns=of.mtime_ns or node.mtime_ns)

    async def getattr(self, ino: int) -> Inode:
        return self._live(await self.db(self.catalog.get_inode, ino))

    async def lookup(self, parent: int, name: bytes) -> Inode:
        if name == b".":
            return await self.getattr(parent)
        if name == b"..":
            return await self.getattr(await self.db(self.catalog.parent_of, parent))
        return self._live(await self.db(self.catalog.lookup, parent, name))

    def _writable(self) -> None:
        if self.read_only:
            raise ReadOnly(f"pool is read-only: {self.writable_count()} of {len(self.slots)} stores writable, w = {self.w}")

    async def create(self, parent: int, name: bytes, *, mode: int, uid: int, gid: int,
                     target: bytes | None = None, rdev: int = 0) -> Inode:
        self._writable()
        return await self.db(self.catalog.create, parent, name, mode=mode, uid=uid, gid=gid, target=target, rdev=rdev)

    async def link(self, ino: int, parent: int, name: bytes) -> Inode:
        self._writable()
        return self._live(await self.db(self.catalog.link, ino, parent, name))

    async def _maybe_purge(self, node: Inode | None) -> None:
        if node is None or node.nlink > 0:
            return
        of = self.open_files.get(node.ino)
        if of is not None:
            of.unlinked = True  # purged at its last release
            return
        await self.db(self.catalog.purge, node.ino)
        self._xattr_cache.pop(node.ino, None)
        self._gc_wake.set()

    async def unlink(self, parent: int, name: bytes) -> None:
        self._writable()
        await self._maybe_purge(await self.db(self.catalog.unlink, parent, name))

    async def rmdir(self, parent: int, name: bytes) -> None:
        self._writable()
        await self.db(self.catalog.rmdir, parent, name)

    async def rename(self, old_parent: int, old_name: bytes, new_parent: int, new_name: bytes, *,
                     noreplace: bool = False, exchange: bool = False) -> None:
        self._writable()
        replaced = await self.db(self.catalog.rename, old_parent, old_name, new_parent, new_name,
                                 noreplace=noreplace, exchange=exchange)
        await self._maybe_purge(replaced)

    async def readdir(self, ino: int, after: int, limit: int = 1000) -> list[tuple[int, bytes, Inode]]:
        rows = await self.db(self.catalog.readdir, ino, after, limit)
        return [(i, name, self._live(node)) for i, name, node in rows]

    async def readlink(self, ino: int) -> bytes:
        node = await self.db(self.catalog.get_inode, ino)
        if not stat.S_ISLNK(node.mode) or node.target is None:
            raise InvalidArgument("not a symbolic link")
        return node.target

    async def setattr(self, ino: int, *, size: int | None = None, **fields) -> Inode:
        """chmod, chown, utimens and truncate. A truncate of an open file (this is
        how O_TRUNC arrives) first commits pending writes, then cuts in memory:
        the cut becomes durable with the file's next commit, in the same
        transaction as the data written after it. So a failed commit leaves
        the content from before the truncation, and nothing is lost."""
        if fields or size is not None:
            self._writable()
        if size is not None:
            if size < 0:
                raise InvalidArgument("negative size")
            node = await self.db(self.catalog.get_inode, ino)
            if node.is_dir:
                raise IsADirectory("cannot truncate a directory")
            of = self.open_files.get(Ino(ino))
            if of is not None:
                async with of.lock:
                    await self._commit_locked(of)
                    if size < of.size:
                        of.cut = size if of.cut is None else min(of.cut, size)
                    of.size = size
                    of.mtime_ns = cat.now_ns()
            else:
                node = await self.db(self.catalog.commit_file, ino, size=size, mtime_ns=cat.now_ns(),
                                     stripes=(), stripe_size=self.stripe_size)
                self.cache.drop_file(node.file_id)
                self._gc_wake.set()
        if fields:
            of = self.open_files.get(Ino(ino))
            if of is not None and "mtime_ns" in fields:
                of.mtime_ns = None  # an explicit time wins over the write's
            if "ctime_ns" not in fields:
                fields["ctime_ns"] = cat.now_ns()
            node = await self.db(self.catalog.set_attrs, ino, **fields)
        return self._live(node if (fields or size is not None) else await self.db(self.catalog.get_inode, ino))

    async def _xattrs(self, ino: int) -> dict[bytes, bytes]:
        """All extended attributes of an inode, cached. The kernel asks for
        security.capability before every write, so this must not cost a
        catalog round trip each time."""
        cached = self._xattr_cache.get(ino)
        if cached is None:
            cached = await self.db(self.catalog.xattrs_of, ino)
            if len(self._xattr_cache) >= 10_000:
                self._xattr_cache.pop(next(iter(self._xattr_cache)))
            self._xattr_cache[ino] = cached
        return cached

    async def getxattr(self, ino: int, name: bytes) -> bytes:
        value = (await self._xattrs(ino)).get(name)
        if value is None:
            raise NoAttribute(name.decode(errors="replace"))
        return value

    async def setxattr(self, ino: int, name: bytes, value: bytes, *, create: bool = False, replace: bool = False) -> None:
        self._writable()
        self._xattr_cache.pop(ino, None)
        await self.db(self.catalog.setxattr, ino, name, value, create=create, replace=replace)

    async def listxattr(self, ino: int) -> list[bytes]:
        return sorted(await self._xattrs(ino))

    async def removexattr(self, ino: int, name: bytes) -> None:
        self._writable()
        self._xattr_cache.pop(ino, None)
        await self.db(self.catalog.removexattr, ino, name)

    def statfs(self) -> StatFs:
        """Usable capacity: the writable stores' space x k/n (what placement can use)."""
        free = sum(s.free_bytes for s in self.slots.values() if s.writable)
        total = sum(s.total_bytes for s in self.slots.values() if s.readable)
        return StatFs(block_size=4096, total_bytes=total * self.k // self.n, free_bytes=free * self.k // self.n,
                      files=0)

    # -- open files -----------------------------------------------------------
    async def open(self, ino: int, *, truncate: bool = False, append: bool = False, write: bool = False) -> int:
        node = await self.db(self.catalog.get_inode, ino)
        if node.is_dir:
            raise IsADirectory("is a directory")
        if not node.is_reg:
            raise InvalidArgument("not a regular file")
        if (write or truncate) and self.read_only:
            self._writable()
        of = self.open_files.get(Ino(ino))
        if of is None:
            of = OpenFile(ino=Ino(ino), file_id=FileId(node.file_id), size=node.size, committed_size=node.size)
            self.open_files[Ino(ino)] = of
        of.handles += 1
        fh = self._next_fh
        self._next_fh += 1
        self.handles[fh] = Handle(fh=fh, of=of, append=append)
        if truncate and of.size:
            try:
                await self.setattr(ino, size=0)
            except BaseException:
                await self.release(fh)
                raise
        return fh

    def _handle(self, fh: int) -> Handle:
        h = self.handles.get(fh)
        if h is None:
            raise InvalidArgument(f"bad file handle {fh}")
        return h

    async def release(self, fh: int) -> None:
        """Last close of an open file: commit leftovers (errors are logged:
        release cannot report them), purge it if it was unlinked."""
        h = self.handles.pop(fh, None)
        if h is None:
            return
        of = h.of
        of.handles -= 1
        if of.handles > 0:
            return
        try:
            if of.unlinked:
                await self._discard(of)
            elif of.changed:
                await self.commit(fh=None, of=of)
        except ShoalError as e:
            log.error("file %s: changes after the last successful flush are lost: %s", of.file_id, e)
        finally:
            if of.handles == 0 and self.open_files.get(of.ino) is of:
                del self.open_files[of.ino]
                if of.unlinked:
                    node = await self.db(self.catalog.get_inode, of.ino)
                    await self._maybe_purge(node)

    async def _discard(self, of: OpenFile) -> None:
        for ds in of.dirty.values():
            self.budget.give(self.stripe_size)
        of.dirty.clear()
        for infl in of.inflight.values():
            infl.abandoned = True
            if infl.done.is_set():
                self._garbage_inflight(of, infl)
        of.inflight.clear()

    # -- write path -----------------------------------------------------------
    async def write(self, fh: int, offset: int, data: bytes) -> int:
        """Buffer data at offset; dispatches stripes that are complete. May wait
        for memory. Raises ReadOnly, QuorumError (a dispatched stripe failed)."""
        h = self._handle(fh)
        of = h.of
        self._writable()
        if of.error is not None:
            raise of.error
        if h.append:
            offset = of.size
        mv = memoryview(data if isinstance(data, bytes) else bytes(data))
        total = len(mv)
        pos, S = offset, self.stripe_size
        while mv:
            idx, within = divmod(pos, S)
            take = min(len(mv), S - within)
            ds = of.dirty.get(idx)
            if ds is None:
                ds = await self._new_dirty(of, idx)
            ds.write(within, mv[:take])
            pos += take
            mv = mv[take:]
            of.size = max(of.size, pos)
            if ds.covers(0, min(S, max(of.size - idx * S, 0))) and within + take == S:
                await self._dispatch(of, ds)
        of.mtime_ns = cat.now_ns()
        self.bytes_written += total
        return total

    async def _base_of(self, of: OpenFile, idx: int) -> tuple[StripeRef | bytes | None, int]:
        """Where the previous content of stripe idx comes from, and its length.
        The in-flight check comes after the catalog wait: a stripe dispatched
        meanwhile is newer than the catalog's record."""
        rec = await self._record(of, idx)
        infl = of.inflight.get(idx)
        if infl is not None:
            data = infl.content()
            return (data if data is not None else infl.ref(of.file_id)), infl.length
        length = of.visible(idx, rec.length, self.stripe_size) if rec is not None else 0
        if length == 0:
            return None, 0
        return self._ref(of.file_id, rec), length

    async def _new_dirty(self, of: OpenFile, idx: int) -> DirtyStripe:
        S = self.stripe_size
        while not self.budget.fits(S):
            self.budget.note_pressure()
            victim = self._oldest_dirty()
            if victim is not None:
                vof, vds = victim
                try:
                    await self._dispatch(vof, vds)
                except ShoalError:
                    pass  # the victim's file carries the error (of.error); this write goes on
            else:
                await self.budget.wait_fit(S)
        base, blen = await self._base_of(of, idx)
        if idx in of.dirty:  # another writer made it while we waited
            return of.dirty[idx]
        self.budget.take(S)
        ds = DirtyStripe(idx, base, blen if base is not None else 0)
        of.dirty[idx] = ds
        return ds

    def _oldest_dirty(self) -> tuple[OpenFile, DirtyStripe] | None:
        best = None
        for of in self.open_files.values():
            for ds in of.dirty.values():
                if best is None or ds.touched < best[1].touched:
                    best = (of, ds)
        return best

    def _self_contained(self, ds: DirtyStripe, length: int) -> bool:
        """No previous content shows through the written spans."""
        return ds.base is None or ds.base_length == 0 or ds.covers(0, min(length, ds.base_length))

    async def _materialize(self, of: OpenFile, ds: DirtyStripe, length: int) -> bytearray:
        """The stripe's full content, exactly `length` bytes: previous content
        under the written spans. Returns the dirty buffer itself (no copy):
        a dispatched stripe owns it from then on."""
        if self._self_contained(ds, length):
            out = ds.buf
        else:
            base = ds.base if isinstance(ds.base, (bytes, bytearray)) else await self._read_ref(ds.base)
            # Writes may have reached the stripe while the base was read: they
            # are merged below, so take the length again rather than cut them off.
            length = max(0, min(self.stripe_size, of.size - ds.idx * self.stripe_size))
            out = bytearray(base[:ds.base_length])
            if len(out) < len(ds.buf):
                out.extend(bytes(len(ds.buf) - len(out)))
            for a, b in ds.spans:
                out[a:b] = ds.buf[a:b]
            ds.buf, ds.spans, ds.base = out, [[0, len(out)]], None
        if len(out) < length:
            out.extend(bytes(length - len(out)))
        elif len(out) > length:
            del out[length:]
        return out

    async def _dispatch(self, of: OpenFile, ds: DirtyStripe) -> Inflight | None:
        """Encode and send one dirty stripe; returns once its puts are started.

        Every wait (a block of versions, the previous content under a partial
        stripe) comes first, while the stripe is still dirty and still takes
        writes. Then, with no checkpoint in between, the stripe leaves
        of.dirty and its Inflight takes its place, so a concurrent write either
        lands in it or finds the Inflight as its base: never a gap in which a
        new dirty stripe starts from older content. Returns None if another
        task dispatched or dropped the stripe during the waits."""
        S = self.stripe_size
        try:
            version = await self._next_version()
            while of.dirty.get(ds.idx) is ds:
                length = min(S, of.size - ds.idx * S)
                if length <= 0 or self._self_contained(ds, length):
                    break
                await self._materialize(of, ds, length)  # merges the writes made while the base was read
        except BaseException as e:
            if of.dirty.get(ds.idx) is ds:
                del of.dirty[ds.idx]
                self.budget.give(S)
                if isinstance(e, ShoalError) and of.error is None:
                    of.error = e  # the file's next write or commit reports the lost stripe
            raise
        if of.dirty.get(ds.idx) is not ds:
            return of.inflight.get(ds.idx)
        del of.dirty[ds.idx]
        length = min(S, of.size - ds.idx * S)
        if length <= 0:
            self.budget.give(S)
            return None  # truncated away
        if ds.chunks is not None and self._self_contained(ds, length):
            data = None  # joined in the encoding thread
        else:
            data = await self._materialize(of, ds, length)  # self-contained by now: no checkpoint
        chosen = self.placement(of.file_id, ds.idx)
        placement: list[StoreId | None] = list(chosen) + [None] * (self.n - len(chosen))
        infl = Inflight(idx=ds.idx, version=version, length=length, k=self.k, n=self.n, placement=placement,
                        data=data, states=["pending" if s else "missing" for s in placement],
                        chunks=ds.chunks if data is None else None)
        old = of.inflight.get(ds.idx)
        if old is not None:
            old.abandoned = True
            if old.done.is_set():
                self._garbage_inflight(of, old)
        of.inflight[ds.idx] = infl
        if len(chosen) < self.w:
            infl.errors.append(f"only {len(chosen)} stores can take shards, w = {self.w}")
            infl.quorum.set()
            infl.done.set()
            infl.data = infl.chunks = None
            self.budget.give(S)
            return infl
        self.budget.take(self.parity_charge)  # the encoded parity, until the puts finish
        self.nursery.start_soon(self._write_stripe, of, infl)
        return infl

    async def _write_stripe(self, of: OpenFile, infl: Inflight) -> None:
        """Record the write intent and encode (side by side, off the write()
        path), then put the shards. The intent lands before any shard, so a
        crash leaves no shard that start-up clean-up cannot find."""
        files: list = []

        async def encode() -> None:
            chunks = infl.chunks
            if infl.data is None and chunks is not None and len(chunks) == infl.k \
                    and all(len(c) * infl.k == infl.length for c in chunks):
                # Written in shard-sized pieces (1 MiB writes, 4 MiB stripes, k=4):
                # they are the data shards as they stand, no join needed.
                files.extend(await self.io.encode(list(chunks), file_id=of.file_id, idx=infl.idx,
                                                  version=infl.version, k=infl.k, n=infl.n))
                return
            if infl.data is None and infl.chunks is not None:
                chunks, length = infl.chunks, infl.length
                data = await trio.to_thread.run_sync(lambda: pad(b"".join(chunks), length))
                if infl.chunks is chunks:  # nobody joined them meanwhile
                    infl.data, infl.chunks = data, None
            files.extend(await self.io.encode(infl.content(), file_id=of.file_id, idx=infl.idx,
                                              version=infl.version, k=infl.k, n=infl.n))

        async def intent() -> None:
            placed = ",".join(s for s in infl.placement if s is not None)
            await self.db(self.catalog.add_intents, of.file_id, [(infl.idx, infl.version, placed)])

        try:
            try:
                async with trio.open_nursery() as nursery:
                    nursery.start_soon(encode)
                    nursery.start_soon(intent)
            except Exception as e:  # a coding or catalog failure is a bug, but it must not kill the pool
                log.exception("encoding stripe %s/%d failed", of.file_id, infl.idx)
                infl.errors.append(f"encode: {e}")
                infl.quorum.set()
                return
            async with trio.open_nursery() as nursery:
                for i, sid in enumerate(infl.placement):
                    if sid is not None:
                        nursery.start_soon(self._put_one, of, infl, i, sid, files[i])
        finally:
            infl.data = infl.chunks = None
            self.budget.give(self.stripe_size + self.parity_charge)
            infl.quorum.set()
            infl.done.set()
            if infl.abandoned:
                self._garbage_inflight(of, infl)

    async def _put_one(self, of: OpenFile, infl: Inflight, i: int, sid: StoreId, buffers: list) -> None:
        name = ShardName(file_id=of.file_id, stripe_index=infl.idx, version=infl.version, shard_index=i)
        try:
            await self.io.put_shard(sid, name, buffers)
            state = "ok"
            infl.ok += 1
        except StoreError as e:
            state = "missing"
            infl.failed += 1
            infl.errors.append(str(e))
            log.warning("shard %d of stripe %d (file %s) not written: %s", i, infl.idx, of.file_id, e)
        infl.states[i] = state
        if not infl.quorum_met and infl.ok >= self.w:
            infl.quorum_met = True
            self.quorum_wait.observe(time.monotonic() - infl.started)
            infl.quorum.set()
        elif infl.ok + (sum(1 for s in infl.states if s == "pending")) < self.w:
            infl.quorum.set()  # cannot reach w any more
        if infl.recorded:
            self._shard_news(of, infl, i, state)
        elif infl.committing:
            infl.late.append((i, state))

    def _shard_news(self, of: OpenFile, infl: Inflight, i: int, state: str) -> None:
        self._state_news.append((of.ino, infl.idx, infl.version, i, None, state))
        if state != "ok":
            self._repair_news.append((of.ino, infl.idx, "write-failed"))
        self._gc_wake.set()

    def _garbage_inflight(self, of: OpenFile, infl: Inflight) -> None:
        """Shards of a version that will never be current: delete them."""
        items = [(sid, of.file_id, infl.idx, infl.version, i) for i, sid in enumerate(infl.placement)
                 if sid is not None and infl.states[i] != "missing"]
        self._garbage_news.extend(items)
        self._gc_wake.set()

    async def sync(self) -> None:
        """Make every namespace change so far durable (fsyncdir)."""
        await self.db(self.catalog.sync)

    async def fsync(self, fh: int) -> None:
        """commit, and make the file's namespace entry and attributes durable
        too (they may have changed without a data commit)."""
        h = self._handle(fh)
        of = h.of
        if h.pending_error is not None:
            err, h.pending_error = h.pending_error, None
            raise err
        async with of.lock:
            try:
                if not await self._commit_locked(of):
                    await self.db(self.catalog.sync)
            except ShoalError as e:
                self._spread_error(of, e, except_fh=fh)
                raise

    async def flush(self, fh: int) -> None:
        await self.commit(fh)

    async def commit(self, fh: int | None, of: OpenFile | None = None) -> None:
        """The write-quorum gate. Returns once every stripe of the file is durable
        on >= w stores and the catalog says so durably. Idempotent. Raises
        QuorumError; the file's committed content is then unchanged, the open
        file falls back to it, and every other handle open on the file reports
        the same error at its next flush or fsync."""
        h = self._handle(fh) if fh is not None else None
        if of is None:
            of = h.of
        if h is not None and h.pending_error is not None:
            err, h.pending_error = h.pending_error, None
            raise err
        async with of.lock:
            try:
                await self._commit_locked(of)
            except ShoalError as e:
                self._spread_error(of, e, except_fh=fh)
                raise

    def _spread_error(self, of: OpenFile, err: ShoalError, *, except_fh: int | None) -> None:
        for other in self.handles.values():
            if other.of is of and other.fh != except_fh:
                other.pending_error = err

    async def _commit_locked(self, of: OpenFile) -> bool:
        """Returns True if a durable catalog commit was made."""
        if of.error is not None:
            err, of.error = of.error, None
            await self._reset(of)
            raise err
        if not of.changed:
            return False
        for ds in sorted(of.dirty.values(), key=lambda d: d.idx):
            await self._dispatch(of, ds)
        batch = dict(of.inflight)
        for infl in batch.values():
            await infl.quorum.wait()
        bad = [i for i in batch.values() if not i.quorum_met]
        if bad:
            self.quorum_failures += 1
            why = "; ".join(bad[0].errors[-3:])
            await self._reset(of)
            raise QuorumError(f"stripe {bad[0].idx} of file {of.file_id}: fewer than w = {self.w} stores accepted it ({why})")
        for infl in batch.values():
            infl.committing = True
        new = [NewStripe(idx=i.idx, version=i.version, length=i.length, coded_length=i.length, k=i.k, n=i.n,
                         shards=tuple(ShardLoc(shard=s, store_id=sid, state=st if st != "pending" else "pending")
                                      for s, (sid, st) in enumerate(zip(i.placement, i.states))))
               for i in batch.values()]
        size, mtime, cut = of.size, of.mtime_ns, of.cut
        try:
            await self.db(self.catalog.commit_file, of.ino, size=size, mtime_ns=mtime, stripes=new,
                          stripe_size=self.stripe_size, cut=cut)
        except BaseException:
            for infl in batch.values():
                infl.committing = False
            raise
        for infl in batch.values():
            infl.recorded = True
            for i, state in infl.late:
                self._shard_news(of, infl, i, state)
            infl.late.clear()
            if of.inflight.get(infl.idx) is infl:
                del of.inflight[infl.idx]
            of.records.pop(infl.idx, None)
        of.committed_size = size
        if of.mtime_ns == mtime:
            of.mtime_ns = None
        if cut is not None:
            of.cut = None
            of.records.clear()
            self.cache.drop_file(of.file_id)
        if batch:
            self._gc_wake.set()
        return True

    async def _reset(self, of: OpenFile) -> None:
        """Drop uncommitted state: the file reads as its last committed content."""
        await self._discard(of)
        node = await self.db(self.catalog.get_inode, of.ino)
        of.size = of.committed_size = node.size
        of.mtime_ns = None
        of.cut = None
        of.records.clear()

    # -- read path ------------------------------------------------------------
    def _ref(self, file_id: FileId, rec: cat.StripeRecord) -> StripeRef:
        return StripeRef(ino=rec.ino, file_id=file_id, idx=rec.idx, version=rec.version, length=rec.length,
                         coded_length=rec.coded_length, k=rec.k, n=rec.n,
                         shards=tuple((s.shard, s.store_id, s.state) for s in rec.shards))

    async def _record(self, of: OpenFile, idx: int) -> cat.StripeRecord | None:
        if idx not in of.records:
            lo = idx - idx % 64
            recs = await self.db(self.catalog.stripes, of.ino, lo, lo + 64)
            for i in range(lo, lo + 64):
                if i not in of.records:
                    of.records[i] = recs.get(i)
        return of.records[idx]

    async def _read_ref(self, ref: StripeRef) -> bytes:
        key = (ref.file_id, ref.idx, ref.version, ref.length)
        data = self.cache.get(key)
        if data is not None:
            return data
        # Several readers may have waited for one fetch whose result the cache
        # did not keep; each looks again, so only one of them fetches anew.
        while (ev := self._fetching.get(key)) is not None:
            await ev.wait()
            data = self.cache.get(key)
            if data is not None:
                return data
        ev = self._fetching[key] = trio.Event()
        try:
            data = await self.io.read(ref)
            self.cache.put(key, data)
            return data
        finally:
            if self._fetching.get(key) is ev:
                del self._fetching[key]
            ev.set()

    async def _stripe_bytes(self, of: OpenFile, idx: int) -> bytes | bytearray:
        """Current content of stripe idx (uncommitted writes included), possibly
        shorter than the stripe: missing bytes read as zeros."""
        S = self.stripe_size
        ds = of.dirty.get(idx)
        if ds is not None:
            length = min(S, of.size - idx * S)
            if self._self_contained(ds, length):
                return bytes(ds.buf)
            return bytes(await self._materialize(of, ds, length))
        infl = of.inflight.get(idx)
        if infl is not None:
            data = infl.content()
            if data is not None:
                return data
            return await self._read_ref(infl.ref(of.file_id))
        rec = await self._record(of, idx)
        if rec is None or of.visible(idx, rec.length, S) == 0:
            return b""
        if of.cut is not None:
            return (await self._read_ref(self._ref(of.file_id, rec)))[:of.visible(idx, rec.length, S)]
        try:
            return await self._read_ref(self._ref(of.file_id, rec))
        except StripeLost:
            # The record may be stale (repair moved shards): look once more.
            of.records.clear()
            rec = await self._record(of, idx)
            if rec is None:
                return b""
            return await self._read_ref(self._ref(of.file_id, rec))

    async def read(self, fh: int, offset: int, size: int) -> bytes:
        """Bytes at offset; holes read as zeros. Raises StripeLost rather than
        return bytes it could not verify."""
        h = self._handle(fh)
        of = h.of
        end = min(offset + size, of.size)
        if offset >= end:
            return b""
        S = self.stripe_size
        parts = []
        pos = offset
        while pos < end:
            idx, within = divmod(pos, S)
            take = min(end - pos, S - within)
            data = await self._stripe_bytes(of, idx)
            # Slices of immutable stripe bytes are views: no copy until pyfuse3's.
            chunk = memoryview(data)[within:within + take] if isinstance(data, bytes) else data[within:within + take]
            if len(chunk) < take:
                chunk = bytes(chunk) + bytes(take - len(chunk))
            parts.append(chunk)
            pos += take
        if offset == h.next_offset or offset == 0:
            nxt = (end - 1) // S + 1
            for ahead in range(PREFETCH_STRIPES):
                self._prefetch(of, nxt + ahead)
        h.next_offset = end
        return parts[0] if len(parts) == 1 else b"".join(parts)

    def _prefetch(self, of: OpenFile, idx: int) -> None:
        """Sequential reader: fetch the next stripe in the background."""
        if idx * self.stripe_size >= of.committed_size or idx in of.dirty or idx in of.inflight:
            return
        rec = of.records.get(idx)
        if rec is not None:
            key = (of.file_id, idx, rec.version, rec.length)
            if self.cache.get(key) is not None or key in self._fetching:
                return

        async def run() -> None:
            try:
                r = await self._record(of, idx)
                if r is not None:
                    await self._read_ref(self._ref(of.file_id, r))
            except ShoalError:
                pass  # the real read will report it

        self.nursery.start_soon(run)

    # -- background -----------------------------------------------------------
    async def _background(self) -> None:
        """Record shard news, queue repairs and delete garbage, in batches."""
        while True:
            with trio.move_on_after(GC_INTERVAL):
                await self._gc_wake.wait()
            self._gc_wake = trio.Event()
            await self.flush_news()
            if not self.closing:
                await self.collect_garbage()

    async def flush_news(self) -> None:
        """Record the news gathered so far. One flush at a time: a caller
        returns only once news from before its call is in the catalog, even
        if the background task had taken it first."""
        async with self._flush_lock:
            states, self._state_news = self._state_news, []
            repairs, self._repair_news = self._repair_news, []
            garbage, self._garbage_news = self._garbage_news, []
            if states:
                await self.db(self.catalog.set_shard_states, states)
            if repairs:
                await self.db(self.catalog.queue_repair, repairs)
            if garbage:
                await self.db(self.catalog.add_garbage, garbage)
                await self.db(self.catalog.drop_intents, [(f, i, v) for _, f, i, v, _ in garbage])

    async def collect_garbage(self) -> int:
        """Delete shards on the garbage list from stores that can be reached,
        in batches per store (one worker-thread call per batch)."""
        items = await self.db(self.catalog.garbage, 4096)
        done: list[int] = []
        by_store: dict[str, list[cat.Garbage]] = {}
        for g in items:
            by_store.setdefault(g.store_id, []).append(g)

        async def one_store(slot: StoreSlot, batch: list[cat.Garbage]) -> None:
            for i in range(0, len(batch), GC_BATCH):
                part = batch[i:i + GC_BATCH]
                try:
                    await slot.store.delete_many([ShardName(file_id=g.file_id, stripe_index=g.idx, version=g.version,
                                                            shard_index=g.shard) for g in part])
                except StoreError as e:
                    log.debug("garbage shards on %s stay for later: %s", slot.path, e)
                    return
                done.extend(g.id for g in part)

        async with trio.open_nursery() as nursery:
            for sid, batch in by_store.items():
                slot = self.slots.get(sid)
                if slot is not None and slot.readable:
                    nursery.start_soon(one_store, slot, batch)
        if done:
            await self.db(self.catalog.drop_garbage, done)
        return len(done)

    async def drain(self) -> None:
        """Wait until no stripe is in flight, then record what is pending."""
        for of in list(self.open_files.values()):
            for infl in list(of.inflight.values()):
                await infl.done.wait()
        await self.flush_news()

    def statistics(self) -> PoolStats:
        return PoolStats(bytes_written=self.bytes_written, bytes_read=self.io.stats.bytes_read,
                         degraded_reads=self.io.stats.degraded_reads,
                         checksum_failures=self.io.stats.checksum_failures, quorum_failures=self.quorum_failures,
                         quorum_wait=self.quorum_wait.snapshot(), memory_used=self.budget.used,
                         memory_peak=self.budget.peak, cache_bytes=self.cache.used,
                         open_files=len(self.open_files),
                         inflight_stripes=sum(len(o.inflight) for o in self.open_files.values()))



async def startup_cleanup(pool: Pool) -> dict[str, int]:
    """After a crash: delete shards of stripes that were dispatched but never
    committed (write intents), purge unlinked inodes, and queue stripes whose
    shards were still travelling for repair."""
    report = {"orphan_shards": 0, "purged_inodes": 0, "queued": 0}
    intents = await pool.db(pool.catalog.intents)
    by_file = await pool.db(pool.catalog.file_ids)
    garbage, drop = [], []
    for file_id, idx, version, placement in intents:
        ino = by_file.get(file_id)
        rec = await pool.db(pool.catalog.stripe, ino, idx) if ino is not None else None
        if rec is None or rec.version != version:
            for shard, sid in enumerate(placement):
                garbage.append((sid, file_id, idx, version, shard))
        drop.append((file_id, idx, version))
    if garbage:
        await pool.db(pool.catalog.add_garbage, garbage)
        report["orphan_shards"] = len(garbage)
    if drop:
        await pool.db(pool.catalog.drop_intents, drop)
    for ino in await pool.db(pool.catalog.unlinked_inodes):
        await pool.db(pool.catalog.purge, ino)
        report["purged_inodes"] += 1
    pending = await pool.db(pool.catalog.pending_stripes)
    if pending:
        await pool.db(pool.catalog.queue_repair, [(i, x, "pending-at-start") for i, x in pending])
        report["queued"] = len(pending)
    await pool.collect_garbage()
    return report


async def probe_slot(slot: StoreSlot, *, deadline: float | None = None) -> None:
    """Probe one store and set its state and space (a first, simple view; the
    health monitor refines it with hysteresis)."""
    from .errors import StoreForeign, StoreFull, StoreStalled, StoreUnavailable

    try:
        res = await slot.store.probe()
        slot.free_bytes, slot.total_bytes = res.space.free_bytes, res.space.total_bytes
        state, reason = ("online", "probe passed")
        if res.space.free_bytes < 64 << 20 and res.space.free_bytes < res.space.total_bytes // 100:
            state, reason = "full", f"{res.space.free_bytes} bytes free"
    except StoreForeign as e:
        state, reason = "foreign", str(e)
    except StoreStalled as e:
        state, reason = "stalled", str(e)
    except StoreFull as e:
        state, reason = "full", str(e)
    except (StoreUnavailable, StoreError) as e:
        state, reason = "offline", str(e)
    if slot.admin == "failed":
        state = "failed"
    elif slot.admin == "retiring" and state == "online":
        state = "retiring"
    if state != slot.state:
        first = slot.reason == "not probed yet"
        log.log(logging.INFO if first and state == "online" else logging.WARNING,
                "store %s: %s -> %s (%s)", slot.path, slot.state, state, reason)
        slot.state, slot.state_since = state, time.time()
    slot.reason = reason


def make_slots(cfg: PoolConfig, catalog: Catalog) -> dict[StoreId, StoreSlot]:
    """StoreSlots for the configured stores, matched to the catalog by path."""
    pool_id = catalog.pool_id
    records = {r.path: r for r in catalog.stores()}
    slots: dict[StoreId, StoreSlot] = {}
    for sc in cfg.stores:
        rec = records.get(str(sc.path))
        if rec is None:
            raise CatalogError(f"store {sc.path} is in {cfg.source} but not in the pool: run `shoal init {cfg.source}`"
                               " (or `shoal store add`)")
        store = Store(path=sc.path, pool_id=pool_id, store_id=rec.store_id, deadline=cfg.store_io.deadline,
                      concurrency=cfg.store_io.concurrency)
        slots[StoreId(rec.store_id)] = StoreSlot(store=store, store_id=StoreId(rec.store_id), path=str(sc.path),
                                                 domain=sc.domain, admin=rec.admin)
    return slots


@asynccontextmanager
async def open_pool(cfg: PoolConfig, *, cleanup: bool = True) -> AsyncIterator[Pool]:
    """Open the catalog and stores, probe them, clean up after a crash, and
    run the pool's background work until the block exits. On exit, in-flight
    puts finish (each has a deadline) and their news is recorded."""
    try:
        catalog = await trio.to_thread.run_sync(lambda: Catalog(cfg.catalog_path))
    except CatalogError:
        raise
    try:
        slots = make_slots(cfg, catalog)
        async with trio.open_nursery() as probes:
            for slot in slots.values():
                probes.start_soon(probe_slot, slot)
        async with trio.open_nursery() as nursery:
            pool = Pool(cfg, catalog, slots, nursery)
            if pool.readable_count() < pool.k:
                raise PoolUnavailable(
                    f"only {pool.readable_count()} of {len(slots)} stores are usable, k = {pool.k}: "
                    + "; ".join(f"{s.path}: {s.state} ({s.reason})" for s in slots.values() if not s.readable))
            if cleanup and not pool.read_only:
                report = await startup_cleanup(pool)
                if any(report.values()):
                    log.info("start-up clean-up: %s", report)
            nursery.start_soon(pool._background)
            try:
                yield pool
            finally:
                pool.closing = True
                with trio.CancelScope(shield=True):
                    for fh in list(pool.handles):
                        await pool.release(fh)
                    await pool.drain()
                nursery.cancel_scope.cancel()
    finally:
        await trio.to_thread.run_sync(catalog.close)

"""Scrub: read and verify every shard, and sweep what the catalog does not know.

A pass walks every current stripe in (inode, stripe) order. For each shard
on a store that serves, it reads the whole file and checks it the way a
read would (codec.parse: magic, header checksum, fields, payload checksum,
pool id) and that the header names this very shard (file, stripe, version,
shard index, k, n, coded length). A finding is counted by kind:

* ``missing``: the file is not on its store;
* ``corrupt``: the file fails codec.parse (or is oversized, not a regular file);
* ``header_mismatch``: a valid shard file, but of another shard.

Before a finding counts, the stripe is looked up again: a shard that moved
(repair) or a version replaced (an overwrite) meanwhile is not an error.
A shard row marked 'ok' is then marked missing or corrupt, and the stripe
is queued for repair.

Then each serving store whose label still matches is swept: shard files
the catalog neither places on that store nor lists as garbage there, and
that no write intent covers, are ``orphan``; they are removed once older
than ``[scrub] orphan_grace``, but never if newer than the start of the pass
or than the catalog's last commit (a catalog restored from an older mirror
does not know the newest shards; recovery may still want them). Temporary
files left by a crash go too, once old enough that no put can still be
writing them.

Reads pass a token bucket (``[scrub] rate``). ``run()`` starts a pass every
``[scrub] interval`` (the last completion time is kept in the catalog's
meta table) or when ``request()`` asks for one.
"""
from __future__ import annotations

import collections
import logging
import time
from typing import Callable

import trio

from . import codec
from .config import PoolConfig
from .errors import ShardCorrupt, ShardMissing, ShoalError, StoreError
from .ids import FileId
from .repair import TokenBucket
from .store import ShardName

log = logging.getLogger(__name__)

KINDS = ("corrupt", "missing", "header_mismatch", "orphan")
PAGE = 128  # stripes per catalog read
META_LAST = "scrub_last_complete"
RETRY_AFTER_ERROR = 600.0

Progress = Callable[[dict], None]


class Scrubber:
    """Scrub passes over one pool; see the module docstring."""

    def __init__(self, pool, cfg: PoolConfig | None = None):
        self.pool = pool
        self.cfg = cfg or pool.cfg
        self.interval = self.cfg.scrub.interval
        self.orphan_grace = self.cfg.scrub.orphan_grace
        self.bucket = TokenBucket(self.cfg.scrub.rate)
        self._lock = trio.Lock()
        self._requested = trio.Event()
        self.errors: collections.Counter[str] = collections.Counter({k: 0 for k in KINDS})
        self.shards_checked = 0
        self.bytes_checked = 0
        self.skipped_shards = 0
        self.orphans_removed = 0
        self.temp_removed = 0
        self.stripes_total = 0
        self.stripes_done = 0
        self.running = False
        self.last_complete_time: float | None = None
        self.last_pass: dict | None = None

    def request(self) -> None:
        """Start a pass now (run() picks it up), unless one is running."""
        self._requested.set()

    async def run(self) -> None:
        """Scrub every interval until cancelled."""
        last = await self.pool.db(self.pool.catalog.get_meta, META_LAST, None)
        self.last_complete_time = float(last) if last is not None else None
        # A new pool gets its first pass one interval after it was created.
        created = float(await self.pool.db(self.pool.catalog.get_meta, "created", time.time()))
        while True:
            due = (self.last_complete_time or created) + self.interval - time.time()
            if due > 0:
                with trio.move_on_after(due):
                    await self._requested.wait()
            self._requested = trio.Event()
            try:
                await self.scrub_once()
            except (ShoalError, OSError) as e:
                log.warning("scrub pass failed, next try in %g s: %s", RETRY_AFTER_ERROR, e)
                with trio.move_on_after(RETRY_AFTER_ERROR):
                    await self._requested.wait()

    async def scrub_once(self, progress: Progress | None = None) -> dict:
        """One full pass; returns its findings: {"stripes", "shards_checked",
        "bytes_checked", "errors": {kind: count}, "orphans_removed",
        "temp_removed", "skipped_shards", "seconds"}."""
        async with self._lock:
            pool = self.pool
            start = time.time()
            before = (self.shards_checked, self.bytes_checked, self.orphans_removed, self.temp_removed,
                      self.skipped_shards)
            found: collections.Counter[str] = collections.Counter({k: 0 for k in KINDS})
            self.running = True
            try:
                self.stripes_total = (await pool.db(pool.catalog.counts))["stripes"]
                self.stripes_done = 0
                after = (0, -1)
                while True:
                    page = await pool.db(pool.catalog.stripe_page, after, PAGE)
                    if not page:
                        break
                    after = (page[-1][1].ino, page[-1][1].idx)
                    marks: list[tuple] = []
                    queue: list[tuple[int, int, str]] = []
                    for file_id, rec in page:
                        if file_id is not None:
                            await self._check_stripe(FileId(file_id), rec, found, marks, queue)
                        self.stripes_done += 1
                        if progress is not None:
                            progress(self.statistics())
                    if marks:
                        await pool.db(pool.catalog.set_shard_states, marks)
                    if queue:
                        await pool.db(pool.catalog.queue_repair, queue)
                self.stripes_total = max(self.stripes_total, self.stripes_done)
                await self._sweep(start, found)
                self.last_complete_time = time.time()
                await pool.db(pool.catalog.set_meta, META_LAST, self.last_complete_time)
            finally:
                self.running = False
                self.errors.update(found)
            after_ = (self.shards_checked, self.bytes_checked, self.orphans_removed, self.temp_removed,
                      self.skipped_shards)
            d = [a - b for a, b in zip(after_, before)]
            self.last_pass = {"stripes": self.stripes_done, "shards_checked": d[0], "bytes_checked": d[1],
                              "errors": dict(found), "orphans_removed": d[2], "temp_removed": d[3],
                              "skipped_shards": d[4], "seconds": time.time() - start}
            if any(found.values()):
                log.warning("scrub found %s", ", ".join(f"{v} {k}" for k, v in found.items() if v))
            return self.last_pass

    # -- shards -------------------------------------------------------------------
    def _verify(self, blob: bytes, file_id: FileId, rec, shard: int) -> str | None:
        try:
            h, _ = codec.parse(blob, pool_id=self.pool.pool_id)
        except ShardCorrupt:
            return "corrupt"
        if (h.file_id, h.stripe_index, h.stripe_version, h.shard_index, h.k, h.n, h.stripe_length) != \
                (file_id, rec.idx, rec.version, shard, rec.k, rec.n, rec.coded_length):
            return "header_mismatch"
        return None

    async def _check_stripe(self, file_id: FileId, rec, found: collections.Counter, marks: list, queue: list) -> None:
        pool = self.pool
        findings: list[tuple[int, str, str, str]] = []  # (shard, store id, row state, kind)
        limit = codec.shard_length(rec.coded_length, rec.k) + 8192

        async def one(shard: int, sid: str | None, state: str) -> None:
            slot = pool.slots.get(sid) if sid is not None else None
            if sid is None:
                queue.append((rec.ino, rec.idx, "scrub-unplaced"))
                return
            if slot is None or not slot.readable:
                self.skipped_shards += 1
                return
            name = ShardName(file_id=file_id, stripe_index=rec.idx, version=rec.version, shard_index=shard)
            kind = None
            try:
                blob = await slot.store.get(name, max_bytes=limit)
            except ShardMissing:
                kind = "missing"
            except ShardCorrupt:
                kind = "corrupt"
            except StoreError:
                self.skipped_shards += 1
                return
            else:
                await self.bucket.take(len(blob))
                self.bytes_checked += len(blob)
                kind = await trio.to_thread.run_sync(self._verify, blob, file_id, rec, shard,
                                                     limiter=pool.io.code_limiter)
            self.shards_checked += 1
            if kind is not None:
                findings.append((shard, sid, state, kind))
            elif state != "ok":
                queue.append((rec.ino, rec.idx, "scrub-confirm"))  # repair confirms it and marks it ok

        async with trio.open_nursery() as nursery:
            for loc in rec.shards:
                nursery.start_soon(one, loc.shard, loc.store_id, loc.state)
        if not findings:
            return
        now = await pool.db(pool.catalog.stripe, rec.ino, rec.idx)
        where = {s.shard: s.store_id for s in now.shards} if now is not None else {}
        for shard, sid, state, kind in findings:
            if now is None or now.version != rec.version or where.get(shard) != sid:
                continue  # moved or overwritten meanwhile: not an error
            found[kind] += 1
            log.info("scrub: shard %d of stripe %d (file %s) on %s: %s", shard, rec.idx, file_id,
                     pool.slots[sid].path if sid in pool.slots else sid, kind.replace("_", " "))
            if state == "ok":
                marks.append((rec.ino, rec.idx, rec.version, shard, None, "missing" if kind == "missing" else "corrupt"))
            queue.append((rec.ino, rec.idx, f"scrub-{kind}"))

    # -- orphans and temporary files ------------------------------------------------
    async def _sweep(self, start: float, found: collections.Counter) -> None:
        pool = self.pool
        cutoff = min(start - self.orphan_grace, await pool.db(pool.catalog.last_commit_time))
        for slot in list(pool.slots.values()):
            if not slot.readable:
                continue
            store = slot.store
            try:
                await store.check_label()
                for rel in await store.list_temp(max(self.orphan_grace, 2 * self.cfg.store_io.deadline)):
                    if await store.remove_temp(rel):
                        self.temp_removed += 1
                listing = await store.list_shards()
            except StoreError as e:
                log.warning("scrub: no orphan sweep of store %s: %s", slot.path, e)
                continue
            by_file: dict[str, list[tuple[ShardName, float]]] = collections.defaultdict(list)
            for name, mtime in listing:
                by_file[name.file_id].append((name, mtime))
            fids = sorted(by_file)
            for i in range(0, len(fids), 500):
                chunk = fids[i:i + 500]
                # Read after the listing: a file listed existed before this snapshot.
                placed, intents = await pool.db(pool.catalog.known_shards, slot.store_id, chunk)
                for fid in chunk:
                    for name, mtime in by_file[fid]:
                        if (fid, name.stripe_index, name.version, name.shard_index) in placed \
                                or (fid, name.stripe_index, name.version) in intents:
                            continue
                        found["orphan"] += 1
                        if mtime >= cutoff:
                            continue
                        try:
                            if await store.delete(name):
                                self.orphans_removed += 1
                        except StoreError as e:
                            log.warning("scrub: orphan %s on %s stays: %s", name.relpath(), slot.path, e)

    def register_control(self, control) -> None:
        """Control-socket op for the daemon: scrub(start=True) starts a pass
        unless one runs and returns statistics()."""
        async def scrub(args: dict):
            if (args or {}).get("start", True) and not self.running:
                self.request()
            return self.statistics()

        control.register("scrub", scrub)

    # -- statistics -----------------------------------------------------------------
    def statistics(self) -> dict:
        if self.stripes_total:
            ratio = min(1.0, self.stripes_done / self.stripes_total)
        else:
            ratio = 1.0 if self.last_complete_time is not None and not self.running else 0.0
        return {"shards_checked": self.shards_checked, "bytes_checked": self.bytes_checked,
                "progress_ratio": ratio, "running": self.running, "last_complete_time": self.last_complete_time,
                "errors": {k: self.errors.get(k, 0) for k in KINDS}, "orphans_removed": self.orphans_removed,
                "temp_removed": self.temp_removed, "skipped_shards": self.skipped_shards,
                "stripes_total": self.stripes_total, "stripes_done": self.stripes_done,
                "last_pass": self.last_pass}


__all__ = ["KINDS", "Scrubber"]

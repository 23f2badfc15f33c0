"""Catalog mirrors: consistent copies of the catalog on every store.

The catalog lives in one state directory; if that disk dies, the shards on
the stores are useless without it. So the mounted pool copies the catalog
to each store's ``catalog/`` directory after changes, at most every
``[catalog] mirror_interval``, and once more at a clean shutdown. ``shoal
recover`` starts from the newest mirror a majority of the stores agree on.

On each store, one mirror is two small files::

    catalog/catalog-<generation:012d>.sqlite      the SQLite database (rollback-journal mode)
    catalog/catalog-<generation:012d>.meta.json   {"format", "pool_id", "pool_name", "generation",
                                                   "time", "size", "checksum"} (BLAKE3-256, hex)

The database is written first and the sidecar second, both atomically
(temporary name, fsync, rename, fsync of the directory), so a sidecar
implies a complete database; a database without its sidecar is an
interrupted copy and is never used. The newest ``mirrors_kept`` per store
stay; older ones are deleted, sidecar first.

How the snapshot is taken: with its own read-only SQLite connection
(``Catalog.open_read_only``), opened in a worker thread of the mirror's own,
not through the pool's catalog thread. The backup API copies the database
in one step under one read transaction; in WAL mode that reader sees one
consistent state and blocks no writer. Going through the pool's catalog
thread instead would stall every namespace call for the length of the copy.

Part of the pool layer: it uses catalog, store and codec.
"""
from __future__ import annotations

import json
import logging
import os
import re
import secrets
import time
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path

import trio

from .catalog import Catalog
from .config import PoolConfig
from .errors import ShoalError, StoreError
from .store import Store
from .stripeio import StoreSlot

log = logging.getLogger(__name__)

MIRROR_FORMAT = 1
_NAME = re.compile(r"catalog-([0-9]{12})\.(sqlite|meta\.json)")
_META_MAX = 64 * 1024
_HASH_CHUNK = 1 << 20
POLL = 5.0  # seconds between looks at the catalog generation, at most


class MirrorError(ShoalError):
    """No store took the catalog mirror."""


def mirror_names(generation: int) -> tuple[str, str]:
    """(database, sidecar) file names of the mirror of this generation."""
    return f"catalog-{generation:012d}.sqlite", f"catalog-{generation:012d}.meta.json"


def parse_mirror_name(name: str) -> tuple[int, str] | None:
    """(generation, "sqlite" | "meta.json") for a mirror file name, else None."""
    m = _NAME.fullmatch(name)
    return (int(m.group(1)), m.group(2)) if m else None


@dataclass(frozen=True, kw_only=True)
class MirrorMeta:
    """The sidecar of one mirror. Validates itself when built."""
    format: int = MIRROR_FORMAT
    pool_id: str
    pool_name: str
    generation: int
    time: float
    size: int
    checksum: str  # BLAKE3-256 of the database file, hex

    def __post_init__(self) -> None:
        if self.format != MIRROR_FORMAT:
            raise ValueError(f"mirror format {self.format!r} is not {MIRROR_FORMAT}")
        if not isinstance(self.pool_id, str) or not re.fullmatch(r"[0-9a-f]{32}", self.pool_id):
            raise ValueError(f"pool_id {self.pool_id!r} is not 32 hex digits")
        for key in ("generation", "size"):
            v = getattr(self, key)
            if isinstance(v, bool) or not isinstance(v, int) or v < 0:
                raise ValueError(f"{key} {v!r} is not a non-negative integer")
        if not isinstance(self.checksum, str) or not re.fullmatch(r"[0-9a-f]{64}", self.checksum):
            raise ValueError("checksum is not 64 hex digits")
        if isinstance(self.time, bool) or not isinstance(self.time, (int, float)):
            raise ValueError(f"time {self.time!r} is not a number")

    def to_json(self) -> bytes:
        return (json.dumps({"format": self.format, "pool_id": self.pool_id, "pool_name": self.pool_name,
                            "generation": self.generation, "time": self.time, "size": self.size,
                            "checksum": self.checksum}, indent=1, sort_keys=True) + "\n").encode()

    @classmethod
    def from_json(cls, raw: bytes) -> MirrorMeta:
        """Raises ValueError if raw is not a well-formed sidecar."""
        if len(raw) > _META_MAX:
            raise ValueError("sidecar is too large")
        try:
            d = json.loads(raw.decode("utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError) as e:
            raise ValueError(f"sidecar is not JSON ({e})") from None
        if not isinstance(d, dict):
            raise ValueError("sidecar is not a JSON object")
        want = {"format", "pool_id", "pool_name", "generation", "time", "size", "checksum"}
        if want - d.keys():
            raise ValueError(f"sidecar lacks {', '.join(sorted(want - d.keys()))}")
        return cls(**{k: d[k] for k in want})


def file_checksum(path: Path) -> tuple[str, int]:
    """(BLAKE3-256 hex, size) of a local file. Blocking."""
    import blake3

    h, size = blake3.blake3(), 0
    with open(path, "rb") as f:
        while chunk := f.read(_HASH_CHUNK):
            h.update(chunk)
            size += len(chunk)
    return h.hexdigest(), size


def _take_snapshot(catalog_path: Path, dest: Path) -> tuple[str, int, str, int]:
    """Blocking: (pool_id, generation, checksum, size) of a fresh snapshot at dest."""
    ro = Catalog.open_read_only(catalog_path)
    try:
        pool_id, gen = ro.snapshot_to(dest)
    finally:
        ro.close()
    digest, size = file_checksum(dest)
    return pool_id, gen, digest, size


def _read_generation(catalog_path: Path) -> int:
    ro = Catalog.open_read_only(catalog_path)
    try:
        return ro.generation()
    finally:
        ro.close()


async def prune(store: Store, keep: int) -> int:
    """Keep the newest `keep` complete mirrors on a store; delete the rest and
    any interrupted copy older than the newest complete one. Returns the
    files deleted."""
    files = {name for name, _, _ in await store.list_files()}
    complete, parts = [], {}
    for name in files:
        p = parse_mirror_name(name)
        if p is None:
            continue
        parts.setdefault(p[0], set()).add(p[1])
    complete = sorted((g for g, kinds in parts.items() if "meta.json" in kinds), reverse=True)
    kept = set(complete[:keep])
    newest = complete[0] if complete else None
    deleted = 0
    for gen in sorted(parts):
        if gen in kept or newest is None or gen > newest:
            continue  # a copy newer than every complete one may be in progress
        db_name, meta_name = mirror_names(gen)
        for name in (meta_name, db_name):  # the sidecar first: without it the pair is not a mirror
            if name in files and await store.delete_file(name):
                deleted += 1
    return deleted


class Mirror:
    """Copies the catalog to the stores.

    ``catalog`` is the pool's Catalog (only its path is used) or a path.
    ``stores`` is the pool's live ``{store_id: StoreSlot}`` map (the mirror
    writes to slots that are online or retiring, as they are at each
    snapshot) or plain Store objects (offline tools: every one is tried).
    A store is written only after its label names this pool.
    """

    def __init__(self, cfg: PoolConfig, catalog: Catalog | Path, stores: Mapping[str, StoreSlot] | Iterable[Store],
                 *, clock=time.time):
        self.cfg = cfg
        self.catalog_path = Path(catalog.path if isinstance(catalog, Catalog) else catalog)
        self._stores = stores if isinstance(stores, Mapping) else list(stores)
        self._clock = clock
        self._limiter = trio.CapacityLimiter(1)
        self._lock = trio.Lock()
        self._generation: int | None = None  # of the last snapshot some store took
        self._time: float | None = None
        self._holders: set[str] = set()  # stores holding that snapshot
        self._last_error: str | None = None

    # -- which stores ------------------------------------------------------
    def _targets(self) -> list[Store]:
        if isinstance(self._stores, Mapping):
            return [s.store for s in self._stores.values() if s.state in ("online", "retiring")]
        return list(self._stores)

    def _total(self) -> int:
        return len(self._stores)

    @staticmethod
    def _key(store: Store) -> str:
        return str(store.path)

    # -- snapshots ---------------------------------------------------------
    async def generation(self) -> int:
        """The catalog's generation now (read-only connection, worker thread)."""
        return await trio.to_thread.run_sync(_read_generation, self.catalog_path, limiter=self._limiter)

    async def snapshot(self) -> int:
        """Take a consistent snapshot and copy it to every store that can take
        it; returns its generation. Raises MirrorError if no store took it
        (CatalogError if the catalog cannot be read)."""
        async with self._lock:
            return await self._snapshot()

    async def _snapshot(self) -> int:
        tmp = self.cfg.state_dir / f".mirror-{secrets.token_hex(8)}.sqlite"
        try:
            pool_id, gen, digest, size = await trio.to_thread.run_sync(
                _take_snapshot, self.catalog_path, tmp, limiter=self._limiter)
            meta = MirrorMeta(pool_id=pool_id, pool_name=self.cfg.name, generation=gen, time=self._clock(),
                              size=size, checksum=digest)
            db_name, meta_name = mirror_names(gen)
            took: set[str] = set()
            errors: list[str] = []

            async def one(store: Store) -> None:
                try:
                    label = await store.check_label()
                    if label.pool_id != pool_id:  # check_label enforces it; say so plainly anyway
                        raise MirrorError(f"store {store.path} belongs to pool {label.pool_id}")
                    await store.copy_file_in(db_name, tmp)
                    await store.put_file(meta_name, [meta.to_json()])
                    took.add(self._key(store))
                    await prune(store, self.cfg.catalog.mirrors_kept)
                except (StoreError, MirrorError) as e:
                    errors.append(str(e))
                    log.warning("catalog mirror %d not written to %s: %s", gen, store.path, e)

            async with trio.open_nursery() as nursery:
                for store in self._targets():
                    nursery.start_soon(one, store)
        finally:
            await trio.to_thread.run_sync(_unlink_quietly, tmp)
        if not took:
            self._last_error = "; ".join(errors[-3:]) or "no store is online"
            raise MirrorError(f"catalog mirror of generation {gen} was written to no store: {self._last_error}")
        self._generation, self._time, self._holders = gen, meta.time, took
        self._last_error = "; ".join(errors[-3:]) or None
        log.debug("catalog mirror of generation %d written to %d stores", gen, len(took))
        return gen

    def _behind(self) -> bool:
        """A store that can take mirrors does not hold the last one."""
        return any(self._key(s) not in self._holders for s in self._targets())

    async def run(self, *, task_status=trio.TASK_STATUS_IGNORED) -> None:
        """Mirror after changes, at most every mirror_interval seconds, until
        cancelled. A failed snapshot is logged and tried again later."""
        interval = max(self.cfg.catalog.mirror_interval, 0.0)
        poll = min(POLL, interval) if interval > 0 else POLL
        task_status.started()
        last = None
        while True:
            if last is not None:
                await trio.sleep_until(last + interval)
            try:
                gen = await self.generation()
                if gen != self._generation or self._behind():
                    last = trio.current_time()
                    await self.snapshot()
                    continue
            except ShoalError as e:
                self._last_error = str(e)
                log.warning("catalog mirror failed (tried again in %.0f s): %s", max(interval, poll), e)
                last = trio.current_time()
                continue
            await trio.sleep(poll)

    async def final(self) -> int | None:
        """At a clean shutdown, after the pool's last commit: mirror once more if
        the catalog changed since the last mirror. Returns the generation the
        stores now hold (None if no mirror could be written); never raises a
        ShoalError (it is logged)."""
        with trio.CancelScope(shield=True):
            try:
                gen = await self.generation()
                if gen != self._generation or self._behind():
                    return await self.snapshot()
                return gen
            except ShoalError as e:
                self._last_error = str(e)
                log.warning("final catalog mirror failed: %s", e)
                return None

    def statistics(self) -> dict:
        """{"mirror_age_seconds": float | None, "generation": int | None,
        "stores_with_mirror": int, "stores_total": int, "last_error": str | None}:
        age and generation of the last mirror written by this process."""
        age = None if self._time is None else max(0.0, self._clock() - self._time)
        return {"mirror_age_seconds": age, "generation": self._generation,
                "stores_with_mirror": len(self._holders), "stores_total": self._total(),
                "last_error": self._last_error}


def _unlink_quietly(path: Path) -> None:
    try:
        os.unlink(path)
    except FileNotFoundError:
        pass

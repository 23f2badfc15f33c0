"""Store lifecycle: add, replace, retire and fail stores.

Each function takes either an open Pool (the daemon's; the change applies to
its StoreSlots at once) or a PoolConfig (offline: the function opens what it
needs and closes it again). Each refuses with StoreRefused, having changed
nothing, when the request is unsafe or does not fit the pool; it returns a
StoreChange that says what was done.

* ``add_store``: label an empty directory as a new store and add it to the
  catalog. The config file is the administrator's: the result carries the
  ``[[store]]`` table to add to it (the pool matches configured stores to
  catalog records by path, so until then a restarted daemon does not use
  the new store, and repair treats it as away).
* ``replace_store``: the store configured at PATH is gone and PATH is now an
  empty directory (a new disk mounted there). Label it as a new store that
  replaces the old one; in one catalog transaction the old record is set
  aside as failed, the new record takes the path and the old store's shard
  rows, marked missing, and those stripes are queued: repair rebuilds onto
  the new store exactly what the old one held.
* ``retire_store``: refused when the other active stores cannot hold n
  shards per stripe under the spread rule; else the store becomes retiring
  (still read, never written) and its stripes are queued; repair moves every
  shard off it and then marks it retired (removable).
* ``fail_store``: the store is declared failed: never read again, and its
  shards are rebuilt elsewhere.

With ``wait=True`` the function also runs repair until it has done what it
can (offline, or with the daemon's repairer); the daemon passes wait=False
and lets its own repair worker do it.
"""
from __future__ import annotations

import json
import logging
import os
from contextlib import asynccontextmanager
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import AsyncIterator

import trio

from .config import PoolConfig, spread_cap, spread_shortfall
from .errors import ShoalError, StoreError
from .health import apply_admin
from .ids import StoreId
from .pool import Pool, open_pool, probe_slot
from .repair import Progress, Repairer
from .store import Label, Store, is_empty_dir, read_label, same_device_as_parent, write_label
from .stripeio import StoreSlot

log = logging.getLogger(__name__)

DIR_DEADLINE = 10.0  # seconds for looking at or labelling a new store's directory


class StoreRefused(ShoalError):
    """A store command was refused; nothing was changed."""


@dataclass(frozen=True, kw_only=True)
class StoreChange:
    """What a lifecycle command did (plain data, for the CLI and the control socket)."""
    action: str  # added | replaced | retiring | retired | failed
    store_id: str
    path: str
    domain: str
    replaces: str | None = None
    queued_stripes: int = 0
    shards_repointed: int = 0
    message: str = ""
    config_snippet: str | None = None
    warnings: tuple[str, ...] = ()
    repair: dict | None = field(default=None)

    def as_dict(self) -> dict:
        d = asdict(self)
        d["warnings"] = list(self.warnings)
        return d


def lone_error(group: BaseException) -> BaseException:
    """The one exception inside nested single-member exception groups (trio
    nurseries wrap what their body raises), or the group itself."""
    while isinstance(group, BaseExceptionGroup) and len(group.exceptions) == 1:
        group = group.exceptions[0]
    return group


@asynccontextmanager
async def opened(cfg: PoolConfig) -> AsyncIterator[Pool]:
    """open_pool, but a ShoalError raised inside comes out as itself, not
    wrapped in the pool's nursery's exception group."""
    try:
        async with open_pool(cfg) as pool:
            yield pool
    except BaseExceptionGroup as eg:
        inner = lone_error(eg)
        if isinstance(inner, ShoalError):
            raise inner from None
        raise


@asynccontextmanager
async def _pool_of(target: Pool | PoolConfig) -> AsyncIterator[Pool]:
    if isinstance(target, PoolConfig):
        async with opened(target) as pool:
            yield pool
    else:
        yield target


RESOLVE_DEADLINE = 2.0  # seconds for resolving a store path given on the command line


async def _resolved(path: str | os.PathLike) -> Path:
    """PATH made absolute with its symlinks resolved, in a worker thread:
    resolving stats the path itself, and on a hung mount (the very store an
    administrator wants to fail) that blocks for good. A path that does not
    resolve in time is taken as written (made absolute), so the command can
    still find the store's record without touching the store."""
    p = Path(os.path.abspath(path))
    with trio.move_on_after(RESOLVE_DEADLINE):
        return await trio.to_thread.run_sync(p.resolve, abandon_on_cancel=True)
    log.warning("%s did not resolve within %g s (a hung mount?); taking the path as given", p, RESOLVE_DEADLINE)
    return p


async def _in_dir_thread(fn, *args):
    """Blocking directory work in a thread, under a deadline (a hung mount must not hang us)."""
    with trio.move_on_after(DIR_DEADLINE):
        return await trio.to_thread.run_sync(fn, *args, abandon_on_cancel=True)
    raise StoreRefused(f"{args[0]}: no answer within {DIR_DEADLINE:g} s (a hung mount?)")


def _look(path: Path) -> tuple[str, Label | None, bool]:
    """("missing" | "labelled" | "empty" | "not empty", label, same device as parent)."""
    if not path.is_dir():
        return "missing", None, False
    try:
        label = read_label(path)
    except StoreError as e:
        raise StoreRefused(str(e)) from e
    if label is not None:
        return "labelled", label, False
    if not is_empty_dir(path):
        return "not empty", None, False
    return "empty", None, same_device_as_parent(path)


def _refuse_label(path: Path, label: Label, pool_id: str) -> None:
    if label.pool_id != pool_id:
        raise StoreRefused(f"{path} is labelled for another pool ({label.pool_name}, {label.pool_id}); "
                           "Shoal never writes to another pool's store")


def _snippet(path: Path, domain: str) -> str:
    return f"[[store]]\npath = {json.dumps(str(path))}\ndomain = {json.dumps(domain)}\n"


def _record_at(records, path: Path):
    return next((r for r in records if r.path == str(path)), None)


def _active_domains(pool: Pool, records, without: str | None) -> dict[str, int]:
    out: dict[str, int] = {}
    for r in records:
        if r.admin != "active" or r.store_id == without:
            continue
        slot = pool.slots.get(r.store_id)
        d = slot.domain if slot is not None else r.domain
        out[d] = out.get(d, 0) + 1
    return out


def _new_slot(pool: Pool, path: Path, store_id: str, domain: str) -> StoreSlot:
    sio = pool.cfg.store_io
    store = Store(path=path, pool_id=pool.pool_id, store_id=store_id, deadline=sio.deadline, concurrency=sio.concurrency)
    return StoreSlot(store=store, store_id=StoreId(store_id), path=str(path), domain=domain)


def _recount_cap(pool: Pool) -> None:
    pool.cap = spread_cap(pool.n, len({s.domain for s in pool.slots.values() if s.admin == "active"}))


async def _maybe_wait(pool: Pool, repairer: Repairer | None, wait: bool, progress: Progress | None) -> dict | None:
    if repairer is not None:
        repairer.kick()
    if not wait:
        return None
    rep = repairer or Repairer(pool)
    return await rep.run_until_empty(progress)


# ---------------------------------------------------------------- add

async def add_store(target: Pool | PoolConfig, path: str | os.PathLike, domain: str | None = None, *,
                    repairer: Repairer | None = None) -> StoreChange:
    """Label the empty directory PATH as a new store of the pool and add it to
    the catalog (and, with an open pool, to its slots). Refuses a path that
    is already in the pool, overlaps state_dir or another store, or is not
    an empty directory or is another pool's store."""
    if isinstance(target, PoolConfig):
        from .catalog import Catalog

        cfg = target
        catalog = await trio.to_thread.run_sync(lambda: Catalog(cfg.catalog_path))
        try:
            db = lambda fn, *a, **kw: trio.to_thread.run_sync(lambda: fn(*a, **kw))  # noqa: E731
            return await _add(cfg, catalog, db, None, path, domain, repairer)
        finally:
            await trio.to_thread.run_sync(catalog.close)
    return await _add(target.cfg, target.catalog, target.db, target, path, domain, repairer)


async def _add(cfg: PoolConfig, catalog, db, pool: Pool | None, path, domain, repairer) -> StoreChange:
    p = await _resolved(path)
    pool_id = await db(lambda: catalog.pool_id)
    records = await db(catalog.stores)
    configured = next((s for s in cfg.stores if s.path == p), None)
    if domain is not None and not str(domain).strip():
        raise StoreRefused("the domain is empty: name the host, shelf or site, or leave --domain out")
    if domain is not None and configured is not None and configured.domain != domain:
        raise StoreRefused(f"{cfg.source} gives {p} the domain {configured.domain!r}, not {domain!r}")
    domain = domain or (configured.domain if configured is not None else p.name or "store")
    state_dir = cfg.state_dir.resolve()
    if p == state_dir or state_dir in p.parents or p in state_dir.parents:
        raise StoreRefused(f"{p} overlaps the catalog's state_dir {state_dir}")
    for r in records:
        if "#" in r.path:
            continue  # a record set aside by replace
        other = Path(r.path)
        if r.path != str(p) and (other in p.parents or p in other.parents):
            raise StoreRefused(f"{p} and store {r.path} would nest; stores must not")
    aside = None
    existing = _record_at(records, p)
    if existing is not None:
        if existing.admin in ("retired", "failed") and not await db(catalog.store_shard_count, existing.store_id):
            aside = existing  # its path is free for a new store
        else:
            raise StoreRefused(f"{p} is already store {existing.store_id} of this pool ({existing.admin})"
                               + ("; to put a new disk in its place use `shoal store replace`" if existing.admin != "retired" else ""))
    kind, label, same_dev = await _in_dir_thread(_look, p)
    if kind == "missing":
        raise StoreRefused(f"{p} does not exist or is not a directory: create it, or mount its disk")
    if kind == "labelled":
        _refuse_label(p, label, pool_id)
        raise StoreRefused(f"{p} is already labelled as store {label.store_id} of this pool")
    if kind == "not empty":
        raise StoreRefused(f"{p} is not empty and has no Shoal label; Shoal adds only an empty directory "
                           "(is another disk mounted here?)")
    warnings = []
    if same_dev:
        warnings.append(f"{p} is on the same filesystem as its parent: if it should be a disk's mount point, "
                        "that disk is not mounted")
    pool_name = await db(catalog.get_meta, "pool_name", cfg.name)
    new = Label.new(pool_id=pool_id, pool_name=pool_name)
    await _in_dir_thread(write_label, p, new)
    if aside is not None:
        await db(catalog.update_store, aside.store_id, path=f"{aside.path}#{aside.store_id}")
    await db(catalog.add_store, store_id=new.store_id, path=str(p), domain=domain)
    log.info("store %s added as %s in domain %s", p, new.store_id, domain)
    if pool is not None:
        slot = _new_slot(pool, p, new.store_id, domain)
        await probe_slot(slot, deadline=cfg.store_io.probe_deadline)
        pool.slots[StoreId(new.store_id)] = slot
        _recount_cap(pool)
        if repairer is not None:
            repairer.kick()
    snippet = _snippet(p, domain)
    msg = (f"store {p} added to pool {cfg.name} as {new.store_id} (domain {domain})."
           + ("" if configured is not None else f" Add this table to {cfg.source} so that the pool keeps it:\n{snippet}"))
    return StoreChange(action="added", store_id=new.store_id, path=str(p), domain=domain, message=msg,
                       config_snippet=snippet, warnings=tuple(warnings))


# ---------------------------------------------------------------- replace

async def replace_store(target: Pool | PoolConfig, path: str | os.PathLike, *, repairer: Repairer | None = None,
                        wait: bool = False, progress: Progress | None = None,
                        allow_same_filesystem: bool = False) -> StoreChange:
    """A new empty directory (disk) at PATH takes the place of the store that
    was there; everything the old store held is queued for rebuilding onto
    it. Refuses when PATH is not a store of this pool, when the old store is
    still there with its label, when PATH is not empty or is foreign, and,
    unless allow_same_filesystem, when PATH is on its parent's filesystem
    (most often: the new disk is not mounted yet, and the rebuild would fill
    the filesystem below the mount point)."""
    async with _pool_of(target) as pool:
        p = await _resolved(path)
        records = await pool.db(pool.catalog.stores)
        old = _record_at(records, p)
        if old is None or old.admin == "retired":
            raise StoreRefused(f"{p} is not a store of pool {pool.cfg.name}"
                               + (" (it was retired)" if old is not None else "") + "; to add a new store use `shoal store add`")
        kind, label, same_dev = await _in_dir_thread(_look, p)
        if kind == "missing":
            raise StoreRefused(f"{p} does not exist or is not a directory: mount the new disk there first")
        if same_dev and not allow_same_filesystem:
            raise StoreRefused(f"{p} is on the same filesystem as its parent: if the new disk should be mounted "
                               "there, it is not (mount it first); if the store is meant to be a plain directory, "
                               "allow it explicitly (--allow-same-filesystem)")
        if kind == "not empty":
            raise StoreRefused(f"{p} is not empty and has no Shoal label; the replacement must be an empty directory")
        if kind == "labelled":
            _refuse_label(p, label, pool.pool_id)
            known = {r.store_id for r in records}
            if label.store_id == old.store_id:
                raise StoreRefused(f"store {old.store_id} is still at {p} with its label: nothing to replace "
                                   "(to stop using it, `shoal store fail` or `shoal store retire` it)")
            if label.replaces != old.store_id or label.store_id in known:
                raise StoreRefused(f"{p} holds the label of store {label.store_id}, not a replacement of {old.store_id}")
            new = label  # a replace that stopped after labelling: finish it
        else:
            new = Label.new(pool_id=pool.pool_id, pool_name=await pool.db(pool.catalog.get_meta, "pool_name", pool.cfg.name),
                            replaces=old.store_id)
            await _in_dir_thread(write_label, p, new)
        moved = await pool.db(pool.catalog.replace_store_record, old.store_id, new.store_id, path=str(p),
                              old_path=f"{p}#replaced-by-{new.store_id}")
        old_slot = pool.slots.get(old.store_id)
        domain = old_slot.domain if old_slot is not None else old.domain
        slot = _new_slot(pool, p, new.store_id, domain)
        await probe_slot(slot, deadline=pool.cfg.store_io.probe_deadline)
        pool.slots.pop(old.store_id, None)
        pool.slots[StoreId(new.store_id)] = slot
        _recount_cap(pool)
        log.warning("store %s: %s replaced by %s; %d shards queued for rebuilding onto it", p, old.store_id,
                    new.store_id, moved)
        queued = await pool.db(pool.catalog.repair_queue_length)
        stats = await _maybe_wait(pool, repairer, wait, progress)
        return StoreChange(action="replaced", store_id=new.store_id, path=str(p), domain=domain, replaces=old.store_id,
                           queued_stripes=queued, shards_repointed=moved, repair=stats,
                           message=f"{p} is now store {new.store_id}, replacing {old.store_id}: "
                                   f"{moved} shards to rebuild onto it")


# ---------------------------------------------------------------- retire and fail

async def retire_store(target: Pool | PoolConfig, path: str | os.PathLike, *, repairer: Repairer | None = None,
                       wait: bool = False, progress: Progress | None = None) -> StoreChange:
    """Drain the store at PATH and retire it. Refuses when the other active
    stores cannot hold n shards per stripe under the spread rule, or have
    less free space than the shards to move. Calling it again on a retiring
    store continues the drain."""
    async with _pool_of(target) as pool:
        p = await _resolved(path)
        records = await pool.db(pool.catalog.stores)
        rec = _record_at(records, p)
        if rec is None:
            raise StoreRefused(f"{p} is not a store of pool {pool.cfg.name}")
        if rec.admin == "retired":
            raise StoreRefused(f"store {p} is already retired: remove its [[store]] table from {pool.cfg.source}")
        if rec.admin == "failed":
            raise StoreRefused(f"store {p} is failed: its shards are being rebuilt elsewhere; `shoal store replace` puts a new disk there")
        slot = pool.slots.get(rec.store_id)
        if rec.admin == "active":
            left = _active_domains(pool, records, rec.store_id)
            short = spread_shortfall(pool.n, left) if left else pool.n
            if sum(left.values()) < pool.n or short:
                cap = spread_cap(pool.n, len(left))
                raise StoreRefused(
                    f"retiring {p} would leave {sum(left.values())} active stores in {len(left)} domains, which cannot "
                    f"hold n = {pool.n} shards per stripe with at most {cap} per domain ({short or pool.n - sum(left.values())} short): "
                    "add a store first (`shoal store add`), or put a new disk in its place (`shoal store replace`)")
            need = await pool.db(pool.catalog.store_payload_bytes, rec.store_id)
            room = sum(s.free_bytes for s in pool.slots.values() if s.writable and s.store_id != rec.store_id)
            if need > room:
                raise StoreRefused(
                    f"retiring {p} would move {need / 2**20:.1f} MiB of shards, but the other writable stores have "
                    f"{room / 2**20:.1f} MiB free: add a store first (`shoal store add`), or free space on them")
            await pool.db(pool.catalog.update_store, rec.store_id, admin="retiring")
            if slot is not None:
                slot.admin = "retiring"
                apply_admin(slot, "admin_retire", "retiring: its shards move to other stores")
            _recount_cap(pool)
        queued = await pool.db(pool.catalog.queue_store_stripes, rec.store_id, "store-retiring")
        stats = await _maybe_wait(pool, repairer, wait, progress)
        if wait:
            await (repairer or Repairer(pool)).finish_drains()
        left_shards = await pool.db(pool.catalog.store_shard_count, rec.store_id)
        done = left_shards == 0 and wait
        if left_shards == 0 and not wait:
            await (repairer or Repairer(pool)).finish_drains()
            done = True
        return StoreChange(
            action="retired" if done else "retiring", store_id=rec.store_id, path=str(p), domain=rec.domain,
            queued_stripes=queued, repair=stats,
            message=(f"store {p} is drained and retired: remove its [[store]] table from {pool.cfg.source}" if done else
                     f"store {p} is retiring: {left_shards} shards to move off it; it is retired when none is left"))


async def fail_store(target: Pool | PoolConfig, path: str | os.PathLike, *, repairer: Repairer | None = None,
                     wait: bool = False, progress: Progress | None = None) -> StoreChange:
    """Declare the store at PATH failed: it is never read or written again
    and its shards are rebuilt on the other stores."""
    async with _pool_of(target) as pool:
        p = await _resolved(path)
        records = await pool.db(pool.catalog.stores)
        rec = _record_at(records, p)
        if rec is None:
            raise StoreRefused(f"{p} is not a store of pool {pool.cfg.name}")
        if rec.admin in ("failed", "retired"):
            raise StoreRefused(f"store {p} is already {rec.admin}")
        await pool.db(pool.catalog.update_store, rec.store_id, admin="failed")
        slot = pool.slots.get(rec.store_id)
        if slot is not None:
            slot.admin = "failed"
            apply_admin(slot, "admin_fail", "declared failed by the administrator")
        _recount_cap(pool)
        warnings = []
        left = _active_domains(pool, records, rec.store_id)
        if sum(left.values()) < pool.n or (left and spread_shortfall(pool.n, left)):
            warnings.append(f"the {sum(left.values())} other active stores cannot hold n = {pool.n} shards per stripe "
                            "under the spread rule: rebuilt stripes may stay short of n or exceed a domain's cap")
        if pool.read_only:
            warnings.append(f"the pool is read-only: {pool.writable_count()} stores writable, w = {pool.w}")
        queued = await pool.db(pool.catalog.queue_store_stripes, rec.store_id, "store-failed")
        log.warning("store %s declared failed; %d stripes queued for repair", p, queued)
        stats = await _maybe_wait(pool, repairer, wait, progress)
        return StoreChange(action="failed", store_id=rec.store_id, path=str(p), domain=rec.domain, queued_stripes=queued,
                           repair=stats, warnings=tuple(warnings),
                           message=f"store {p} is failed; {queued} stripes queued to rebuild its shards elsewhere")


# ---------------------------------------------------------------- the daemon's control socket

def control_handlers(pool: Pool, repairer: Repairer, scrubber=None) -> dict:
    """The control-socket ops of this layer, for the daemon: op name -> async
    handler taking the request's args as keywords and returning plain data.

    repair(kick=True, wait=0): wake the repair worker (unless kick is false);
    with wait, first wait up to that many seconds (at most 10) for it to
    settle (nothing queued that it could do now); its statistics.
    scrub(start=True): start a pass unless one runs; the scrubber's statistics
    (only when a scrubber is given).
    store_add(path, domain=None), store_replace(path, allow_same_filesystem=False),
    store_retire(path), store_fail(path): StoreChange.as_dict(); the repair
    worker does the rebuilding or draining in the background.
    """
    async def repair(kick: bool = True, wait: float = 0, **_) -> dict:
        if kick:
            repairer.kick()
        if wait > 0:
            await repairer.wait_settled(min(float(wait), 10.0))
        return repairer.statistics()

    async def scrub(start: bool = True, **_) -> dict:
        if start and not scrubber.running:
            scrubber.request()
        return scrubber.statistics()

    async def store_add(path: str, domain: str | None = None, **_) -> dict:
        return (await add_store(pool, path, domain, repairer=repairer)).as_dict()

    async def store_replace(path: str, allow_same_filesystem: bool = False, **_) -> dict:
        return (await replace_store(pool, path, repairer=repairer, allow_same_filesystem=allow_same_filesystem)).as_dict()

    async def store_retire(path: str, **_) -> dict:
        return (await retire_store(pool, path, repairer=repairer)).as_dict()

    async def store_fail(path: str, **_) -> dict:
        return (await fail_store(pool, path, repairer=repairer)).as_dict()

    ops = {"repair": repair, "scrub": scrub, "store_add": store_add, "store_replace": store_replace,
           "store_retire": store_retire, "store_fail": store_fail}
    if scrubber is None:
        del ops["scrub"]
    return ops


def as_control_op(fn):
    """Adapt a keyword handler to the daemon's ControlServer, which calls
    handler(args: dict); unknown or missing arguments become a ControlError."""
    from .errors import ControlError

    async def handler(args: dict):
        try:
            return await fn(**(args or {}))
        except TypeError as e:
            raise ControlError(f"bad arguments {sorted(args or {})}: {e}") from None
    return handler


__all__ = ["StoreChange", "StoreRefused", "add_store", "as_control_op", "control_handlers", "fail_store", "lone_error", "opened", "replace_store",
           "retire_store"]

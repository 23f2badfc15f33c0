"""Offline recovery tools: ``recover`` (rebuild a lost catalog), ``export``
(copy files out with no daemon and no mount) and ``check`` (consistency of
the catalog against the stores, with safe repairs).

They need only the pool config and the stores. None of them writes to a
store except ``check(repair=True)`` deleting unreferenced shards past their
grace; ``export`` only reads, so it is safe beside a mounted pool.

recover, step by step:

1. Refuse if state_dir holds a healthy catalog (unless force: it is then
   moved aside, never deleted). A missing catalog is fine; a corrupt one
   is moved aside to ``catalog.sqlite.corrupt-<time>`` and the report says so.
2. Read every configured store's label. The pool is the one most labels
   name (ties: the one named like the config); stores of another pool are
   ignored with a warning.
3. List the mirrors (see gateway.mirror), ignoring those of another pool
   with a warning, and verify copies newest first: sidecar, BLAKE3 of the
   file, SQLite quick_check, pool id and generation inside. Take the newest
   (generation, checksum) held by more than half of the reachable stores;
   if none is, the newest valid copy, and say so. Newer valid mirrors that
   were passed over are named in the report (``generation=`` picks one).
4. Scan every shard header on the reachable stores. For each stripe take
   the highest version newer than the mirror's with at least k shards whose
   headers are valid and agree (k, n, length); versions the mirror lists as
   garbage are never taken. Shards the mirror places wrongly are pointed at
   the store that holds them; shards absent from a reachable store are
   marked missing and queued for repair. Files the mirror does not know come
   back as ``/lost+found/<file id>`` (mode 0600, owner root, mtime of their
   newest shard). next_version rises past every version found.
5. The rebuilt catalog is written under a temporary name and renamed into
   place last, so an interrupted recover leaves no half-built catalog.

The report says what came from the mirror, what came from headers, which
stripes cannot be read (fewer than k shards found) and which came back at
an older version than one seen on the stores.

Part of the pool layer: it uses catalog, store, codec, stripeio and mirror.
"""
from __future__ import annotations

import os
import secrets
import shutil
import stat
import tempfile
import time
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import trio

from . import codec
from .catalog import ROOT, Catalog, Inode, NewStripe, ShardLoc, StripeRecord
from .config import PoolConfig
from .errors import (
    CatalogError, Exists, NotFound, PoolUnavailable, ShardError, ShoalError, StoreError, StripeLost,
)
from .ids import FileId, PoolId, StoreId
from .mirror import MirrorMeta, file_checksum, parse_mirror_name, mirror_names
from .store import Label, ShardName, Store
from .stripeio import StoreSlot, StripeIO, StripeRef


Progress = Callable[[str, int, "int | None"], None]  # (phase, done, total or None)
LOST_AND_FOUND = b"lost+found"


class RecoveryRefused(ShoalError):
    """The tool will not run as asked (an existing catalog or destination); nothing was changed."""


class ExportFailed(ShoalError):
    """Writing the destination failed (the OSError is the cause); files already
    exported stay, the one being written is removed."""


def _noop(phase: str, done: int, total: int | None) -> None:
    pass


LOCK_NAME = "daemon.lock"  # the daemon holds an exclusive flock on state_dir/daemon.lock while it serves


def _lock(state_dir: Path, what: str) -> int:
    import fcntl

    state_dir.mkdir(parents=True, exist_ok=True)
    fd = os.open(state_dir / LOCK_NAME, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o600)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        holder = os.pread(fd, 200, 0).decode(errors="replace").strip()
        os.close(fd)
        raise RecoveryRefused(f"the pool is in use ({holder or 'by another process'}): unmount it before {what}") from None
    os.ftruncate(fd, 0)
    os.pwrite(fd, f"pid {os.getpid()} ({what})\n".encode(), 0)
    return fd


class _Exclusive:
    """Hold the pool's lock, so that no daemon serves it meanwhile (and refuse if one does)."""

    def __init__(self, cfg: PoolConfig, what: str):
        self.cfg, self.what, self.fd = cfg, what, -1

    async def __aenter__(self):
        self.fd = await trio.to_thread.run_sync(_lock, self.cfg.state_dir, self.what)
        return self

    async def __aexit__(self, *exc):
        await trio.to_thread.run_sync(os.close, self.fd)


# ---------------------------------------------------------------- stores

@dataclass(eq=False, kw_only=True)
class StoreView:
    path: str
    domain: str
    label: Label | None = None
    store: Store | None = None  # set when the store belongs to the pool and answers
    problem: str | None = None

    @property
    def store_id(self) -> StoreId | None:
        return StoreId(self.label.store_id) if self.label else None


async def survey_stores(cfg: PoolConfig, pool_id: str | None = None) -> tuple[str | None, list[StoreView], list[str]]:
    """Read the label of every configured store. Returns (pool id, views,
    warnings). Without pool_id, the pool is the one most labels name."""
    views = [StoreView(path=str(sc.path), domain=sc.domain) for sc in cfg.stores]
    warnings: list[str] = []

    async def one(v: StoreView) -> None:
        probe = Store(path=Path(v.path), pool_id=pool_id or "", deadline=cfg.store_io.deadline, concurrency=1)
        try:
            v.label = await probe.read_label()
            if v.label is None:
                v.problem = "has no Shoal label (a disk that is not mounted?)"
        except StoreError as e:
            v.problem = e.problem

    async with trio.open_nursery() as nursery:
        for v in views:
            nursery.start_soon(one, v)
    if pool_id is None:
        votes = Counter(v.label.pool_id for v in views if v.label)
        named = {v.label.pool_id for v in views if v.label and v.label.pool_name == cfg.name}
        if votes:
            pool_id = max(votes, key=lambda p: (votes[p], p in named, p))
    for v in views:
        if v.label is None:
            if v.problem:
                warnings.append(f"store {v.path} is not usable: {v.problem}")
            continue
        if v.label.pool_id != pool_id:
            v.problem = f"labelled for another pool, {v.label.pool_name!r} ({v.label.pool_id})"
            warnings.append(f"store {v.path} is ignored: {v.problem}")
            continue
        v.store = Store(path=Path(v.path), pool_id=pool_id, store_id=v.label.store_id,
                        deadline=cfg.store_io.deadline, concurrency=cfg.store_io.concurrency)
    return pool_id, views, warnings


def _slots(views: list[StoreView]) -> dict[StoreId, StoreSlot]:
    """Read-only slots for StripeIO: no probe (a probe writes), the label was read."""
    return {v.store_id: StoreSlot(store=v.store, store_id=v.store_id, path=v.path, domain=v.domain, state="online",
                                  reason="label matches") for v in views if v.store is not None}


# ---------------------------------------------------------------- mirrors

@dataclass(kw_only=True)
class MirrorChoice:
    generation: int
    checksum: str
    pool_id: str
    time: float
    local_path: Path  # a verified local copy
    holders: list[str]  # stores holding a valid copy of it
    reachable: int  # stores of the pool that answered
    majority: bool
    passed_over: list[str] = field(default_factory=list)  # newer valid mirrors not taken, why
    rejected: list[str] = field(default_factory=list)  # copies that failed verification, why


def _verify_local(path: Path, meta: MirrorMeta, pool_id: str) -> str | None:
    """Blocking: None if the local copy is the mirror its sidecar describes."""
    digest, size = file_checksum(path)
    if size != meta.size or digest != meta.checksum:
        return "its checksum does not match its sidecar"
    try:
        ident = Catalog.inspect(path)
    except CatalogError as e:
        return str(e)
    if ident["pool_id"] != pool_id:
        return f"the database inside belongs to pool {ident['pool_id']}"
    if ident["generation"] != meta.generation:
        return f"the database inside is generation {ident['generation']}, not {meta.generation}"
    return None


async def choose_mirror(views: list[StoreView], pool_id: str, workdir: Path, *, generation: int | None = None,
                        progress: Progress = _noop) -> tuple[MirrorChoice | None, list[str], list[str]]:
    """Find, verify and choose a mirror (see the module docstring). Returns
    (choice or None, warnings, copies rejected and why). The chosen copy is
    left at choice.local_path."""
    warnings: list[str] = []
    live = [v for v in views if v.store is not None]
    copies: dict[tuple[int, str], list[tuple[StoreView, MirrorMeta]]] = {}
    rejected: list[str] = []

    async def listing(v: StoreView) -> None:
        try:
            names = {n for n, _, _ in await v.store.list_files()}
        except StoreError as e:
            warnings.append(f"cannot list the mirrors on {v.path}: {e.problem}")
            return
        for name in sorted(names):
            p = parse_mirror_name(name)
            if p is None or p[1] != "meta.json" or mirror_names(p[0])[0] not in names:
                continue
            try:
                meta = MirrorMeta.from_json(await v.store.get_file(name))
            except (ValueError, ShardError, StoreError) as e:
                rejected.append(f"{v.path}/catalog/{name}: unreadable sidecar ({e})")
                continue
            if meta.pool_id != pool_id:
                warnings.append(f"mirror {name} on {v.path} belongs to another pool ({meta.pool_name}, {meta.pool_id}): ignored")
                continue
            if meta.generation != p[0]:
                rejected.append(f"{v.path}/catalog/{name}: the sidecar says generation {meta.generation}")
                continue
            copies.setdefault((meta.generation, meta.checksum), []).append((v, meta))

    async with trio.open_nursery() as nursery:
        for v in live:
            nursery.start_soon(listing, v)
    groups = sorted(copies, key=lambda g: (g[0], len(copies[g])), reverse=True)
    if generation is not None:
        groups = [g for g in groups if g[0] == generation]
        if not groups:
            raise RecoveryRefused(f"no mirror of generation {generation} was found on the reachable stores")
    total = sum(len(c) for c in copies.values())
    done = 0
    verified: list[tuple[tuple[int, str], list[str], Path, MirrorMeta]] = []
    chosen = None
    for g in groups:
        holders, local = [], None
        for v, meta in copies[g]:
            dest = workdir / f"mirror-{secrets.token_hex(6)}.sqlite"
            try:
                await v.store.fetch_file_to(mirror_names(meta.generation)[0], dest)
                why = await trio.to_thread.run_sync(_verify_local, dest, meta, pool_id)
            except (ShoalError, OSError) as e:
                why = f"cannot be read ({e})"
            done += 1
            progress("verifying mirrors", done, total)
            if why is not None:
                rejected.append(f"{v.path}/catalog/{mirror_names(meta.generation)[0]}: {why}")
                await trio.to_thread.run_sync(_unlink_quietly, dest)
                continue
            holders.append(v.path)
            if local is None:
                local = dest
            else:
                await trio.to_thread.run_sync(_unlink_quietly, dest)
        if local is not None:
            verified.append((g, holders, local, copies[g][0][1]))
            if generation is not None or len(holders) * 2 > len(live):
                chosen = verified[-1]
                break
    majority = chosen is not None and len(chosen[1]) * 2 > len(live)
    if chosen is None and verified:
        chosen = max(verified, key=lambda x: (x[0][0], len(x[1])))
    if chosen is None:
        return None, warnings, rejected
    (gen, digest), holders, local, meta = chosen
    for g2, h2, path2, _ in verified:
        if path2 != local:
            await trio.to_thread.run_sync(_unlink_quietly, path2)
        if g2[0] > gen:
            rest = (f"held by {len(h2)} of {len(live)} reachable stores ({', '.join(h2)}), not a majority; "
                    f"recover with --generation {g2[0]} to take it")
            warnings.append(f"newer valid mirror of generation {g2[0]} was not taken: {rest}")
    choice = MirrorChoice(generation=gen, checksum=digest, pool_id=pool_id, time=meta.time, local_path=local,
                          holders=holders, reachable=len(live), majority=majority, rejected=rejected,
                          passed_over=[w for w in warnings if w.startswith("newer valid mirror")])
    if not majority and generation is None:
        warnings.append(f"no mirror is held by a majority of the {len(live)} reachable stores: took the newest valid "
                        f"one, generation {gen} ({len(holders)} copies)")
    return choice, warnings, rejected


# ---------------------------------------------------------------- header scan

@dataclass(frozen=True, kw_only=True)
class FoundShard:
    store_id: StoreId
    header: codec.ShardHeader
    mtime: float


Found = dict[tuple[str, int, int], dict[int, list[FoundShard]]]  # (file id, idx, version) -> shard -> copies


async def scan_headers(views: list[StoreView], pool_id: str, *, concurrency: int = 4,
                       progress: Progress = _noop) -> tuple[Found, dict[StoreId, dict], list[str]]:
    """Read the header of every shard on the reachable stores. Returns (found,
    listing per store {(file id, idx, version, shard): mtime}, problems)."""
    listings: dict[StoreId, dict] = {}
    problems: list[str] = []
    found: Found = {}

    async def lister(v: StoreView) -> None:
        try:
            listings[v.store_id] = {(n.file_id, n.stripe_index, n.version, n.shard_index): m
                                    for n, m in await v.store.list_shards()}
        except StoreError as e:
            problems.append(f"cannot list the shards on {v.path}: {e.problem}")
            v.store = None

    async with trio.open_nursery() as nursery:
        for v in views:
            if v.store is not None:
                nursery.start_soon(lister, v)
    total = sum(len(x) for x in listings.values())
    done = 0

    async def reader(v: StoreView, todo: list) -> None:
        nonlocal done
        while todo:
            key, mtime = todo.pop()
            fid, idx, ver, shard = key
            name = ShardName(file_id=fid, stripe_index=idx, version=ver, shard_index=shard)
            try:
                header, _ = codec.parse_header(await v.store.get_prefix(name, codec.MAX_HEADER_SIZE))
                want = (pool_id, fid, idx, ver, shard)
                have = (header.pool_id, header.file_id, header.stripe_index, header.stripe_version, header.shard_index)
                if have != want:
                    raise ShardError(f"header names {have[1]}.{have[2]}.{have[3]}.{have[4]} of pool {have[0]}")
                found.setdefault((fid, idx, ver), {}).setdefault(shard, []).append(
                    FoundShard(store_id=v.store_id, header=header, mtime=mtime))
            except (ShardError, StoreError) as e:
                problems.append(f"{v.path}/{name.relpath()}: {e}")
            done += 1
            if done % 64 == 0 or done == total:
                progress("reading shard headers", done, total)

    async with trio.open_nursery() as nursery:
        for v in views:
            if v.store is not None and v.store_id in listings:
                todo = list(listings[v.store_id].items())
                for _ in range(max(1, concurrency)):
                    nursery.start_soon(reader, v, todo)
    return found, listings, problems


def agreeing(copies: dict[int, list[FoundShard]]) -> tuple[dict[int, FoundShard], tuple[int, int, int] | None]:
    """The shards of one stripe version whose headers agree with most of the
    others on (k, n, stripe length): shard index -> one copy, and that shape."""
    votes = Counter((c.header.k, c.header.n, c.header.stripe_length) for cs in copies.values() for c in cs)
    if not votes:
        return {}, None
    shape = max(votes, key=lambda s: (votes[s], s))
    good = {}
    for i, cs in copies.items():
        for c in cs:
            if (c.header.k, c.header.n, c.header.stripe_length) == shape:
                good[i] = c
                break
    return good, shape


# ---------------------------------------------------------------- recover: the plan (pure)

@dataclass(frozen=True, kw_only=True)
class LostStripe:
    file_id: str
    idx: int
    version: int
    found: int  # shards with valid headers on reachable stores
    k: int
    path: str = ""  # filled in from the catalog when known
    note: str = ""


@dataclass(kw_only=True)
class RecoveryPlan:
    updates: dict[int, list[NewStripe]] = field(default_factory=dict)  # ino -> newer stripes from headers
    sizes: dict[int, int] = field(default_factory=dict)  # ino -> new size
    new_files: dict[str, tuple[list[NewStripe], int, int]] = field(default_factory=dict)  # fid -> (stripes, size, mtime_ns)
    states: list[tuple[int, int, int, int, str | None, str]] = field(default_factory=list)  # set_shard_states items
    relocated: int = 0
    marked_missing: int = 0
    unrecoverable: list[LostStripe] = field(default_factory=list)
    stale: list[LostStripe] = field(default_factory=list)  # came back at an older version
    unreadable_files: list[str] = field(default_factory=list)  # unknown files with no readable stripe
    max_version: int = 0


def _new_stripe(idx: int, version: int, good: dict[int, FoundShard], shape: tuple[int, int, int]) -> NewStripe:
    k, n, length = shape
    shards = tuple(ShardLoc(shard=i, store_id=good[i].store_id if i in good else None,
                            state="ok" if i in good else "missing") for i in range(n))
    return NewStripe(idx=idx, version=version, length=length, coded_length=length, k=k, n=n, shards=shards)


def plan_recovery(*, mirror: dict[tuple[str, int], StripeRecord], files: dict[str, tuple[int, int]],
                  garbage: set[tuple[str, int, int]], found: Found, reachable: set[str],
                  stripe_size: int) -> RecoveryPlan:
    """Decide what the rebuilt catalog holds. mirror: (file id, idx) -> the
    mirror's stripe; files: file id -> (ino, size) from the mirror; garbage:
    (file id, idx, version) the mirror lists for deletion; found: the header
    scan; reachable: store ids that were scanned.

    A stripe with fewer than k shards inside a file's size gets a row with
    the shards that were found, so reading it fails (EIO) instead of
    returning zeros; every such stripe is listed in plan.unrecoverable."""
    plan = RecoveryPlan()
    versions: dict[tuple[str, int], list[int]] = {}
    for (fid, idx, ver) in found:
        plan.max_version = max(plan.max_version, ver)
        if (fid, idx, ver) not in garbage:
            versions.setdefault((fid, idx), []).append(ver)
    readable: dict[str, dict[int, NewStripe]] = {}  # newer than the mirror, >= k shards
    lost: dict[str, dict[int, tuple[NewStripe | None, LostStripe]]] = {}  # not in the mirror, < k shards
    for key in sorted(set(mirror) | set(versions)):
        fid, idx = key
        rec = mirror.get(key)
        base = rec.version if rec else 0
        chosen = None
        skipped: list[tuple[int, int, int]] = []  # (version, shards found, k)
        for ver in sorted((v for v in versions.get(key, ()) if v > base), reverse=True):
            good, shape = agreeing(found[(fid, idx, ver)])
            if shape and len(good) >= shape[0]:
                chosen = _new_stripe(idx, ver, good, shape)
                break
            skipped.append((ver, len(good), shape[0] if shape else 0))
        if chosen is not None:
            readable.setdefault(fid, {})[idx] = chosen
            continue
        if rec is None:
            ver, got, k = skipped[0]
            good, shape = agreeing(found[(fid, idx, ver)])
            row = _new_stripe(idx, ver, good, shape) if shape else None
            lost.setdefault(fid, {})[idx] = (row, LostStripe(file_id=fid, idx=idx, version=ver, found=got, k=k))
            continue
        _reconcile(plan, fid, rec, found, reachable)
        for ver, got, k in skipped[:1]:
            plan.stale.append(LostStripe(
                file_id=fid, idx=idx, version=rec.version, found=got, k=k,
                note=f"a newer version {ver} was found with only {got} of k={k} shards "
                     "(a write that never completed, or shards lost)"))
    last_known: dict[str, int] = {}
    for (fid, idx) in mirror:
        last_known[fid] = max(last_known.get(fid, -1), idx)
    for fid in sorted(set(readable) | set(lost)):
        new = readable.get(fid, {})
        gone = lost.get(fid, {})
        if fid in files:
            ino, size = files[fid]
            last_idx = max([last_known.get(fid, -1), *new])
            if last_idx in new:  # a newer last stripe says where the file ends now
                size = last_idx * stripe_size + new[last_idx].length
                plan.sizes[ino] = size
        elif new:
            last = new[max(new)]
            size = last.idx * stripe_size + last.length
        else:
            plan.unreadable_files.append(fid)  # nothing of it can be read: not brought back
            plan.unrecoverable.extend(ls for _, ls in gone.values())
            continue
        rows = dict(new)
        for idx, (row, ls) in gone.items():
            inside = idx * stripe_size < size
            if inside and row is not None:
                rows[idx] = row
            plan.unrecoverable.append(ls if inside else LostStripe(
                file_id=ls.file_id, idx=ls.idx, version=ls.version, found=ls.found, k=ls.k,
                note="past the end of the file as recovered: not brought back"))
        stripes = [rows[i] for i in sorted(rows)]
        if fid in files:
            plan.updates[files[fid][0]] = stripes
        else:
            mtime = max(c.mtime for s in stripes for cs in found[(fid, s.idx, s.version)].values() for c in cs)
            plan.new_files[fid] = (stripes, size, int(mtime * 1e9))
    # A file of the mirror with no shard left anywhere was most likely deleted after the mirror.
    lost_by_file: dict[str, list[LostStripe]] = {}
    for ls in plan.unrecoverable:
        lost_by_file.setdefault(ls.file_id, []).append(ls)
    stripe_count = Counter(fid for fid, _ in mirror)
    for fid, items in lost_by_file.items():
        if len(items) == stripe_count[fid] and all(ls.found == 0 and not ls.note for ls in items):
            note = "no shard of this file is on any reachable store: was it deleted after the mirror was taken?"
            plan.unrecoverable = [LostStripe(file_id=ls.file_id, idx=ls.idx, version=ls.version, found=0, k=ls.k,
                                             note=note) if ls.file_id == fid else ls for ls in plan.unrecoverable]
    return plan


def _reconcile(plan: RecoveryPlan, fid: str, rec: StripeRecord, found: Found, reachable: set[str]) -> None:
    """The mirror's version of a stripe stays: point its shards at the stores
    that hold them, mark absent ones missing, list it if it cannot be read."""
    good, shape = agreeing(found.get((fid, rec.idx, rec.version), {}))
    if shape and shape != (rec.k, rec.n, rec.coded_length):
        good = {}  # headers that disagree with the catalog are not this stripe's shards
    for loc in rec.shards:
        have = good.get(loc.shard)
        if have is not None:
            if have.store_id != loc.store_id or loc.state != "ok":
                plan.states.append((rec.ino, rec.idx, rec.version, loc.shard, have.store_id, "ok"))
                plan.relocated += have.store_id != loc.store_id
        elif loc.state == "ok" and (loc.store_id is None or loc.store_id in reachable):
            plan.states.append((rec.ino, rec.idx, rec.version, loc.shard, None, "missing"))
            plan.marked_missing += 1
    if len(good) < rec.k:
        away = sum(1 for loc in rec.shards if loc.shard not in good and loc.store_id is not None
                   and loc.store_id not in reachable)
        plan.unrecoverable.append(LostStripe(
            file_id=fid, idx=rec.idx, version=rec.version, found=len(good), k=rec.k,
            note=f"{away} more may be on stores that were not reachable" if away else ""))


# ---------------------------------------------------------------- recover

@dataclass(kw_only=True)
class RecoverReport:
    pool_id: str
    mirror_generation: int | None  # None: no valid mirror, the namespace came from headers only
    mirror_holders: list[str]
    mirror_majority: bool
    mirror_time: float | None
    files_from_mirror: int = 0
    stripes_from_mirror: int = 0
    stripes_from_headers: int = 0  # newer versions of stripes the mirror knew, or new stripes of its files
    files_in_lost_and_found: list[str] = field(default_factory=list)  # "/lost+found/<file id>"
    shards_relocated: int = 0
    shards_marked_missing: int = 0
    stores_scanned: list[str] = field(default_factory=list)
    shards_scanned: int = 0
    unrecoverable: list[LostStripe] = field(default_factory=list)
    stale: list[LostStripe] = field(default_factory=list)
    unreadable_files: list[str] = field(default_factory=list)
    left_alone: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    moved_aside: str | None = None
    mirrors_rejected: list[str] = field(default_factory=list)  # copies that failed verification, and why

    @property
    def complete(self) -> bool:
        """Everything the stores hold came back readable."""
        return not self.unrecoverable and not self.unreadable_files


def local_catalog_state(path: Path) -> tuple[str, str]:
    """("missing" | "healthy" | "corrupt", detail). Blocking."""
    if not path.exists() and not Path(f"{path}-wal").exists():
        return "missing", f"no catalog at {path}"
    try:
        ident = Catalog.inspect(path)
    except CatalogError as e:
        return "corrupt", str(e)
    return "healthy", f"catalog {path} of pool {ident['pool_id']} at generation {ident['generation']}"


def _move_aside(path: Path, why: str) -> str:
    stamp = time.strftime("%Y%m%d-%H%M%S")
    dest = path.with_name(f"{path.name}.{why}-{stamp}")
    for suffix in ("", "-wal", "-shm"):
        src = Path(f"{path}{suffix}")
        if src.exists():
            os.rename(src, f"{dest}{suffix}")
    _fsync_dir(path.parent)
    return str(dest)


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _unlink_quietly(path: Path) -> None:
    try:
        os.unlink(path)
    except FileNotFoundError:
        pass


async def recover(cfg: PoolConfig, *, force: bool = False, generation: int | None = None,
                  progress: Progress | None = None) -> RecoverReport:
    """Rebuild state_dir's catalog from the stores (see the module docstring).

    Raises RecoveryRefused (a healthy catalog is there and not force; no
    store of the pool answers), CatalogError. The pool must not be mounted.
    """
    progress = progress or _noop
    async with _Exclusive(cfg, "recovering its catalog"):
        return await _recover(cfg, force, generation, progress)


async def _recover(cfg: PoolConfig, force: bool, generation: int | None, progress: Progress) -> RecoverReport:
    state, detail = await trio.to_thread.run_sync(local_catalog_state, cfg.catalog_path)
    if state == "healthy" and not force:
        raise RecoveryRefused(f"{detail} looks healthy: recover replaces it only with --force "
                              "(it is then moved aside, not deleted)")
    pool_id, views, warnings = await survey_stores(cfg)
    live = [v for v in views if v.store is not None]
    if pool_id is None or not live:
        raise RecoveryRefused("no configured store carries a Shoal label: nothing to recover from ("
                              + "; ".join(f"{v.path}: {v.problem}" for v in views) + ")")
    work = cfg.state_dir / f".recover-{secrets.token_hex(6)}"
    await trio.to_thread.run_sync(work.mkdir)
    try:
        choice, more, rejected = await choose_mirror(views, pool_id, work, generation=generation, progress=progress)
        warnings += more
        found, listings, problems = await scan_headers(views, pool_id, concurrency=cfg.store_io.concurrency,
                                                       progress=progress)
        report = RecoverReport(pool_id=pool_id, mirror_generation=choice.generation if choice else None,
                               mirror_holders=choice.holders if choice else [],
                               mirror_majority=choice.majority if choice else False,
                               mirror_time=choice.time if choice else None, warnings=warnings)
        report.stores_scanned = [v.path for v in views if v.store is not None]
        report.mirrors_rejected = rejected
        report.shards_scanned = sum(len(x) for x in listings.values())
        if problems:
            report.left_alone.append(f"{len(problems)} shard files with unreadable or foreign headers were left "
                                     f"where they are (first: {problems[0]})")
        if choice is None:
            report.warnings.append("no valid catalog mirror was found: the namespace is lost, every file comes back "
                                   "under /lost+found by its file id")
        progress("rebuilding the catalog", 0, None)
        target = work / "catalog.sqlite"
        await trio.to_thread.run_sync(
            _rebuild, cfg, pool_id, choice, target, found, views, report)
        if state != "missing":
            report.moved_aside = await trio.to_thread.run_sync(
                _move_aside, cfg.catalog_path, "replaced" if state == "healthy" else "corrupt")
            report.warnings.append(f"the previous catalog ({detail}) was moved aside to {report.moved_aside}")
        await trio.to_thread.run_sync(_install, target, cfg.catalog_path)
        progress("rebuilding the catalog", 1, 1)
        return report
    finally:
        await trio.to_thread.run_sync(shutil.rmtree, work, True)


def _install(src: Path, dest: Path) -> None:
    for suffix in ("-wal", "-shm"):
        if Path(f"{src}{suffix}").exists():
            raise CatalogError(f"the rebuilt catalog {src} was not closed cleanly (a {suffix} file is left)")
    os.rename(src, dest)
    _fsync_dir(dest.parent)


def _rebuild(cfg: PoolConfig, pool_id: str, choice: MirrorChoice | None, target: Path, found: Found,
             views: list[StoreView], report: RecoverReport) -> None:
    """Blocking: build the catalog at target from the mirror and the headers."""
    if choice is not None:
        os.rename(choice.local_path, target)
        catalog = Catalog(target)
    else:
        catalog = Catalog(target, create=True)
        catalog.initialise(pool_id=pool_id, name=cfg.name, k=cfg.k, n=cfg.n, stripe_size=cfg.stripe_size)
    try:
        if catalog.pool_id != pool_id:
            raise CatalogError(f"the mirror belongs to pool {catalog.pool_id}, the stores to {pool_id}")
        stripe_size = int(catalog.get_meta("stripe_size", cfg.stripe_size))
        _sync_stores(catalog, views)
        stripes = catalog.all_stripes()
        mirror = {(fid, rec.idx): rec for fid, rec in stripes if fid is not None}
        sizes = {n.ino: n.size for n in catalog.all_inodes() if n.file_id is not None}
        files = {fid: (ino, sizes[ino]) for fid, ino in catalog.file_ids().items()}
        garbage = {(g.file_id, g.idx, g.version) for g in catalog.garbage(1 << 62)}
        reachable = {v.store_id for v in views if v.store is not None}
        plan = plan_recovery(mirror=mirror, files=files, garbage=garbage, found=found, reachable=reachable,
                             stripe_size=stripe_size)
        report.files_from_mirror = len(files)
        report.stripes_from_mirror = len(mirror)
        for ino, new in plan.updates.items():
            catalog.restore_stripes(ino, new, size=plan.sizes.get(ino))
            report.stripes_from_headers += len(new)
        if plan.states:
            catalog.set_shard_states(plan.states)
            catalog.queue_repair(sorted({(ino, idx, "missing-at-recover")
                                         for ino, idx, _, _, _, st in plan.states if st == "missing"}))
        report.shards_relocated, report.shards_marked_missing = plan.relocated, plan.marked_missing
        if plan.new_files:
            lf = _lost_and_found(catalog)
            for fid, (new, size, mtime_ns) in plan.new_files.items():
                node = _adopt(catalog, lf, fid, mtime_ns)
                catalog.restore_stripes(node.ino, new, size=size)
                report.files_in_lost_and_found.append(f"/{LOST_AND_FOUND.decode()}/{node_name(catalog, node.ino)}")
                report.stripes_from_headers += len(new)
        catalog.raise_next_version(plan.max_version + 1)
        inos = catalog.file_ids()
        named = []
        for ls in plan.unrecoverable:
            ino = inos.get(ls.file_id)
            path = catalog.path_of(ino) if ino is not None else None
            named.append(LostStripe(file_id=ls.file_id, idx=ls.idx, version=ls.version, found=ls.found, k=ls.k,
                                    note=ls.note, path=path.decode(errors="replace") if path else ""))
        report.unrecoverable = named
        report.stale = [LostStripe(file_id=s.file_id, idx=s.idx, version=s.version, found=s.found, k=s.k, note=s.note,
                                   path=(catalog.path_of(inos[s.file_id]) or b"").decode(errors="replace"))
                        for s in plan.stale]
        report.unreadable_files = plan.unreadable_files
        catalog.checkpoint()
    finally:
        catalog.close()


def _sync_stores(catalog: Catalog, views: list[StoreView]) -> None:
    """Stores the mirror does not know (added after it) are added; moved ones get their configured path."""
    known = {r.store_id: r for r in catalog.stores()}
    by_path = {r.path: r for r in known.values()}
    for v in views:
        if v.store is None:
            continue
        rec = known.get(v.store_id)
        if rec is None:
            other = by_path.get(v.path)
            if other is not None:  # a replaced disk at the same path: the old record gives way
                catalog.update_store(other.store_id, path=f"{other.path}#replaced-{other.store_id[:8]}")
            catalog.add_store(store_id=v.store_id, path=v.path, domain=v.domain, replaces=v.label.replaces)
        elif rec.path != v.path or rec.domain != v.domain:
            catalog.update_store(v.store_id, path=v.path, domain=v.domain)


def _lost_and_found(catalog: Catalog) -> int:
    try:
        node = catalog.lookup(ROOT, LOST_AND_FOUND)
    except NotFound:
        node = catalog.create(ROOT, LOST_AND_FOUND, mode=stat.S_IFDIR | 0o700, uid=0, gid=0)
    if not node.is_dir:
        raise CatalogError(f"/{LOST_AND_FOUND.decode()} exists and is not a directory")
    return node.ino


def _adopt(catalog: Catalog, parent: int, fid: str, mtime_ns: int) -> Inode:
    for n in range(1000):
        name = fid if n == 0 else f"{fid}-{n}"
        try:
            return catalog.adopt_file(parent, name.encode(), file_id=fid, mode=0o600, mtime_ns=mtime_ns)
        except Exists:
            continue
    raise CatalogError(f"cannot find a free name for file {fid} in /{LOST_AND_FOUND.decode()}")


def node_name(catalog: Catalog, ino: int) -> str:
    path = catalog.path_of(ino) or b""
    return path.rsplit(b"/", 1)[-1].decode(errors="replace")


# ---------------------------------------------------------------- export

class _Serial:
    """Run calls on one Catalog in worker threads, one at a time."""

    def __init__(self, catalog: Catalog):
        self.catalog = catalog
        self._limiter = trio.CapacityLimiter(1)

    async def __call__(self, fn: Callable, *args):
        return await trio.to_thread.run_sync(lambda: fn(*args), limiter=self._limiter)


@dataclass(frozen=True, kw_only=True)
class FailedFile:
    path: str  # in the pool
    dest: str
    stripes: tuple[tuple[int, int, int, str], ...]  # (stripe, first byte, end byte, why)


@dataclass(kw_only=True)
class ExportReport:
    source: str  # "the live catalog" or "catalog mirror generation G"
    files: int = 0
    bytes: int = 0
    directories: int = 0
    symlinks: int = 0
    hard_links: int = 0
    special: int = 0
    failed: list[FailedFile] = field(default_factory=list)
    skipped: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    bad_shards: int = 0  # missing or corrupt shards met on reachable stores
    degraded_stripes: int = 0  # stripes rebuilt from parity (some data shard missing, corrupt or away)

    @property
    def complete(self) -> bool:
        return not self.failed


def _resolve(catalog: Catalog, pool_path: str) -> Inode:
    node = catalog.get_inode(ROOT)
    for part in [p for p in os.fsencode(pool_path).split(b"/") if p and p != b"."]:
        if part == b"..":
            node = catalog.get_inode(catalog.parent_of(node.ino))
            continue
        if not node.is_dir:
            raise NotFound(f"{pool_path}: {part.decode(errors='replace')} is below a non-directory")
        node = catalog.lookup(node.ino, part)
    return node


def _walk(catalog: Catalog, top: Inode, dest: Path) -> list[tuple[str, Inode, Path]]:
    """Blocking: (pool path, inode, destination) of everything under top, parents first."""
    base = (catalog.path_of(top.ino) or b"/").decode(errors="replace")
    out = [(base, top, dest)]
    stack = [(top, base, dest)] if top.is_dir else []
    while stack:
        node, ppath, dpath = stack.pop()
        after = 0
        while True:
            rows = catalog.readdir(node.ino, after, 1000)
            if not rows:
                break
            for eid, name, child in rows:
                after = eid
                cp, cd = f"{ppath.rstrip('/')}/{name.decode(errors='replace')}", dpath / os.fsdecode(name)
                out.append((cp, child, cd))
                if child.is_dir:
                    stack.append((child, cp, cd))
    return out


async def export(cfg: PoolConfig, pool_path: str, dest: str | os.PathLike, *, from_mirror: bool = False,
                 force: bool = False, generation: int | None = None, progress: Progress | None = None) -> ExportReport:
    """Copy a file or a directory tree out of the pool to dest, using only the
    stores and a catalog: the live one opened read-only, or (from_mirror)
    the mirror recover would choose. No daemon, no mount; nothing is written
    to the stores or the catalog, so it is safe while the pool is mounted.

    dest names the copy itself. An existing destination file (or symlink) is
    refused unless force; an existing directory is merged into. Every stripe
    is verified (checksums; decoding around missing or corrupt shards). A
    file with a stripe that cannot be read is not written at all: it is
    read to the end to list every bad stripe, then its temporary file
    (".shoal-export-*" beside dest) is removed, and the report names it.
    Modes, owners (when run as root), times, symlinks, hard links within the
    tree and extended attributes are kept.

    Raises RecoveryRefused (existing destinations), NotFound (pool_path),
    PoolUnavailable (fewer than k stores answer), CatalogError.
    """
    progress = progress or _noop
    dest = Path(os.path.abspath(dest))
    if not await trio.to_thread.run_sync(dest.parent.is_dir):
        raise RecoveryRefused(f"{dest.parent} is not a directory: create it first")
    tmpdir = None
    try:
        if from_mirror:
            pool_id, views, warnings = await survey_stores(cfg)
            if pool_id is None:
                raise PoolUnavailable("no configured store carries a Shoal label")
            tmpdir = Path(await trio.to_thread.run_sync(lambda: tempfile.mkdtemp(prefix="shoal-export-")))
            choice, more, rejected = await choose_mirror(views, pool_id, tmpdir, generation=generation,
                                                         progress=progress)
            warnings += more + [f"mirror copy rejected: {r}" for r in rejected]
            if choice is None:
                raise CatalogError("no valid catalog mirror was found on the stores")
            catalog = await trio.to_thread.run_sync(Catalog.open_read_only, choice.local_path)
            source = f"catalog mirror generation {choice.generation}"
        else:
            catalog = await trio.to_thread.run_sync(Catalog.open_read_only, cfg.catalog_path)
            try:
                pool_id = catalog.pool_id
            except CatalogError:
                catalog.close()
                raise
            _, views, warnings = await survey_stores(cfg, pool_id)
            source = "the live catalog"
        try:
            report = ExportReport(source=source, warnings=warnings)
            try:
                await _export(cfg, _Serial(catalog), PoolId(pool_id), views, pool_path, dest, force, report, progress)
            except OSError as e:
                raise ExportFailed(f"writing {e.filename or dest} failed: {e.strerror or e} "
                                   f"({report.files} files were exported before)") from e
            return report
        finally:
            await trio.to_thread.run_sync(catalog.close)
    finally:
        if tmpdir is not None:
            await trio.to_thread.run_sync(shutil.rmtree, tmpdir, True)


async def _export(cfg: PoolConfig, db: _Serial, pool_id: PoolId, views: list[StoreView], pool_path: str,
                  dest: Path, force: bool, report: ExportReport, progress: Progress) -> None:
    slots = _slots(views)
    if len(slots) < cfg.k:
        raise PoolUnavailable(f"only {len(slots)} of {len(views)} stores answer, k = {cfg.k}: "
                              + "; ".join(f"{v.path}: {v.problem}" for v in views if v.store is None))
    bad = [0]

    def on_bad(ref, shard, why):
        bad[0] += 1

    io = StripeIO(pool_id=pool_id, slots=slots, on_bad_shard=on_bad)
    cat = db.catalog
    stripe_size = int(await db(cat.get_meta, "stripe_size", cfg.stripe_size))
    top = await db(_resolve, cat, pool_path)
    items = await db(_walk, cat, top, dest)
    conflicts = await trio.to_thread.run_sync(_conflicts, items, force)
    if conflicts:
        raise RecoveryRefused("nothing was written; these destinations exist"
                              + (" (use --force to replace files)" if not force else "") + ":\n  "
                              + "\n  ".join(conflicts[:10]) + (f"\n  ... and {len(conflicts) - 10} more" if len(conflicts) > 10 else ""))
    total = sum(n.size for _, n, _ in items if n.is_reg)
    done = [0]
    linked: dict[int, Path] = {}
    dirs: list[tuple[Inode, Path]] = []
    for ppath, node, dpath in items:
        xattrs = await db(_xattrs, cat, node.ino)
        if node.is_dir:
            await trio.to_thread.run_sync(_mkdir, dpath)
            dirs.append((node, dpath))
            report.directories += 1
        elif node.is_reg:
            if node.nlink > 1 and node.ino in linked:
                ok = await trio.to_thread.run_sync(_hard_link, linked[node.ino], dpath)
                if ok:
                    report.hard_links += 1
                    continue
            failed = await _export_file(db, io, node, ppath, dpath, stripe_size, xattrs, report, done, total, progress)
            if failed is None:
                linked[node.ino] = dpath
                report.files += 1
                report.bytes += node.size
            else:
                report.failed.append(failed)
        elif stat.S_ISLNK(node.mode):
            await trio.to_thread.run_sync(_symlink, node, dpath, xattrs)
            report.symlinks += 1
        elif stat.S_ISFIFO(node.mode) or (os.geteuid() == 0 and (stat.S_ISCHR(node.mode) or stat.S_ISBLK(node.mode))):
            await trio.to_thread.run_sync(_special, node, dpath)
            report.special += 1
        else:
            report.skipped.append(f"{ppath}: {_kind(node.mode)} not exported")
    for node, dpath in reversed(dirs):  # children first: writing into a directory changes its mtime
        report.warnings += await trio.to_thread.run_sync(_finish, node, dpath, await db(_xattrs, cat, node.ino), False)
        await trio.to_thread.run_sync(_fsync_dir, dpath)
    if not top.is_dir:
        await trio.to_thread.run_sync(_fsync_dir, dest.parent)
    report.bad_shards = bad[0]
    report.degraded_stripes = io.stats.degraded_reads


def _kind(mode: int) -> str:
    return ("a socket" if stat.S_ISSOCK(mode) else "a device" if stat.S_ISCHR(mode) or stat.S_ISBLK(mode)
            else f"type {stat.S_IFMT(mode):o}")


def _xattrs(catalog: Catalog, ino: int) -> list[tuple[bytes, bytes]]:
    return sorted(catalog.xattrs_of(ino).items())


def _conflicts(items: list[tuple[str, Inode, Path]], force: bool) -> list[str]:
    out = []
    for _, node, dpath in items:
        try:
            st = os.lstat(dpath)
        except FileNotFoundError:
            continue
        if node.is_dir:
            if not stat.S_ISDIR(st.st_mode):
                out.append(f"{dpath} (not a directory)")
        elif stat.S_ISDIR(st.st_mode):
            out.append(f"{dpath} (a directory)")
        elif not force:
            out.append(str(dpath))
    return out


def _mkdir(path: Path) -> None:
    try:
        os.mkdir(path, 0o700)  # opened up to its real mode once its content is in
    except FileExistsError:
        if not path.is_dir():
            raise


def _hard_link(src: Path, dest: Path) -> bool:
    tmp = dest.with_name(f".shoal-export-{secrets.token_hex(6)}")
    try:
        os.link(src, tmp)
    except OSError:
        return False
    os.rename(tmp, dest)
    return True


def _finish(node: Inode, path: Path, xattrs: list, is_link: bool) -> list[str]:
    """Owner, mode, extended attributes and times; returns warnings."""
    warnings = []
    follow = not is_link
    if os.geteuid() == 0:
        os.chown(path, node.uid, node.gid, follow_symlinks=follow)
    if not is_link:
        os.chmod(path, stat.S_IMODE(node.mode))
    for name, value in xattrs:
        try:
            os.setxattr(path, name, value, follow_symlinks=follow)
        except OSError as e:
            warnings.append(f"{path}: extended attribute {name.decode(errors='replace')} not kept: {e.strerror}")
    os.utime(path, ns=(node.atime_ns, node.mtime_ns), follow_symlinks=follow)
    return warnings


def _symlink(node: Inode, dest: Path, xattrs: list) -> None:
    tmp = dest.with_name(f".shoal-export-{secrets.token_hex(6)}")
    os.symlink(node.target or b"", os.fsencode(tmp))
    try:
        _finish(node, tmp, [], True)
        os.rename(tmp, dest)
    except BaseException:
        _unlink_quietly(tmp)
        raise


def _special(node: Inode, dest: Path) -> None:
    tmp = dest.with_name(f".shoal-export-{secrets.token_hex(6)}")
    os.mknod(tmp, node.mode, node.rdev)
    _finish(node, tmp, [], False)
    os.rename(tmp, dest)


async def _export_file(db: _Serial, io: StripeIO, node: Inode, ppath: str, dest: Path, stripe_size: int,
                       xattrs: list, report: ExportReport, done: list[int], total: int,
                       progress: Progress) -> FailedFile | None:
    cat = db.catalog
    tmp = dest.with_name(f".shoal-export-{secrets.token_hex(6)}")
    fd = await trio.to_thread.run_sync(os.open, tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_CLOEXEC, 0o600)
    bad: list[tuple[int, int, int, str]] = []
    try:
        count = -(-node.size // stripe_size)
        for lo in range(0, count, 64):
            recs = await db(cat.stripes, node.ino, lo, min(count, lo + 64))
            for idx in range(lo, min(count, lo + 64)):
                start = idx * stripe_size
                want = min(stripe_size, node.size - start)
                rec = recs.get(idx)
                if rec is not None:  # no record: a hole, left sparse
                    try:
                        data = await _read_stripe(db, io, node, rec)
                    except StripeLost as e:
                        bad.append((idx, start, start + want, str(e)))
                        data = b""
                    if data:
                        await trio.to_thread.run_sync(_pwrite_all, fd, memoryview(data)[:want], start)
                done[0] += want
                progress("exporting", done[0], total)
        await trio.to_thread.run_sync(_close_file, fd, node.size)
        fd = None
        if bad:
            await trio.to_thread.run_sync(_unlink_quietly, tmp)
            return FailedFile(path=ppath, dest=str(dest), stripes=tuple(bad))
        report.warnings += await trio.to_thread.run_sync(_finish, node, tmp, xattrs, False)
        await trio.to_thread.run_sync(os.rename, tmp, dest)
        return None
    except BaseException:
        if fd is not None:
            os.close(fd)
        await trio.to_thread.run_sync(_unlink_quietly, tmp)
        raise


def _ref(node: Inode, rec: StripeRecord) -> StripeRef:
    return StripeRef(ino=rec.ino, file_id=FileId(node.file_id), idx=rec.idx, version=rec.version, length=rec.length,
                     coded_length=rec.coded_length, k=rec.k, n=rec.n,
                     shards=tuple((s.shard, s.store_id, s.state) for s in rec.shards))


async def _read_stripe(db: _Serial, io: StripeIO, node: Inode, rec: StripeRecord) -> bytes:
    ref = _ref(node, rec)
    try:
        return await io.read(ref)
    except StripeLost:
        # A mounted pool may have replaced this stripe meanwhile: look once more.
        again = await db(db.catalog.stripe, rec.ino, rec.idx)
        if again is None or again.version == rec.version:
            raise
        return await io.read(_ref(node, again))


def _pwrite_all(fd: int, data: memoryview, offset: int) -> None:
    while data:
        n = os.pwrite(fd, data, offset)
        data, offset = data[n:], offset + n


def _close_file(fd: int, size: int) -> None:
    try:
        os.ftruncate(fd, size)
        os.fsync(fd)
    finally:
        os.close(fd)


# ---------------------------------------------------------------- check

CHECK_KINDS = (
    "store-unreachable",   # a configured store did not answer or is not the catalog's
    "missing-shard",       # the catalog places a shard on a store that does not hold it
    "lost-stripe",         # fewer than k valid shards found
    "header-mismatch",     # a shard's header disagrees with the catalog (or cannot be parsed)
    "unreferenced-shard",  # a shard file the catalog does not know
    "dangling-entry",      # a directory entry naming a missing inode, or in a missing directory
    "unreachable",         # an inode with links, but not reachable from the root
    "wrong-nlink",         # an inode whose link count does not match its entries
    "no-file-id",          # a regular file without a file id
    "past-eof",            # a stripe wholly past the end of its file
    "catalog-behind",      # the stores hold stripe versions this catalog never handed out
)


@dataclass(frozen=True, kw_only=True)
class Finding:
    kind: str
    what: str
    action: str = ""  # what --repair did about it; "" = nothing
    ino: int | None = None


@dataclass(kw_only=True)
class CheckReport:
    repair: bool
    findings: list[Finding] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)  # worth knowing, not wrong
    stripes: int = 0
    shards_checked: int = 0

    def counts(self) -> dict[str, int]:
        c = Counter(f.kind for f in self.findings)
        return {k: c[k] for k in CHECK_KINDS if c[k]}

    @property
    def clean(self) -> bool:
        return not self.findings

    @property
    def remaining(self) -> list[Finding]:
        """Findings --repair did not act on (all of them without --repair)."""
        return [f for f in self.findings if not f.action]


@dataclass(kw_only=True)
class Namespace:
    dangling: list[tuple[int, int, bytes, int]]  # entries to drop
    unreachable: set[int]
    unlinked: list[int]  # nlink 0, no entries: purged at the next mount
    nlink: dict[int, int]  # ino -> the link count its entries imply
    parents: dict[int, set[int]]  # ino -> parents of its valid entries


def analyse_namespace(inodes: list[Inode], entries: list[tuple[int, int, bytes, int]]) -> Namespace:
    """Pure: what is wrong with the namespace tables."""
    by = {n.ino: n for n in inodes}
    dangling = [e for e in entries if e[3] not in by or e[1] not in by or not by[e[1]].is_dir]
    good = [e for e in entries if e[3] in by and e[1] in by and by[e[1]].is_dir]
    kids: dict[int, list[int]] = {}
    parents: dict[int, set[int]] = {}
    count: Counter = Counter()
    subdirs: Counter = Counter()
    for _, parent, _, ino in good:
        kids.setdefault(parent, []).append(ino)
        parents.setdefault(ino, set()).add(parent)
        count[ino] += 1
        if by[ino].is_dir:
            subdirs[parent] += 1
    reach, todo = {ROOT}, [ROOT] if ROOT in by else []
    while todo:
        for c in kids.get(todo.pop(), ()):
            if c not in reach:
                reach.add(c)
                if by[c].is_dir:
                    todo.append(c)
    unlinked = [i for i, n in by.items() if i not in reach and n.nlink <= 0 and not count[i]]
    unreachable = set(by) - reach - set(unlinked)
    nlink = {i: (2 + subdirs[i]) if n.is_dir else count[i] for i, n in by.items() if i not in unlinked}
    return Namespace(dangling=dangling, unreachable=unreachable, unlinked=unlinked, nlink=nlink, parents=parents)


def _where(catalog: Catalog, ino: int) -> str:
    p = catalog.path_of(ino)
    return p.decode(errors="replace") if p is not None else f"inode {ino}"


def _check_namespace(catalog: Catalog, stripe_size: int, stripes, report: CheckReport) -> list[Finding]:
    """Blocking: namespace findings."""
    inodes = catalog.all_inodes()
    by = {n.ino: n for n in inodes}
    ns = analyse_namespace(inodes, catalog.all_entries())
    out = []
    if ROOT not in by:
        out.append(Finding(kind="unreachable", what="the root directory (inode 1) is missing"))
    for eid, parent, name, ino in ns.dangling:
        why = f"names inode {ino}, which does not exist" if ino not in by else \
            f"lies in inode {parent}, which is {'not a directory' if parent in by else 'missing'}"
        out.append(Finding(kind="dangling-entry", what=f"entry {name.decode(errors='replace')!r} (id {eid}) {why}"))
    for ino in sorted(ns.unreachable):
        n = by[ino]
        out.append(Finding(kind="unreachable", what=f"inode {ino} ({'directory' if n.is_dir else 'file'}"
                                                     f"{', file id ' + n.file_id if n.file_id else ''}) is not reachable from the root"))
    for ino, want in sorted(ns.nlink.items()):
        if by[ino].nlink != want and ino not in ns.unreachable:
            out.append(Finding(kind="wrong-nlink", what=f"{_where(catalog, ino)}: nlink {by[ino].nlink}, its entries say {want}"))
    for n in inodes:
        if n.is_reg and n.file_id is None:
            out.append(Finding(kind="no-file-id", ino=n.ino,
                               what=f"{_where(catalog, n.ino)} (inode {n.ino}) is a regular file without a file id"))
    for fid, rec in stripes:
        node = by.get(rec.ino)
        if node is None:
            out.append(Finding(kind="dangling-entry", what=f"stripe {rec.idx} belongs to inode {rec.ino}, which does not exist"))
        elif rec.idx * stripe_size >= max(node.size, 0) and node.is_reg:
            out.append(Finding(kind="past-eof", what=f"{_where(catalog, rec.ino)}: stripe {rec.idx} lies past the end "
                                                     f"of the file ({node.size} bytes); not changed: decide whether "
                                                     "the size or the stripe is wrong"))
    if ns.unlinked:
        report.notes.append(f"{len(ns.unlinked)} unlinked inodes are waiting to be purged at the next mount")
    return out


def _repair_namespace(catalog: Catalog, findings: list[Finding]) -> list[Finding]:
    """Blocking: drop dangling entries, move unreachable inodes to lost+found,
    fix link counts, give file ids to empty files without one."""
    done: dict[str, str] = {}
    ns = analyse_namespace(catalog.all_inodes(), catalog.all_entries())
    if ns.dangling:
        catalog.drop_entries([e[0] for e in ns.dangling])
        done["dangling-entry"] = "entry removed"
    moved = 0
    for _ in range(10_000):
        inodes = catalog.all_inodes()
        ns = analyse_namespace(inodes, catalog.all_entries())
        if not ns.unreachable:
            break
        by = {n.ino: n for n in inodes}
        tops = [i for i in ns.unreachable if not (ns.parents.get(i, set()) & ns.unreachable)] or [min(ns.unreachable)]
        lf = _lost_and_found(catalog)
        for ino in sorted(tops):
            base = by[ino].file_id or f"ino-{ino}"
            for n in range(1000):
                try:
                    catalog.reattach(ino, lf, (base if n == 0 else f"{base}-{n}").encode())
                    moved += 1
                    break
                except Exists:
                    continue
    if moved:
        done["unreachable"] = f"moved to /{LOST_AND_FOUND.decode()}"
    inodes = catalog.all_inodes()
    ns = analyse_namespace(inodes, catalog.all_entries())
    fixes = [(n.ino, ns.nlink[n.ino]) for n in inodes if n.ino in ns.nlink and n.nlink != ns.nlink[n.ino]]
    if fixes:
        catalog.set_nlinks(fixes)
    done["wrong-nlink"] = "nlink set from the entries"
    out = []
    for f in findings:
        action = done.get(f.kind, "")
        if f.kind == "dangling-entry" and f.what.startswith("stripe "):
            action = ""
        if f.kind == "no-file-id":
            action = "given a new file id (it had no data)" if catalog.give_file_id(f.ino) else ""
        out.append(Finding(kind=f.kind, what=f.what, action=action, ino=f.ino) if action else f)
    return out


@dataclass(frozen=True, kw_only=True)
class _ShardFacts:
    present: dict[StoreId, dict[tuple[str, int, int, int], float]]
    headers: dict[tuple[StoreId, str, int, int, int], codec.ShardHeader | str]  # header, or why it is unreadable


async def _read_headers(views: dict[StoreId, StoreView], keys: list[tuple[StoreId, str, int, int, int]],
                        concurrency: int) -> dict:
    out: dict = {}
    per: dict[StoreId, list] = {}
    for key in keys:
        per.setdefault(key[0], []).append(key)

    async def worker(todo: list) -> None:
        while todo:
            key = todo.pop()
            sid, fid, idx, ver, shard = key
            name = ShardName(file_id=fid, stripe_index=idx, version=ver, shard_index=shard)
            try:
                out[key] = codec.parse_header(await views[sid].store.get_prefix(name, codec.MAX_HEADER_SIZE))[0]
            except (ShardError, StoreError) as e:
                out[key] = str(e)

    async with trio.open_nursery() as nursery:
        for todo in per.values():
            for _ in range(max(1, concurrency)):
                nursery.start_soon(worker, todo)
    return out


def _header_problem(h: codec.ShardHeader | str, pool_id: str, fid: str, rec: StripeRecord, shard: int) -> str | None:
    if isinstance(h, str):
        return f"header unreadable: {h}"
    diffs = [f"{what} {have} (catalog {want})" for what, have, want in (
        ("pool", h.pool_id, pool_id), ("file", h.file_id, fid), ("stripe", h.stripe_index, rec.idx),
        ("version", h.stripe_version, rec.version), ("shard", h.shard_index, shard), ("k", h.k, rec.k),
        ("n", h.n, rec.n), ("length", h.stripe_length, rec.coded_length)) if have != want]
    return "header says " + ", ".join(diffs) if diffs else None


async def check(cfg: PoolConfig, *, repair: bool = False, progress: Progress | None = None) -> CheckReport:
    """Offline consistency check of the catalog against the stores.

    Without repair the catalog is opened read-only and nothing is changed.
    With repair (the pool must not be mounted) it fixes what is safe: it
    removes dangling entries, moves unreachable inodes to /lost+found, sets
    link counts, marks absent or disagreeing shards missing / corrupt and
    queues their stripes for repair, points a shard at the store that holds
    it, and deletes unreferenced shards older than [scrub] orphan_grace that
    no write intent names. Each finding says what was done about it.
    Raises CatalogError.
    """
    progress = progress or _noop
    if repair:
        if not await trio.to_thread.run_sync(cfg.catalog_path.exists):
            raise CatalogError(f"no catalog at {cfg.catalog_path}: nothing to check (`shoal recover` rebuilds a lost one)")
        async with _Exclusive(cfg, "repairing its catalog"):
            return await _check(cfg, True, progress)
    return await _check(cfg, False, progress)


async def _check(cfg: PoolConfig, repair: bool, progress: Progress) -> CheckReport:
    opener = (lambda: Catalog(cfg.catalog_path)) if repair else (lambda: Catalog.open_read_only(cfg.catalog_path))
    catalog = await trio.to_thread.run_sync(opener)
    db = _Serial(catalog)
    report = CheckReport(repair=repair)
    try:
        pool_id = await db(lambda: catalog.pool_id)
        stripe_size = int(await db(catalog.get_meta, "stripe_size", cfg.stripe_size))
        records = await db(catalog.stores)
        stripes = await db(catalog.all_stripes)
        report.stripes = len(stripes)
        _, views_list, warnings = await survey_stores(cfg, pool_id)
        report.notes += warnings
        known = {r.store_id for r in records}
        views: dict[StoreId, StoreView] = {}
        for v in views_list:
            if v.store is None:
                report.findings.append(Finding(kind="store-unreachable", what=f"store {v.path}: {v.problem}; its shards were not checked"))
            elif v.store_id not in known:
                report.findings.append(Finding(kind="store-unreachable", what=f"store {v.path} ({v.store_id}) is not in the catalog"))
            else:
                views[v.store_id] = v
        configured = {str(sc.path) for sc in cfg.stores}
        for r in records:
            if r.path not in configured and r.admin != "retired":
                report.notes.append(f"store {r.path} is in the catalog but not in {cfg.source}: not checked")
        ns_findings = await db(_check_namespace, catalog, stripe_size, stripes, report)
        if repair:
            ns_findings = await db(_repair_namespace, catalog, ns_findings)
        report.findings += ns_findings
        await _check_shards(cfg, db, pool_id, views, stripes, repair, report, progress)
    finally:
        await trio.to_thread.run_sync(catalog.close)
    return report


async def _check_shards(cfg: PoolConfig, db: _Serial, pool_id: str, views: dict[StoreId, StoreView],
                        stripes: list, repair: bool, report: CheckReport, progress: Progress) -> None:
    catalog = db.catalog
    present: dict[StoreId, dict] = {}
    for sid, v in views.items():
        try:
            present[sid] = {(n.file_id, n.stripe_index, n.version, n.shard_index): m for n, m in await v.store.list_shards()}
        except StoreError as e:
            report.findings.append(Finding(kind="store-unreachable", what=f"store {v.path}: cannot list its shards ({e.problem})"))
    garbage = {(g.store_id, g.file_id, g.idx, g.version, g.shard) for g in await db(catalog.garbage, 1 << 62)}
    intents = await db(catalog.intents)
    intent_keys = {(f, i, v) for f, i, v, _ in intents}
    in_flight = {(sid, f, i, v) for f, i, v, placement in intents for sid in placement}
    queued = await db(catalog.repair_queued)
    referenced: set[tuple] = set()
    to_read: list[tuple] = []
    absent: list[tuple] = []  # (fid, rec, loc)
    absent_of: dict[tuple[int, int], list] = {}
    for fid, rec in stripes:
        if fid is None:
            continue
        for loc in rec.shards:
            key = (loc.store_id, fid, rec.idx, rec.version, loc.shard)
            referenced.add(key)
            if loc.store_id not in present or loc.state not in ("ok", "pending"):
                continue  # shards already recorded missing or corrupt are the repair queue's
            if (fid, rec.idx, rec.version, loc.shard) in present[loc.store_id]:
                to_read.append(key)
            else:
                absent.append((fid, rec, loc))
                absent_of.setdefault((rec.ino, rec.idx), []).append(loc)
    unref = [(sid, *k) for sid, keys in present.items() for k in keys if (sid, *k) not in referenced]
    # An unreferenced copy of a shard the catalog misses elsewhere is read too: it may be the real one.
    wanted = {(fid, rec.idx, rec.version, loc.shard) for fid, rec, loc in absent}
    spare = [u for u in unref if u[1:] in wanted]
    progress("reading shard headers", 0, len(to_read) + len(spare))
    headers = await _read_headers(views, to_read + spare, cfg.store_io.concurrency)
    report.shards_checked = len(headers)
    progress("reading shard headers", len(headers), len(headers))
    states: list[tuple] = []
    queue: set[tuple[int, int]] = set()
    relocated: set[tuple] = set()
    spare_by = {u[1:]: u[0] for u in spare if not isinstance(headers.get(u), str)
                and headers.get(u) is not None and headers[u].pool_id == pool_id}
    names: dict[int, str] = {}
    for fid, rec in stripes:
        if fid is None:
            continue
        if rec.ino not in names:
            names[rec.ino] = await db(_where, catalog, rec.ino)
        where = names[rec.ino]
        valid, bad = 0, []
        for loc in rec.shards:
            key = (loc.store_id, fid, rec.idx, rec.version, loc.shard)
            if key in headers:
                why = _header_problem(headers[key], pool_id, fid, rec, loc.shard)
                if why is None:
                    valid += 1
                else:
                    bad.append((loc, why))
        for loc, why in bad:
            fix = valid >= rec.k
            if repair and fix:
                states.append((rec.ino, rec.idx, rec.version, loc.shard, None, "corrupt"))
                queue.add((rec.ino, rec.idx))
            report.findings.append(Finding(
                kind="header-mismatch", what=f"{where}: stripe {rec.idx} shard {loc.shard} on {views[loc.store_id].path}: {why}",
                action=("marked corrupt, stripe queued for repair" if repair and fix else "")))
        for loc in absent_of.get((rec.ino, rec.idx), ()):
            other = spare_by.get((fid, rec.idx, rec.version, loc.shard))
            h = headers.get((other, fid, rec.idx, rec.version, loc.shard)) if other else None
            what = f"{where}: stripe {rec.idx} shard {loc.shard} is not on {views[loc.store_id].path}"
            if other and not isinstance(h, str) and _header_problem(h, pool_id, fid, rec, loc.shard) is None:
                valid += 1
                relocated.add((other, fid, rec.idx, rec.version, loc.shard))
                if repair:
                    states.append((rec.ino, rec.idx, rec.version, loc.shard, other, "ok"))
                report.findings.append(Finding(kind="missing-shard", what=f"{what}; it is on {views[other].path}",
                                               action="catalog points at it now" if repair else ""))
            else:
                if repair:
                    states.append((rec.ino, rec.idx, rec.version, loc.shard, None, "missing"))
                    queue.add((rec.ino, rec.idx))
                report.findings.append(Finding(kind="missing-shard", what=what,
                                               action="marked missing, stripe queued for repair" if repair else ""))
        known_bad = [loc for loc in rec.shards if loc.state != "ok"]
        if known_bad and (rec.ino, rec.idx) not in queued and (rec.ino, rec.idx) not in queue:
            report.findings.append(Finding(
                kind="missing-shard", what=f"{where}: stripe {rec.idx} has {len(known_bad)} shards recorded "
                                           f"{'/'.join(sorted({l.state for l in known_bad}))} but is not queued for repair",
                action="queued for repair" if repair else ""))
            if repair:
                queue.add((rec.ino, rec.idx))
        unknown = sum(1 for loc in rec.shards if loc.state in ("ok", "pending") and loc.store_id not in present)
        if valid < rec.k:
            report.findings.append(Finding(
                kind="lost-stripe", what=f"{where}: stripe {rec.idx} has {valid} valid shards, k = {rec.k}"
                                         + (f" ({unknown} more may be on stores that were not checked)" if unknown else "")))
    # Versions at or past next_version were never handed out by this catalog:
    # it is older than the stores (restored from a backup?). Its idea of
    # "unreferenced" cannot be trusted, so nothing is deleted.
    next_version = int(await db(catalog.get_meta, "next_version", 1))
    ahead = sum(1 for keys in present.values() for (_, _, ver, _) in keys if ver >= next_version)
    if ahead:
        report.findings.append(Finding(
            kind="catalog-behind", what=f"{ahead} shards on the stores have stripe versions this catalog never handed "
                                        f"out (next_version {next_version}): the catalog is older than the stores; "
                                        "no unreferenced shard is deleted; `shoal recover --force` rebuilds it"))
    pending = flight = young = 0
    # Never older than the newest commit this catalog knows: a newer shard may
    # belong to a commit it has not seen.
    cutoff = min(time.time() - cfg.scrub.orphan_grace, await db(catalog.last_commit_time))
    orphans: list[tuple[tuple, bool]] = []  # (shard key, may be deleted)
    for u in unref:
        sid, fid, idx, ver, shard = u
        if u in relocated:
            continue
        if u in garbage:
            pending += 1
            continue
        if (sid, fid, idx, ver) in in_flight:
            flight += 1
            continue
        past_grace = present[sid][(fid, idx, ver, shard)] < cutoff
        young += not past_grace
        orphans.append((u, past_grace and (fid, idx, ver) not in intent_keys and not ahead))
    if pending:
        report.notes.append(f"{pending} shards are on the garbage list and will be deleted by the mounted pool")
    if flight:
        report.notes.append(f"{flight} shards belong to writes in flight (write intents)")
    if young:
        report.notes.append(f"{young} unreferenced shards are younger than [scrub] orphan_grace "
                            f"({cfg.scrub.orphan_grace:.0f} s) or newer than the catalog's last commit, "
                            "and are left alone")
    if repair:
        if states:
            await db(catalog.set_shard_states, states)
        if queue:
            await db(catalog.queue_repair, [(i, x, "check") for i, x in sorted(queue)])
    for (sid, fid, idx, ver, shard), deletable in orphans:
        name = ShardName(fid, idx, ver, shard)
        action = ""
        if repair and deletable:
            try:
                await views[sid].store.delete(name)
                action = "deleted"
            except StoreError as e:
                action = ""
                report.notes.append(f"could not delete {views[sid].path}/{name.relpath()}: {e.problem}")
        report.findings.append(Finding(kind="unreferenced-shard", what=f"{views[sid].path}/{name.relpath()}",
                                       action=action))

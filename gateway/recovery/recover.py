"""recover: rebuild a lost catalog from a mirror and the shard headers,
steps 1-5 of the package docstring. ``plan_recovery`` decides (pure, no
I/O); ``recover`` takes the lock, gathers the sources and writes the new
catalog under a temporary name, renamed into place last."""
from __future__ import annotations

import os
import secrets
import shutil
import stat
import time
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import trio

from ..catalog import ROOT, Catalog, Inode, NewStripe, ShardLoc, StripeRecord
from ..config import PoolConfig
from ..errors import CatalogError, Exists, NotFound
from .common import LOST_AND_FOUND, Progress, RecoveryRefused, StoreView, _Exclusive, _fsync_dir, _noop, survey_stores
from .sources import Found, FoundShard, MirrorChoice, agreeing, choose_mirror, scan_headers

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

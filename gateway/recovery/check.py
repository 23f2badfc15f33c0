"""check: the catalog against itself (namespace, link counts, stripes past
the end) and against the stores (missing, unreferenced and mismatched
shards, lost stripes, versions the catalog never handed out), by kind;
with repair, the fixes that are safe."""
from __future__ import annotations

import time
from collections import Counter
from dataclasses import dataclass, field

import trio

from .. import codec
from ..catalog import ROOT, Catalog, Inode, StripeRecord
from ..config import PoolConfig
from ..errors import CatalogError, Exists, ShardError, StoreError
from ..ids import StoreId
from ..store import ShardName
from .common import LOST_AND_FOUND, Progress, StoreView, _Exclusive, _Serial, _noop, survey_stores
from .recover import _lost_and_found

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

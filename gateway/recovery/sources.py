"""Where recovery finds the truth besides a catalog: the catalog mirrors on
the stores (the newest copy most of the reachable stores hold, verified)
and the shard headers themselves (a scan of every store, and the version of
each stripe that at least k agreeing shards vouch for)."""
from __future__ import annotations

import secrets
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import trio

from .. import codec
from ..catalog import Catalog
from ..errors import CatalogError, ShardError, ShoalError, StoreError
from ..ids import StoreId
from ..mirror import MirrorMeta, file_checksum, parse_mirror_name, mirror_names
from ..store import ShardName
from .common import Progress, RecoveryRefused, StoreView, _noop, _unlink_quietly

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

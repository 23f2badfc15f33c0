"""Pool administration that needs no mount: ``init`` and the offline status.

Part of the pool layer: it uses config, catalog, store and placement, and
returns plain data for the CLI to format.
"""
from __future__ import annotations

import logging
import os
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path

import trio

from . import placement
from .catalog import Catalog
from .config import PoolConfig
from .errors import CatalogError, ShoalError, StoreError, StoreForeign, StoreStalled
from .store import Label, Store, is_empty_dir, read_label, same_device_as_parent, write_label

log = logging.getLogger(__name__)


class InitRefused(ShoalError):
    """`shoal init` found stores it must not write; nothing was written."""


@dataclass
class InitReport:
    pool_id: str
    created_catalog: bool
    labelled: list[str] = field(default_factory=list)
    already: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)


def _open_state_dir(cfg: PoolConfig) -> None:
    try:
        cfg.state_dir.mkdir(parents=True, exist_ok=True)
        probe = cfg.state_dir / f".write-test-{os.getpid()}"
        probe.write_bytes(b"x")
        probe.unlink()
    except OSError as e:
        raise CatalogError(f"state_dir {cfg.state_dir} is not writable ({e.strerror}): "
                           f"choose a state_dir on a writable filesystem in {cfg.source}") from e


def init_pool(cfg: PoolConfig) -> InitReport:
    """Label every configured store and prepare state_dir. Idempotent.

    Every store is checked before anything is written: a store that is
    missing, not empty and unlabelled, or labelled for another pool refuses
    the whole init (InitRefused) and no label is written anywhere.
    """
    _open_state_dir(cfg)
    created = not cfg.catalog_path.exists()
    catalog = Catalog(cfg.catalog_path, create=True)
    try:
        pool_id = catalog.get_meta("pool_id") or uuid.uuid4().hex
        problems, todo, report = [], [], InitReport(pool_id=pool_id, created_catalog=created)
        known = {r.path: r for r in catalog.stores()}
        for sc in cfg.stores:
            path = sc.path
            if not path.is_dir():
                problems.append(f"{path}: does not exist or is not a directory (create it, or mount its disk)")
                continue
            try:
                label = read_label(path)
            except StoreError as e:
                problems.append(str(e))
                continue
            if label is None and str(path) in known:
                problems.append(f"{path}: the catalog has it as store {known[str(path)].store_id}, but its label is "
                                "gone (a wiped or new disk, or the wrong one mounted there); to rebuild onto it, run "
                                f"`shoal store replace {cfg.source} {path}`")
                continue
            if label is None:
                if not is_empty_dir(path):
                    problems.append(f"{path}: not empty and has no Shoal label; Shoal writes only into an empty "
                                    "directory or one it labelled (is another disk mounted here?)")
                    continue
                if same_device_as_parent(path):
                    report.warnings.append(
                        f"{path} is on the same filesystem as its parent: if it should be a disk's mount point, "
                        "that disk is not mounted")
                todo.append((sc, Label.new(pool_id=pool_id, pool_name=cfg.name)))
            elif label.pool_id != pool_id:
                problems.append(f"{path}: labelled for another pool ({label.pool_name}, {label.pool_id}); "
                                "Shoal never writes to another pool's store")
            else:
                rec = known.get(str(path))
                if rec is not None and rec.store_id != label.store_id:
                    problems.append(f"{path}: its label says store {label.store_id}, the catalog {rec.store_id}")
                    continue
                report.already.append(str(path))
                if rec is None:
                    todo.append((sc, None))  # labelled, but the catalog forgot it
        if problems:
            raise InitRefused("nothing was written:\n  " + "\n  ".join(problems))
        catalog.initialise(pool_id=pool_id, name=cfg.name, k=cfg.k, n=cfg.n, stripe_size=cfg.stripe_size)
        for sc, label in todo:
            if label is not None:
                write_label(sc.path, label)
                report.labelled.append(str(sc.path))
                store_id = label.store_id
            else:
                store_id = read_label(sc.path).store_id
            catalog.add_store(store_id=store_id, path=str(sc.path), domain=sc.domain)
        for rec in catalog.stores():
            sc = next((s for s in cfg.stores if str(s.path) == rec.path), None)
            if sc is not None and sc.domain != rec.domain:
                catalog.update_store(rec.store_id, domain=sc.domain)
        return report
    finally:
        catalog.close()


async def _store_view(cfg: PoolConfig, pool_id: str, rec) -> dict:
    store = Store(path=Path(rec.path), pool_id=pool_id, store_id=rec.store_id,
                  deadline=min(cfg.store_io.deadline, cfg.store_io.probe_deadline), concurrency=1)
    view = {"path": rec.path, "store_id": rec.store_id, "domain": rec.domain, "admin": rec.admin,
            "state": "offline", "reason": "", "free_bytes": 0, "total_bytes": 0}
    try:
        await store.check_label()
        space = await store.space()
        view.update(state="online", reason="label matches", free_bytes=space.free_bytes, total_bytes=space.total_bytes)
    except StoreForeign as e:
        view.update(state="foreign", reason=str(e))
    except StoreStalled as e:
        view.update(state="stalled", reason=str(e))
    except StoreError as e:
        view.update(state="offline", reason=str(e))
    if view["state"] == "online":
        view["mirror"] = await _newest_mirror(store, pool_id)
    if rec.admin == "failed":
        view["state"] = "failed"
    elif rec.admin == "retiring" and view["state"] == "online":
        view["state"] = "retiring"
    return view


async def _newest_mirror(store: Store, pool_id: str) -> dict | None:
    """Generation and time of the newest catalog mirror on a store, if any."""
    from .mirror import MirrorMeta, parse_mirror_name

    best = None
    try:
        for name, _size, _mtime in await store.list_files():
            parsed = parse_mirror_name(name)
            if parsed and parsed[1] == "meta.json" and (best is None or parsed[0] > best[0]):
                best = (parsed[0], name)
        if best is None:
            return None
        meta = MirrorMeta.from_json(await store.get_file(best[1]))
    except (StoreError, ValueError):
        return None
    return {"generation": meta.generation, "time": meta.time} if meta.pool_id == pool_id else None


def survival_report(k: int, n: int, w: int, domains: dict[str, int]) -> list[dict]:
    if len(domains) < 2:
        return []
    return [{"lost": list(d.lost), "worst_shards_lost": d.worst_shards_lost, "reads": d.reads_ok, "writes": d.writes_ok}
            for d in placement.domain_survival(k, n, w, domains)]


async def offline_status(cfg: PoolConfig) -> dict:
    """Status from the catalog and a look at every store (no daemon)."""
    if not cfg.catalog_path.exists():
        raise CatalogError(f"no catalog at {cfg.catalog_path}: run `shoal init {cfg.source}` first")
    catalog = await trio.to_thread.run_sync(lambda: Catalog(cfg.catalog_path))
    try:
        pool_id = catalog.pool_id
        records = await trio.to_thread.run_sync(catalog.stores)
        views: list[dict] = [None] * len(records)

        async def one(i, rec):
            views[i] = await _store_view(cfg, pool_id, rec)

        async with trio.open_nursery() as nursery:
            for i, rec in enumerate(records):
                nursery.start_soon(one, i, rec)
        usable = [v["store_id"] for v in views if v["state"] in ("online", "full", "retiring")]
        health = await trio.to_thread.run_sync(catalog.stripe_health, usable)
        counts = await trio.to_thread.run_sync(catalog.counts)
        queue = await trio.to_thread.run_sync(catalog.repair_queue_length)
    finally:
        await trio.to_thread.run_sync(catalog.close)
    mirrors = [v.pop("mirror", None) for v in views]
    newest = max((m for m in mirrors if m), key=lambda m: m["generation"], default=None)
    online = sum(1 for v in views if v["state"] == "online")
    free = sum(v["free_bytes"] for v in views if v["state"] == "online")
    return {
        "pool": {"name": cfg.name, "pool_id": pool_id, "k": cfg.k, "n": cfg.n, "w": cfg.write_quorum,
                 "stripe_size": cfg.stripe_size, "mounted": False,
                 "writable": online >= cfg.write_quorum, "readable": len(usable) >= cfg.k,
                 "usable_free_bytes": free * cfg.k // cfg.n, "files": counts["files"], "bytes": counts["bytes"]},
        "stores": views,
        "stripes": health,
        "repair": {"queued_stripes": queue, "repaired_bytes": 0, "rate_bytes_per_second": 0.0,
                   "eta_seconds": None, "running": False},
        "catalog": {"mirror_age_seconds": None if newest is None else max(0.0, time.time() - newest["time"]),
                    "generation": None if newest is None else newest["generation"],
                    "stores_with_mirror": sum(1 for m in mirrors if m and newest and m["generation"] == newest["generation"]),
                    "stores_total": len(views), "last_error": None},
        "domains": survival_report(cfg.k, cfg.n, cfg.write_quorum, cfg.domains),
        "time": time.time(),
    }

"""Catalog mirrors on real stores (tmpfs) from a real, busy SQLite catalog."""
from __future__ import annotations

import json
import sqlite3

import pytest
import trio

import mounting
from gateway import codec
from gateway.catalog import Catalog
from gateway.mirror import Mirror, MirrorError, MirrorMeta, file_checksum, mirror_names, parse_mirror_name
from gateway.pool import open_pool
from gateway.store import Store
from test_recovery import instrument_data, make_pool, pull, write_file

pytestmark = mounting.requires_root


def mirrors_on(store_path) -> list[int]:
    """Generations of the complete mirrors in a store's catalog/ directory."""
    names = {p.name for p in (store_path / "catalog").iterdir()}
    return sorted(g for g, kind in filter(None, map(parse_mirror_name, names))
                  if kind == "meta.json" and mirror_names(g)[0] in names)


async def test_snapshot_writes_a_verified_mirror_to_every_store(pool_config):
    cfg = make_pool(pool_config, 2, 3)
    async with open_pool(cfg) as pool:
        await write_file(pool, "/lab/a.dat", instrument_data(1, 100_000))
        mirror = Mirror(cfg, pool.catalog, pool.slots)
        gen = await mirror.snapshot()
        assert gen == await pool.db(pool.catalog.generation)
        pool_id = pool.pool_id
        stats = mirror.statistics()
    assert stats["generation"] == gen and stats["stores_with_mirror"] == 3 and stats["stores_total"] == 3
    assert stats["mirror_age_seconds"] is not None and stats["last_error"] is None
    for sc in cfg.stores:
        db_name, meta_name = mirror_names(gen)
        meta = MirrorMeta.from_json((sc.path / "catalog" / meta_name).read_bytes())
        path = sc.path / "catalog" / db_name
        assert (meta.pool_id, meta.generation) == (pool_id, gen)
        assert file_checksum(path) == (meta.checksum, meta.size)
        ident = Catalog.inspect(path)
        assert (ident["pool_id"], ident["generation"]) == (pool_id, gen)
    assert not list(cfg.state_dir.glob(".mirror-*"))  # the local snapshot was removed


async def test_only_the_newest_mirrors_are_kept(pool_config):
    cfg = make_pool(pool_config, 2, 3, extra={"catalog": {"mirrors_kept": 2}})
    gens = []
    async with open_pool(cfg) as pool:
        mirror = Mirror(cfg, pool.catalog, pool.slots)
        for i in range(4):
            await write_file(pool, f"/f{i}", b"x")
            gens.append(await mirror.snapshot())
    for sc in cfg.stores:
        assert mirrors_on(sc.path) == gens[-2:]
        assert len(list((sc.path / "catalog").iterdir())) == 4  # two pairs, nothing else


async def test_snapshot_is_consistent_while_the_pool_writes(pool_config):
    cfg = make_pool(pool_config, 2, 3)
    async with open_pool(cfg) as pool:
        mirror = Mirror(cfg, pool.catalog, pool.slots)
        gens = []

        async def writer():
            for i in range(40):
                await write_file(pool, f"/busy/{i}.dat", instrument_data(i, 5000))

        async with trio.open_nursery() as nursery:
            nursery.start_soon(writer)
            for _ in range(5):
                gens.append(await mirror.snapshot())
        final = await mirror.snapshot()
    for sc in cfg.stores:
        for gen in mirrors_on(sc.path):
            path = sc.path / "catalog" / mirror_names(gen)[0]
            assert Catalog.inspect(path)["generation"] == gen  # quick_check passed, identity matches
    # The last mirror holds every file: the snapshot is one consistent state.
    path = cfg.stores[0].path / "catalog" / mirror_names(final)[0]
    ro = Catalog.open_read_only(path)
    try:
        busy = ro.lookup(1, b"busy")
        assert len(ro.readdir(busy.ino, 0)) == 40
    finally:
        ro.close()


async def test_offline_stores_are_skipped_and_counted(pool_config):
    cfg = make_pool(pool_config, 2, 4)
    async with open_pool(cfg) as pool:
        await write_file(pool, "/a", b"a")
        slot = next(s for s in pool.slots.values() if s.path == str(cfg.stores[2].path))
        slot.state = "offline"
        mirror = Mirror(cfg, pool.catalog, pool.slots)
        gen = await mirror.snapshot()
        assert mirror.statistics()["stores_with_mirror"] == 3
        assert mirrors_on(cfg.stores[2].path) == []
        slot.state = "online"  # it comes back: the next final() catches it up though nothing changed
        assert await mirror.final() == gen
        assert mirror.statistics()["stores_with_mirror"] == 4
    assert mirrors_on(cfg.stores[2].path) == [gen]


async def test_plain_stores_and_a_store_that_is_gone(pool_config):
    cfg = make_pool(pool_config, 2, 3)
    async with open_pool(cfg) as pool:
        await write_file(pool, "/a", b"a")
        pool_id = pool.pool_id
        gen = await pool.db(pool.catalog.generation)
    pull(cfg, 1)
    stores = [Store(path=sc.path, pool_id=pool_id) for sc in cfg.stores]
    mirror = Mirror(cfg, cfg.catalog_path, stores)
    assert await mirror.snapshot() == gen
    assert mirror.statistics()["stores_with_mirror"] == 2
    assert str(cfg.stores[1].path) in mirror.statistics()["last_error"]
    assert mirrors_on(cfg.stores[0].path) == [gen]


async def test_no_store_takes_it(pool_config):
    cfg = make_pool(pool_config, 2, 3)
    async with open_pool(cfg) as pool:
        pool_id = pool.pool_id
    pull(cfg, 0, 1, 2)
    mirror = Mirror(cfg, cfg.catalog_path, [Store(path=sc.path, pool_id=pool_id) for sc in cfg.stores])
    with pytest.raises(MirrorError, match="no store"):
        await mirror.snapshot()
    assert mirror.statistics()["generation"] is None
    assert await mirror.final() is None  # logged, not raised


async def test_run_mirrors_after_changes_and_final_catches_the_last(pool_config):
    cfg = make_pool(pool_config, 2, 3, extra={"catalog": {"mirror_interval": 0.05}})
    async with open_pool(cfg) as pool:
        mirror = Mirror(cfg, pool.catalog, pool.slots)
        async with trio.open_nursery() as nursery:
            await nursery.start(mirror.run)
            for i in range(3):
                await write_file(pool, f"/r{i}", instrument_data(i, 1000))
                want = await pool.db(pool.catalog.generation)
                with trio.fail_after(30):  # a safety net, not a timing assertion
                    while mirror.statistics()["generation"] != want:
                        await trio.sleep(0.01)
            nursery.cancel_scope.cancel()
        await write_file(pool, "/last", b"written after the loop stopped")
        want = await pool.db(pool.catalog.generation)
        assert await mirror.final() == want
    for sc in cfg.stores:
        assert mirrors_on(sc.path)[-1] == want


def test_sidecar_validation():
    good = MirrorMeta(pool_id="a" * 32, pool_name="lab", generation=3, time=1.0, size=10,
                      checksum=codec.checksum(b"x").hex())
    assert MirrorMeta.from_json(good.to_json()) == good
    for bad in (b"not json", b"[]", json.dumps({"format": 1}).encode(),
                good.to_json().replace(b'"generation": 3', b'"generation": -1'),
                good.to_json().replace(b'"format": 1', b'"format": 2')):
        with pytest.raises(ValueError):
            MirrorMeta.from_json(bad)
    assert parse_mirror_name("catalog-000000000042.sqlite") == (42, "sqlite")
    assert parse_mirror_name("catalog-42.sqlite") is None


async def test_mirror_is_a_plain_sqlite_file(pool_config):
    """A mirror opens with any SQLite tool: rollback-journal mode, no -wal needed."""
    cfg = make_pool(pool_config, 2, 3)
    async with open_pool(cfg) as pool:
        await write_file(pool, "/a", b"a")
        gen = await Mirror(cfg, pool.catalog, pool.slots).snapshot()
    path = cfg.stores[0].path / "catalog" / mirror_names(gen)[0]
    db = sqlite3.connect(path.as_uri() + "?mode=ro", uri=True)
    try:
        assert db.execute("PRAGMA journal_mode").fetchone()[0] == "delete"
    finally:
        db.close()

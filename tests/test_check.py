"""`check` against real stores and a real catalog with planted inconsistencies.

Each kind of damage is planted directly: shard files are deleted, copied or
overwritten on the stores, and catalog rows are changed with plain SQL on
the closed catalog (the test plays the part of a bug or a crash).
"""
from __future__ import annotations

import os
import shutil
import sqlite3
import time

import trio

import mounting
from gateway import recovery
from gateway.cli import main as cli_main
from gateway.pool import open_pool
from test_recovery import STRIPE, instrument_data, lookup_path, make_pool, read_file, shard_files, write_file

pytestmark = mounting.requires_root


def sql(cfg, *statements: tuple) -> None:
    db = sqlite3.connect(cfg.catalog_path, isolation_level=None)
    try:
        for st in statements:
            db.execute(*st)
    finally:
        db.close()


def kinds(report: recovery.CheckReport) -> dict[str, int]:
    return report.counts()


async def _pool_with_files(cfg) -> dict:
    files = {"/lab/keep.dat": instrument_data(1, 3 * STRIPE), "/lab/other.dat": instrument_data(2, 2 * STRIPE),
             "/lab/sub/deep.dat": instrument_data(3, 1000), "/short.dat": instrument_data(4, 3 * STRIPE),
             "/nodata": b""}
    info = {}
    async with open_pool(cfg) as pool:
        for path, data in files.items():
            node = await write_file(pool, path, data)
            info[path] = node
        info["sub"] = await lookup_path(pool, "/lab/sub")
    return files, info


async def test_a_clean_pool_checks_clean(pool_config):
    cfg = make_pool(pool_config, 2, 3)
    await _pool_with_files(cfg)
    report = await recovery.check(cfg)
    assert report.clean and report.stripes == 3 + 2 + 1 + 3 and report.shards_checked == 9 * 3


async def test_check_finds_each_kind_and_repair_fixes_the_safe_ones(pool_config):
    cfg = make_pool(pool_config, 2, 3, extra={"scrub": {"orphan_grace": 3600}})
    files, info = await _pool_with_files(cfg)
    keep, other = info["/lab/keep.dat"], info["/lab/other.dat"]
    s0, s1 = cfg.stores[0].path, cfg.stores[1].path

    # missing-shard: one shard file of keep.dat stripe 0 is gone.
    victim = next(f for f in shard_files(s0) if f.name.startswith(f"{keep.file_id}.0."))
    victim.unlink()
    # header-mismatch: a shard of other.dat stripe 1 holds the bytes of another shard.
    target = next(f for f in shard_files(s1) if f.name.startswith(f"{other.file_id}.1."))
    donor = next(f for f in shard_files(s1) if f.name.startswith(f"{other.file_id}.0."))
    shutil.copy(donor, target)
    # unreferenced-shard: an old orphan (past the grace) and a young one (left alone).
    orphan_id = "f" * 32
    old = s1 / "shards" / "ff" / f"{orphan_id}.0.999.0.shd"
    young = s1 / "shards" / "ff" / f"{orphan_id}.1.999.0.shd"
    old.parent.mkdir(exist_ok=True)
    shutil.copy(donor, old)
    shutil.copy(donor, young)
    past = time.time() - 2 * 3600
    os.utime(old, (past, past))
    # Namespace damage in the catalog itself.
    nodata = info["/nodata"]
    sql(cfg,
        ("INSERT INTO entries(parent, name, ino) VALUES(1, ?, 9999)", (b"ghost",)),      # dangling-entry
        ("UPDATE inodes SET nlink=5 WHERE ino=?", (other.ino,)),                         # wrong-nlink
        ("DELETE FROM entries WHERE ino=?", (info["sub"].ino,)),                         # unreachable dir
        ("UPDATE inodes SET file_id=NULL WHERE ino=?", (nodata.ino,)),                   # no-file-id
        ("UPDATE inodes SET size=? WHERE ino=?", (STRIPE, info["/short.dat"].ino)))      # past-eof

    report = await recovery.check(cfg)

    found = kinds(report)
    for kind in ("missing-shard", "header-mismatch", "unreferenced-shard", "dangling-entry", "unreachable",
                 "wrong-nlink", "no-file-id", "past-eof"):
        assert found.get(kind), (kind, found, report.findings)
    assert found["unreferenced-shard"] == 2
    assert found["past-eof"] == 2
    assert not any(f.action for f in report.findings)  # without --repair nothing changes
    assert old.exists() and young.exists()
    assert await trio.to_thread.run_sync(cli_main, ["check", str(cfg.source)]) == 3

    repaired = await recovery.check(cfg, repair=True)

    by_kind = {}
    for f in repaired.findings:
        by_kind.setdefault(f.kind, []).append(f)
    assert all(f.action for f in by_kind["missing-shard"])
    assert all("corrupt" in f.action for f in by_kind["header-mismatch"])
    assert not old.exists() and young.exists()  # only the orphan past its grace is deleted
    assert [f.action for f in by_kind["unreferenced-shard"] if "ff/" + old.name in f.what] == ["deleted"]
    assert all(f.action for f in by_kind["dangling-entry"] + by_kind["unreachable"] + by_kind["wrong-nlink"])
    assert by_kind["no-file-id"][0].action.startswith("given a new file id")
    assert not any(f.action for f in by_kind["past-eof"])  # not safe to guess: left for a person

    again = await recovery.check(cfg)
    assert sorted(kinds(again)) == ["past-eof", "unreferenced-shard"]  # the young orphan stays too
    assert again.counts()["unreferenced-shard"] == 1
    async with open_pool(cfg) as pool:
        assert await read_file(pool, "/lab/keep.dat") == files["/lab/keep.dat"]
        assert await read_file(pool, "/lab/other.dat") == files["/lab/other.dat"]
        deep = await lookup_path(pool, f"/lost+found/ino-{info['sub'].ino}/deep.dat")
        assert deep.ino == info["/lab/sub/deep.dat"].ino
        assert await read_file(pool, f"/lost+found/ino-{info['sub'].ino}/deep.dat") == files["/lab/sub/deep.dat"]
        assert (await pool.getattr(other.ino)).nlink == 1
        queue = await pool.db(pool.catalog.repair_queued)
    assert (keep.ino, 0) in queue and (other.ino, 1) in queue


async def test_a_shard_on_the_wrong_store_is_pointed_at(pool_config):
    cfg = make_pool(pool_config, 2, 3, store_count=4)
    files, info = await _pool_with_files(cfg)
    keep = info["/lab/keep.dat"]
    # Move a shard to a store that holds no shard of that stripe.
    holders = {sc.path for sc in cfg.stores for f in shard_files(sc.path) if f.name.startswith(f"{keep.file_id}.2.")}
    src_store = sorted(holders)[0]
    dst_store = next(sc.path for sc in cfg.stores if sc.path not in holders)
    moving = next(f for f in shard_files(src_store) if f.name.startswith(f"{keep.file_id}.2."))
    dest = dst_store / moving.relative_to(src_store)
    dest.parent.mkdir(exist_ok=True)
    shutil.move(moving, dest)

    report = await recovery.check(cfg, repair=True)

    moved = [f for f in report.findings if f.kind == "missing-shard"]
    assert len(moved) == 1 and str(dst_store) in moved[0].what and moved[0].action == "catalog points at it now"
    assert not [f for f in report.findings if f.kind == "unreferenced-shard"]
    assert (await recovery.check(cfg)).clean


async def test_lost_stripes_are_reported_and_not_repaired(pool_config):
    cfg = make_pool(pool_config, 2, 3)
    files, info = await _pool_with_files(cfg)
    keep = info["/lab/keep.dat"]
    for sc in cfg.stores[:2]:
        for f in shard_files(sc.path):
            if f.name.startswith(f"{keep.file_id}.1."):
                f.unlink()
    report = await recovery.check(cfg, repair=True)
    lost = [f for f in report.findings if f.kind == "lost-stripe"]
    assert len(lost) == 1 and "/lab/keep.dat: stripe 1 has 1 valid shards, k = 2" in lost[0].what
    assert not lost[0].action and report.remaining


async def test_an_unreachable_store_is_a_finding(pool_config):
    cfg = make_pool(pool_config, 2, 3)
    await _pool_with_files(cfg)
    mounting.umount(cfg.stores[2].path)
    report = await recovery.check(cfg)
    assert kinds(report) == {"store-unreachable": 1}
    assert str(cfg.stores[2].path) in report.findings[0].what


def test_cli_check_exit_status(pool_config, capsys):
    cfg = make_pool(pool_config, 2, 3)
    trio.run(_pool_with_files, cfg)
    assert cli_main(["check", str(cfg.source)]) == 0
    assert "no problems found" in capsys.readouterr().out
    sql(cfg, ("UPDATE inodes SET nlink=7 WHERE ino=1",))
    assert cli_main(["check", str(cfg.source), "--json"]) == 3
    assert cli_main(["check", str(cfg.source), "--repair"]) == 0
    assert "1 problems repaired, 0 left" in capsys.readouterr().out.splitlines()[-1]
    assert cli_main(["check", str(cfg.source)]) == 0


async def test_a_catalog_older_than_the_stores_deletes_nothing(pool_config, tmp_path):
    cfg = make_pool(pool_config, 2, 3, extra={"scrub": {"orphan_grace": 0}})
    async with open_pool(cfg) as pool:
        await write_file(pool, "/before.dat", instrument_data(5, 50_000))
    stale = tmp_path / "stale.sqlite"
    shutil.copy(cfg.catalog_path, stale)  # someone keeps a copy of the catalog ...
    async with open_pool(cfg) as pool:
        for i in range(3):  # ... and the pool moves on, with versions from a newly reserved block
            await write_file(pool, f"/after{i}.dat", instrument_data(6 + i, 400 * 4096))
    shutil.copy(stale, cfg.catalog_path)  # ... and puts the old copy back
    for suffix in ("-wal", "-shm"):
        (cfg.catalog_path.parent / (cfg.catalog_path.name + suffix)).unlink(missing_ok=True)
    before = sum(len(shard_files(sc.path)) for sc in cfg.stores)

    report = await recovery.check(cfg, repair=True)

    assert report.counts().get("catalog-behind") == 1
    assert report.counts()["unreferenced-shard"] > 0
    assert not any(f.action for f in report.findings if f.kind == "unreferenced-shard")
    assert sum(len(shard_files(sc.path)) for sc in cfg.stores) == before

"""Repair, scrub and the store lifecycle against real stores (tmpfs) and a
real catalog: files go in through the pool API and come back bit-exact."""
from __future__ import annotations

import collections
import contextlib
import json
import os
import random
import stat
import subprocess
import time
from pathlib import Path

import pytest
import trio
from hypothesis import given
from hypothesis import strategies as st

from gateway import admin, config
from gateway.catalog import ROOT
from gateway.cli import main
from gateway.errors import ShoalError
from gateway.health import HealthMonitor
from gateway.lifecycle import StoreRefused, control_handlers, fail_store, replace_store, retire_store
from gateway.pool import open_pool
from gateway.repair import Repairer, TokenBucket
from gateway.scrub import Scrubber
from gateway.store import ShardName, read_label
from mounting import mount_tmpfs, requires_fuse, requires_root, shoal_argv, unmount_all

STRIPE = 64 << 10
QUIET = {"repair": {"rate": 0}, "scrub": {"rate": 0}}


# ---------------------------------------------------------------- helpers

async def init(path: Path) -> config.PoolConfig:
    cfg = config.load(path)
    await trio.to_thread.run_sync(admin.init_pool, cfg)
    return cfg


async def write_file(pool, name: bytes, data: bytes) -> int:
    node = await pool.create(ROOT, name, mode=stat.S_IFREG | 0o644, uid=0, gid=0)
    fh = await pool.open(node.ino, write=True)
    await pool.write(fh, 0, data)
    await pool.flush(fh)
    await pool.release(fh)
    return node.ino


async def read_file(pool, ino: int) -> bytes:
    node = await pool.getattr(ino)
    fh = await pool.open(ino)
    try:
        return await pool.read(fh, 0, node.size)
    finally:
        await pool.release(fh)


async def write_files(pool, count: int, seed: int, prefix: bytes = b"f") -> dict[int, bytes]:
    rnd = random.Random(seed)
    files = {}
    for i in range(count):
        data = rnd.randbytes(rnd.randrange(STRIPE // 2, 5 * STRIPE))
        files[await write_file(pool, prefix + str(i).encode(), data)] = data
    await pool.drain()  # every background shard put recorded
    return files


async def assert_files(pool, files: dict[int, bytes]) -> None:
    for ino, data in files.items():
        pool.cache.drop_file((await pool.getattr(ino)).file_id)  # read from the stores, not the cache
        assert await read_file(pool, ino) == data, f"inode {ino} differs"


async def all_stripes(pool):
    out = []
    after = (0, -1)
    while page := await pool.db(pool.catalog.stripe_page, after, 1000):
        out += page
        after = (page[-1][1].ino, page[-1][1].idx)
    return out


async def assert_intact(pool, n: int) -> None:
    for _, rec in await all_stripes(pool):
        sids = [s.store_id for s in rec.shards]
        assert len(rec.shards) == n and all(s.state == "ok" for s in rec.shards), rec
        assert None not in sids and len(set(sids)) == n, rec
    usable = [sid for sid, s in pool.slots.items() if s.readable]
    health = await pool.db(pool.catalog.stripe_health, usable)
    assert health["degraded"] == health["critical"] == health["lost"] == 0, health
    assert await pool.db(pool.catalog.repair_queue_length) == 0


def slot_at(pool, path) -> object:
    return next(s for s in pool.slots.values() if s.path == str(path))


def puts(pool) -> dict[str, int]:
    return {sid: s.store.statistics().puts for sid, s in pool.slots.items()}


def shard_files(paths) -> list[Path]:
    out = []
    for p in paths:
        for root, _, names in os.walk(Path(p) / "shards"):
            out += [Path(root) / n for n in names if n.endswith(".shd")]
    return sorted(out)


async def until(cond, timeout: float = 30.0, step: float = 0.02) -> None:
    with trio.fail_after(timeout):
        while not cond():
            await trio.sleep(step)


# ---------------------------------------------------------------- the token bucket (pure)

@given(st.integers(1, 1 << 20), st.integers(1, 1 << 20),
       st.lists(st.tuples(st.floats(0, 2), st.integers(0, 1 << 21)), max_size=40))
def test_token_bucket_never_releases_more_than_burst_plus_rate(rate, burst, steps):
    now = [0.0]
    bucket = TokenBucket(rate, burst=burst, clock=lambda: now[0])
    released = []  # (time the bytes may be used, bytes)
    for dt, n in steps:
        now[0] += dt
        released.append((now[0] + bucket.charge(n), n))
    for t, _ in released:
        total = sum(n for when, n in released if when <= t + 1e-9)
        assert total <= burst + rate * t + 1e-6 * (1 + rate * t)
    assert bucket.charged == sum(n for _, n in steps)


def test_token_bucket_unlimited():
    b = TokenBucket(0)
    assert b.charge(1 << 40) == 0.0 and b.charged == 1 << 40


# ---------------------------------------------------------------- replacement

@requires_root
async def test_wiped_store_is_rebuilt_onto_its_replacement(store_dirs, pool_config):
    paths = store_dirs(6)
    cfg = await init(pool_config(4, 6, stores=paths, stripe_size=STRIPE, extra=QUIET))
    async with open_pool(cfg) as pool:
        files = await write_files(pool, 8, seed=1)
        old = slot_at(pool, paths[3]).store_id
        held = await pool.db(pool.catalog.store_shard_count, old)
    assert held > 10
    # The disk dies. Until the new one is mounted, the path is an empty directory on the parent filesystem.
    unmount_all(paths[3])
    with pytest.raises(StoreRefused, match="same filesystem"):
        await replace_store(cfg, paths[3])
    mount_tmpfs(paths[3], "64m")
    with pytest.raises(StoreRefused, match="not empty"):
        (paths[3] / "stray").write_text("x")
        await replace_store(cfg, paths[3])
    (paths[3] / "stray").unlink()

    change = await replace_store(cfg, paths[3], wait=True)
    assert change.action == "replaced" and change.replaces == old
    assert change.shards_repointed == held
    assert change.repair["repaired_shards"] == held and change.repair["queue_stripes"] == 0
    assert read_label(paths[3]).replaces == old

    async with open_pool(cfg) as pool:
        new = slot_at(pool, paths[3]).store_id
        assert new == change.store_id != old
        assert await pool.db(pool.catalog.store_shard_count, old) == 0
        assert await pool.db(pool.catalog.store_shard_count, new) == held
        assert len(shard_files([paths[3]])) == held
        records = {r.store_id: r for r in await pool.db(pool.catalog.stores)}
        assert records[old].admin == "failed" and records[new].replaces == old
        await assert_intact(pool, 6)
        await assert_files(pool, files)
        assert pool.io.stats.degraded_reads == 0  # every data shard was back in place

    with pytest.raises(StoreRefused, match="still at"):
        await replace_store(cfg, paths[3])


async def test_shard_a_read_found_corrupt_is_rewritten_from_k_others(store_dirs, pool_config):
    # A read marks the bad shard's row, so repair reads it again; of the
    # shards whose rows say 'ok' it reads only k (data shards first).
    paths = store_dirs(6)
    cfg = await init(pool_config(4, 6, stores=paths, stripe_size=STRIPE, extra=QUIET))
    async with open_pool(cfg) as pool:
        files = await write_files(pool, 3, seed=21)
        stripes = await all_stripes(pool)
        victims = []
        for _, rec in stripes:  # data shard 1 of every stripe, flipped on disk
            fid = (await pool.getattr(rec.ino)).file_id
            loc = next(s for s in rec.shards if s.shard == 1)
            p = Path(pool.slots[loc.store_id].path) / ShardName(fid, rec.idx, rec.version, 1).relpath()
            blob = bytearray(p.read_bytes())
            blob[-1] ^= 0x01
            p.write_bytes(bytes(blob))
            victims.append((rec.ino, rec.idx, p, bytes(blob)))
        await assert_files(pool, files)  # right bytes: decoded around the bad shards
        await pool.flush_news()
        for ino, idx, _, _ in victims:
            row = next(s for s in (await pool.db(pool.catalog.stripe, ino, idx)).shards if s.shard == 1)
            assert row.state == "corrupt"
        assert await pool.db(pool.catalog.repair_queue_length) == len(victims)
        rep = Repairer(pool, cfg)
        stats = await rep.run_until_empty()
        assert stats["repaired_shards"] == len(victims) and stats["queue_stripes"] == 0
        # Each stripe: its doubtful shard (bad, so not counted) and then k 'ok' ones verified.
        assert stats["verified_shards"] == 4 * len(victims)
        for _, _, p, bad in victims:
            assert p.read_bytes() != bad  # rewritten in place, under the same name
        await assert_intact(pool, 6)
        await assert_files(pool, files)


async def wiped_store_pool(store_dirs, pool_config, *, deadline: float, files: int, seed: int):
    """A six-store pool with files written and store 3's disk swapped for an
    empty one: (cfg, paths, files, shards store 3 held)."""
    paths = store_dirs(6)
    extra = {**QUIET, "store_io": {"deadline": deadline}}
    cfg = await init(pool_config(4, 6, stores=paths, stripe_size=STRIPE, extra=extra))
    async with open_pool(cfg) as pool:
        written = await write_files(pool, files, seed=seed)
        held = await pool.db(pool.catalog.store_shard_count, slot_at(pool, paths[3]).store_id)
    unmount_all(paths[3])
    mount_tmpfs(paths[3], "64m")
    return cfg, paths, written, held


@contextlib.contextmanager
def stalled_reads(pool, paths):
    """Every get on the stores at paths stalls past its deadline (FaultyStore)
    until the block ends; the real stores are put back then."""
    from faults import FaultPlan, FaultyStore

    slots = [slot_at(pool, p) for p in paths]
    for slot in slots:
        slot.store = FaultyStore(slot.store, FaultPlan.from_spec([("get", None, "stall")]))
    try:
        yield slots
    finally:
        for slot in slots:
            slot.store.release()
            slot.store = slot.store.store


@requires_root
async def test_rebuild_goes_on_when_a_source_store_stalls(store_dirs, pool_config):
    # A store that hangs on reads (FaultyStore: every get stalls past the
    # deadline) costs repair one deadline per wave it was asked in; the
    # stripes are rebuilt from the other shards, and every file stays exact.
    cfg, paths, files, held = await wiped_store_pool(store_dirs, pool_config, deadline=0.5, files=4, seed=31)
    async with open_pool(cfg) as pool:
        await replace_store(pool, paths[3])
        with stalled_reads(pool, paths[:1]) as (hung,):
            stats = await Repairer(pool, cfg).run_until_empty()
            assert stats["repaired_shards"] == held and stats["queue_stripes"] == 0
            assert hung.store.statistics().stalls >= 1  # it was asked, and it hung
        await assert_intact(pool, 6)
        await assert_files(pool, files)


@requires_root
async def test_stripes_behind_stalled_stores_wait_and_are_never_called_lost(store_dirs, pool_config):
    # Three of six stores hang on reads while a fourth is rebuilt: fewer
    # than k shards answer, but those stores hold the shards, so the stripes
    # wait (still queued) instead of being written off as lost; once the
    # stores answer again the rebuild completes.
    cfg, paths, files, held = await wiped_store_pool(store_dirs, pool_config, deadline=0.3, files=3, seed=32)
    async with open_pool(cfg) as pool:
        await replace_store(pool, paths[3])
        rep = Repairer(pool, cfg)
        with stalled_reads(pool, paths[:3]):
            stats = await rep.run_until_empty()
        assert stats["stripes_lost"] == 0 and stats["queue_stripes"] > 0
        stats = await rep.run_until_empty()  # the stores answer again
        assert stats["queue_stripes"] == 0 and stats["stripes_lost"] == 0
        assert stats["repaired_shards"] == held
        await assert_intact(pool, 6)
        await assert_files(pool, files)


async def test_wait_settled_counts_the_queue_afresh(store_dirs, pool_config):
    # `shoal repair --wait` through the daemon asks wait_settled: stripes
    # queued behind the worker's back (a store replaced a moment ago) must
    # not read as "settled" before the worker has looked.
    cfg = await init(pool_config(4, 6, stripe_size=STRIPE, extra=QUIET))
    async with open_pool(cfg) as pool:
        ino = next(iter(await write_files(pool, 1, seed=23)))
        rep = Repairer(pool, cfg)
        assert rep.settled()
        await pool.db(pool.catalog.queue_repair, [(ino, 0, "test")])
        await rep.wait_settled(0.2)
        assert rep.queue_stripes == 1 and not rep.settled()
        await rep.run_until_empty()
        await rep.wait_settled(5)
        assert rep.settled() and rep.queue_stripes == 0


async def test_repair_memory_gives_way_to_writers(autojump_clock):
    # ByteBudget.wait_room, which repair waits in before reading a group:
    # it takes idle memory up to its limit, but not while a writer has been
    # short of room within the last PRESSURE_WINDOW seconds.
    from gateway.pool import PRESSURE_WINDOW, ByteBudget

    budget = ByteBudget(100)
    await budget.wait_room(90, 75)  # idle budget: even an oversized group starts
    budget.take(40)
    with trio.move_on_after(1) as scope:
        await budget.wait_room(40, 75)  # 80 > 75: waits
    assert scope.cancelled_caught
    await budget.wait_room(30, 75)  # 70 <= 75: goes
    budget.note_pressure()  # a writer found no room
    start = trio.current_time()
    async with trio.open_nursery() as nursery:
        nursery.start_soon(budget.wait_room, 1, 75)
    assert trio.current_time() - start >= PRESSURE_WINDOW
    budget.give(40)
    await budget.wait_room(1, 75)  # idle again


# ---------------------------------------------------------------- away within grace

FAST = {"store_io": {"probe_interval": 0.05, "probe_deadline": 0.5, "deadline": 2, "good_probes_to_return": 2},
        "repair": {"rate": 0, "grace": "1h"}}


@requires_root
async def test_store_back_within_grace_gets_only_what_it_missed(bound_stores, pool_config):
    stores = bound_stores(6)
    cfg = await init(pool_config(4, 6, stores=[s.path for s in stores], stripe_size=STRIPE, extra=FAST))
    async with open_pool(cfg) as pool, trio.open_nursery() as nursery:
        mon, rep = HealthMonitor(pool, cfg), Repairer(pool, cfg)
        nursery.start_soon(mon.run)
        nursery.start_soon(rep.run)
        before = await write_files(pool, 4, seed=2, prefix=b"a")
        away = slot_at(pool, stores[1].path)
        stores[1].pull()
        await until(lambda: away.state == "offline")
        await assert_files(pool, before)  # degraded reads while it is away
        during = await write_files(pool, 4, seed=3, prefix=b"b")
        missed = 0
        for ino in during:
            for rec in (await pool.db(pool.catalog.stripes, ino)).values():
                assert [s.shard for s in rec.shards if s.store_id is None] == [5]  # its place is empty
                missed += 1
        assert missed >= 4
        # Repair leaves the away store's place empty: nothing moves elsewhere within grace.
        await until(lambda: rep.queue_stripes == missed and rep.statistics()["waiting_stripes"] == missed)
        assert rep.repaired_shards == 0
        count = puts(pool)

        stores[1].put_back()
        await until(lambda: away.state == "online")
        await until(lambda: rep.repaired_shards == missed and rep.queue_stripes == 0)
        after = puts(pool)
        assert after[away.store_id] - count[away.store_id] == missed
        assert all(after[sid] == count[sid] for sid in after if sid != away.store_id)
        await assert_intact(pool, 6)
        await assert_files(pool, {**before, **during})
        nursery.cancel_scope.cancel()


# ---------------------------------------------------------------- failed store, more stores than n

DOMAINS = ["a", "a", "b", "b", "c", "c", "d", "d"]


@requires_root
async def test_failed_store_is_rebuilt_on_the_others_across_domains(store_dirs, pool_config):
    paths = store_dirs(8)
    cfg = await init(pool_config(4, 6, stores=paths, domains=DOMAINS, stripe_size=STRIPE, extra=QUIET))
    async with open_pool(cfg) as pool:
        files = await write_files(pool, 10, seed=4)
        dead = slot_at(pool, paths[0])
        held = await pool.db(pool.catalog.store_shard_count, dead.store_id)
        before = {(rec.ino, rec.idx): {s.shard: s.store_id for s in rec.shards} for _, rec in await all_stripes(pool)}
        rep = Repairer(pool, cfg)
        change = await fail_store(pool, paths[0], repairer=rep, wait=True)
        assert change.action == "failed" and dead.state == "failed" and not dead.readable
        assert change.repair["repaired_shards"] == held
        assert await pool.db(pool.catalog.store_shard_count, dead.store_id) == 0
        await assert_intact(pool, 6)
        landed = collections.Counter()
        for _, rec in await all_stripes(pool):
            where = {s.shard: s.store_id for s in rec.shards}
            per_domain = collections.Counter(pool.slots[s].domain for s in where.values())
            assert max(per_domain.values()) <= pool.cap == 2
            moved = {i for i in where if where[i] != before[(rec.ino, rec.idx)][i]}
            assert moved == {i for i, s in before[(rec.ino, rec.idx)].items() if s == dead.store_id}
            landed.update(pool.slots[where[i]].domain for i in moved)
        assert sum(landed.values()) == held and len(landed) >= 2, landed
        await assert_files(pool, files)
        with pytest.raises(StoreRefused, match="already failed"):
            await fail_store(pool, paths[0])


# ---------------------------------------------------------------- bit rot: scrub finds, repair fixes

@requires_root
async def test_scrub_finds_every_flipped_shard_and_repair_fixes_it(store_dirs, pool_config):
    paths = store_dirs(6)
    extra = {**QUIET, "scrub": {"rate": 0, "orphan_grace": 0}, "store_io": {"deadline": 2}}
    cfg = await init(pool_config(4, 6, stores=paths, stripe_size=STRIPE, extra=extra))
    rnd = random.Random(5)
    async with open_pool(cfg) as pool:
        files = await write_files(pool, 14, seed=5)
    every = shard_files(paths)
    originals = {p: p.read_bytes() for p in every}
    victims = rnd.sample(every, max(4, len(every) // 100))
    for p in victims:
        blob = bytearray(originals[p])
        blob[rnd.randrange(len(blob))] ^= 1 << rnd.randrange(8)
        p.write_bytes(bytes(blob))
    # A valid shard file under another shard's name, an orphan and a stale temporary file.
    # (a and b: two shards of one stripe, so a's file fits where b's should be.)
    by_stripe = collections.defaultdict(list)
    for p in every:
        if p not in victims:
            sn = ShardName.from_basename(p.name)
            by_stripe[(sn.file_id, sn.stripe_index)].append(p)
    a, b = next(ps for ps in by_stripe.values() if len(ps) >= 2)[:2]
    name = ShardName.from_basename(a.name)
    b.write_bytes(originals[a])
    orphan = a.parent / ShardName(name.file_id, name.stripe_index, name.version + 10_000, 0).basename()
    orphan.write_bytes(originals[a])
    temp = a.parent / ".tmp-0123456789abcdef"
    temp.write_bytes(b"half a shard")
    old = time.time() - 3600
    os.utime(orphan, (old, old))
    os.utime(temp, (old, old))

    async with open_pool(cfg) as pool:
        scrub = Scrubber(pool, cfg)
        found = await scrub.scrub_once()
        assert found["errors"] == {"corrupt": len(victims), "missing": 0, "header_mismatch": 1, "orphan": 1}
        assert found["orphans_removed"] == 1 and found["temp_removed"] == 1
        assert not orphan.exists() and not temp.exists()
        assert found["shards_checked"] == len(every)
        assert scrub.statistics()["progress_ratio"] == 1.0 and scrub.statistics()["last_complete_time"]
        rows = collections.Counter(s.state for _, rec in await all_stripes(pool) for s in rec.shards)
        assert rows["corrupt"] == len(victims) + 1

        rep = Repairer(pool, cfg)
        stats = await rep.run_until_empty()
        assert stats["repaired_shards"] == len(victims) + 1 and stats["queue_stripes"] == 0
        # Regenerated shards are byte-for-byte the shards that were lost.
        for p in victims + [b]:
            assert p.read_bytes() == originals[p], p
        again = await scrub.scrub_once()
        assert again["errors"] == {"corrupt": 0, "missing": 0, "header_mismatch": 0, "orphan": 0}
        await assert_intact(pool, 6)
        await assert_files(pool, files)


# ---------------------------------------------------------------- retire

@requires_root
async def test_retired_store_drains_and_nothing_is_lost(store_dirs, pool_config):
    paths = store_dirs(7)
    cfg = await init(pool_config(4, 6, stores=paths, stripe_size=STRIPE, extra=QUIET))
    async with open_pool(cfg) as pool:
        files = await write_files(pool, 8, seed=6)
        held = await pool.db(pool.catalog.store_shard_count, slot_at(pool, paths[0]).store_id)
    async with open_pool(cfg) as pool:  # the others are (as if) full: refused, and nothing changes
        for s in pool.slots.values():
            if s.path != str(paths[0]):
                s.free_bytes = 1024
        with pytest.raises(StoreRefused, match=r"would move .* MiB of shards, but the other writable stores"):
            await retire_store(pool, paths[0])
        assert slot_at(pool, paths[0]).admin == "active" and await pool.db(pool.catalog.repair_queue_length) == 0
    change = await retire_store(cfg, paths[0], wait=True)
    assert change.action == "retired" and change.repair["repaired_shards"] == held
    with pytest.raises(StoreRefused, match="cannot hold n = 6"):
        await retire_store(cfg, paths[1])
    with pytest.raises(StoreRefused, match="already retired"):
        await retire_store(cfg, paths[0])
    async with open_pool(cfg) as pool:
        slot = slot_at(pool, paths[0])
        assert slot.admin == "retired" and not slot.writable
        assert await pool.db(pool.catalog.store_shard_count, slot.store_id) == 0
        await pool.collect_garbage()
        assert shard_files([paths[0]]) == []  # the drained copies are deleted
        await assert_intact(pool, 6)
        await assert_files(pool, files)
        # New writes never land on it.
        ino = await write_file(pool, b"late", bytes(3 * STRIPE))
        assert all(s.store_id != slot.store_id for r in (await pool.db(pool.catalog.stripes, ino)).values()
                   for s in r.shards)


# ---------------------------------------------------------------- killed mid-repair

@requires_root
async def test_repair_cancelled_midway_completes_after_reopening(store_dirs, pool_config):
    paths = store_dirs(7)
    cfg = await init(pool_config(4, 6, stores=paths, stripe_size=STRIPE, extra=QUIET))
    async with open_pool(cfg) as pool:
        files = await write_files(pool, 10, seed=7)
        dead = slot_at(pool, paths[2]).store_id
        held = await pool.db(pool.catalog.store_shard_count, dead)
        await fail_store(pool, paths[2])
        rep = Repairer(pool, cfg)
        with trio.CancelScope() as cs:
            def stop_early(st):
                if st["stripes_repaired"] >= 3:
                    cs.cancel()
            await rep.run_until_empty(stop_early)
        first = rep.repaired_shards
        assert 3 <= first < held
        assert await pool.db(pool.catalog.repair_queue_length) > 0
    async with open_pool(cfg) as pool:
        assert slot_at(pool, paths[2]).state == "failed"
        assert await pool.db(pool.catalog.intents) == []
        rep = Repairer(pool, cfg)
        stats = await rep.run_until_empty()
        assert first + stats["repaired_shards"] <= held + 1  # a stripe cut short may be written twice
        assert await pool.db(pool.catalog.store_shard_count, dead) == 0
        await assert_intact(pool, 6)
        await assert_files(pool, files)


# ---------------------------------------------------------------- rate limit

@requires_root
async def test_rate_limit_charges_every_regenerated_byte(store_dirs, pool_config):
    paths = store_dirs(6)
    cfg = await init(pool_config(4, 6, stores=paths, stripe_size=STRIPE, extra={"repair": {"rate": "8MiB"}}))
    async with open_pool(cfg) as pool:
        files = await write_files(pool, 4, seed=8)
        victims = shard_files([paths[4]])
        for p in victims:
            p.unlink()
        # As a read or scrub that met them would: rows marked, stripes queued.
        sid = slot_at(pool, paths[4]).store_id
        await pool.db(pool.catalog.set_shard_states, [(rec.ino, rec.idx, rec.version, s.shard, None, "missing")
                                                      for _, rec in await all_stripes(pool)
                                                      for s in rec.shards if s.store_id == sid])
        await pool.db(pool.catalog.queue_store_stripes, sid, "test")
        rep = Repairer(pool, cfg)
        stats = await rep.run_until_empty()
        assert rep.bucket.rate == 8 << 20
        assert stats["repaired_shards"] == len(victims)
        assert rep.bucket.charged == stats["repaired_bytes"] == sum(len(p.read_bytes()) for p in victims)
        assert stats["eta_seconds"] == 0.0 and stats["last_progress_time"]
        await assert_intact(pool, 6)
        await assert_files(pool, files)


# ---------------------------------------------------------------- the commands, offline

@requires_root
def test_store_commands_offline(store_dirs, pool_config, tmp_path, capsys):
    paths = store_dirs(7)
    cp = pool_config(4, 6, stores=paths[:6], stripe_size=STRIPE, extra=QUIET)
    cfg = trio.run(init, cp)

    async def fill():
        async with open_pool(cfg) as pool:
            return await write_files(pool, 4, seed=9)
    files = trio.run(fill)

    assert main(["store", "add", str(cp), str(paths[6]), "--domain", "spare"]) == 0
    out = capsys.readouterr().out
    assert "[[store]]" in out and f'path = "{paths[6]}"' in out and 'domain = "spare"' in out
    assert main(["store", "add", str(cp), str(paths[6])]) == 1
    assert "already" in capsys.readouterr().err
    busy = tmp_path / "busy"
    busy.mkdir()
    (busy / "x").write_text("x")
    assert main(["store", "add", str(cp), str(busy)]) == 1
    assert "not empty" in capsys.readouterr().err

    # The admin adds the table to the config; then a store is declared failed and repaired.
    with open(cp, "a") as f:
        f.write(f'\n[[store]]\npath = "{paths[6]}"\ndomain = "spare"\n')
    assert main(["store", "fail", str(cp), str(paths[0])]) == 0
    assert "queued" in capsys.readouterr().out
    assert main(["repair", str(cp), "--wait"]) == 0
    assert "the queue is empty" in capsys.readouterr().out
    assert main(["scrub", str(cp)]) == 0
    assert "no problems" in capsys.readouterr().out

    async def check():
        async with open_pool(config.load(cp)) as pool:
            await assert_intact(pool, 6)
            await assert_files(pool, files)
            assert await pool.db(pool.catalog.store_shard_count, slot_at(pool, paths[6]).store_id) > 0
    trio.run(check)


# ---------------------------------------------------------------- as the daemon runs it

@requires_root
async def test_daemon_wiring_add_fail_and_scrub_through_the_handlers(store_dirs, pool_config):
    paths = store_dirs(7)
    extra = {**QUIET, "store_io": {"probe_interval": 0.05, "probe_deadline": 0.5, "deadline": 2}}
    cfg = await init(pool_config(4, 6, stores=paths[:6], stripe_size=STRIPE, extra=extra))
    async with open_pool(cfg) as pool, trio.open_nursery() as nursery:
        mon, rep, scrub = HealthMonitor(pool, cfg), Repairer(pool, cfg), Scrubber(pool, cfg)
        for task in (mon.run, rep.run, scrub.run):
            nursery.start_soon(task)
        ops = control_handlers(pool, rep, scrub)
        files = await write_files(pool, 6, seed=10)
        added = await ops["store_add"](path=str(paths[6]), domain="spare")
        assert added["action"] == "added" and "[[store]]" in added["config_snippet"]
        new = slot_at(pool, paths[6])
        assert new.writable and new.store_id in pool.slots
        await until(lambda: mon.probes[new.store_id] >= 1)  # the monitor picked it up

        dead = slot_at(pool, paths[0])
        held = await pool.db(pool.catalog.store_shard_count, dead.store_id)
        failed = await ops["store_fail"](path=str(paths[0]))
        assert failed["action"] == "failed" and failed["queued_stripes"] > 0
        await until(lambda: rep.repaired_shards == held and rep.queue_stripes == 0)
        st = await ops["repair"](kick=False)
        assert st["queue_stripes"] == 0 and st["repaired_shards"] == held
        # The only store without a shard of each stripe was the new one.
        assert await pool.db(pool.catalog.store_shard_count, new.store_id) == held

        t0 = time.time()
        await ops["scrub"](start=True)
        await until(lambda: not scrub.running and (scrub.last_complete_time or 0) >= t0)
        st = await ops["scrub"](start=False)
        assert st["errors"] == {"corrupt": 0, "missing": 0, "header_mismatch": 0, "orphan": 0}
        assert st["shards_checked"] == 6 * len(await all_stripes(pool))
        with pytest.raises(StoreRefused, match="already store"):
            await ops["store_add"](path=str(paths[6]))
        await assert_intact(pool, 6)
        await assert_files(pool, files)
        nursery.cancel_scope.cancel()


@requires_root
async def test_queue_order_is_lowest_margin_first(store_dirs, pool_config):
    cfg = await init(pool_config(4, 6, stripe_size=STRIPE, extra=QUIET))
    async with open_pool(cfg) as pool:
        inos = list(await write_files(pool, 3, seed=11))
        recs = [(await pool.db(pool.catalog.stripes, ino))[0] for ino in inos]
        lose = {recs[0].ino: 1, recs[1].ino: 2, recs[2].ino: 0}  # margins 1, 0 and 2
        await pool.db(pool.catalog.set_shard_states,
                      [(r.ino, 0, r.version, i, None, "missing") for r in recs for i in range(lose[r.ino])])
        await pool.db(pool.catalog.queue_repair, [(r.ino, 0, "test") for r in recs] + [(99_999, 0, "gone")])
        usable = list(pool.slots)
        batch = await pool.db(pool.catalog.repair_batch, usable, 10)
        assert [(ino, margin) for ino, _, _, margin in batch] == \
            [(99_999, None), (recs[1].ino, 0), (recs[0].ino, 1), (recs[2].ino, 2)]
        # A store that is away counts against the margin too.
        away = recs[2].shards[5].store_id
        batch = await pool.db(pool.catalog.repair_batch, [s for s in usable if s != away], 10)
        assert dict((ino, m) for ino, _, _, m in batch)[recs[2].ino] == 1


@requires_root
async def test_store_away_past_grace_is_rebuilt_elsewhere_and_cleaned_when_back(bound_stores, pool_config):
    stores = bound_stores(7)
    extra = {**FAST, "repair": {"rate": 0, "grace": 0.3}}
    cfg = await init(pool_config(4, 6, stores=[s.path for s in stores], stripe_size=STRIPE, extra=extra))
    async with open_pool(cfg) as pool, trio.open_nursery() as nursery:
        mon, rep = HealthMonitor(pool, cfg), Repairer(pool, cfg)
        rep.scan_interval = 0.1
        nursery.start_soon(mon.run)
        files = await write_files(pool, 6, seed=12)
        away = slot_at(pool, stores[4].path)
        held = await pool.db(pool.catalog.store_shard_count, away.store_id)
        nursery.start_soon(rep.run)
        stores[4].pull()
        await until(lambda: rep.repaired_shards == held and rep.queue_stripes == 0)
        assert await pool.db(pool.catalog.store_shard_count, away.store_id) == 0
        await assert_intact(pool, 6)
        stores[4].put_back()
        await until(lambda: away.state == "online")
        await pool.collect_garbage()
        assert shard_files([stores[4].path]) == []  # its old copies were listed as garbage
        await assert_files(pool, files)
        nursery.cancel_scope.cancel()


@requires_root
async def test_regenerated_shard_of_an_overwritten_stripe_becomes_garbage(store_dirs, pool_config):
    cfg = await init(pool_config(4, 6, stripe_size=STRIPE, extra=QUIET))
    async with open_pool(cfg) as pool:
        ino = next(iter(await write_files(pool, 1, seed=13)))
        rec = (await pool.db(pool.catalog.stripes, ino))[0]
        fid = (await pool.getattr(ino)).file_id
        other = rec.shards[1].store_id
        before = await pool.db(pool.catalog.counts)
        # As if the stripe had been overwritten while repair worked on version - 1.
        await pool.db(pool.catalog.queue_repair, [(ino, 0, "test")])
        applied = await pool.db(pool.catalog.record_repairs, [(ino, 0, rec.version - 1, fid, [(0, other, None)], True)])
        assert applied == ([0], 0)
        assert await pool.db(pool.catalog.repair_queue_length) == 1  # not dequeued: look again
        assert (await pool.db(pool.catalog.stripe, ino, 0)) == rec
        garbage = await pool.db(pool.catalog.garbage)
        assert (await pool.db(pool.catalog.counts))["garbage"] == before["garbage"] + 1
        assert [(g.store_id, g.version, g.shard) for g in garbage][-1] == (other, rec.version - 1, 0)
        # The current version applies, and the replaced copy is listed for deletion.
        old = rec.shards[0].store_id
        assert await pool.db(pool.catalog.record_repairs, [(ino, 0, rec.version, fid, [(0, other, old)], True)]) == ([1], 1)
        assert await pool.db(pool.catalog.repair_queue_length) == 0
        now = await pool.db(pool.catalog.stripe, ino, 0)
        assert now.shards[0].store_id == other and now.shards[0].state == "ok"
        assert [(g.store_id, g.version, g.shard) for g in await pool.db(pool.catalog.garbage)][-1] == (old, rec.version, 0)


# ---------------------------------------------------------------- through a mounted daemon

def shoal(*args) -> subprocess.CompletedProcess:
    r = subprocess.run(shoal_argv(*args), capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, f"shoal {' '.join(map(str, args))} exited {r.returncode}: {r.stderr}"
    return r


@requires_root
@requires_fuse
def test_commands_reach_the_running_daemon(store_dirs, pool_config, mount_process, tmp_path):
    paths = store_dirs(7)
    cp = pool_config(4, 6, stores=paths, stripe_size=STRIPE, extra=QUIET)
    shoal("init", cp)
    mp = mount_process(shoal_argv("mount", cp, tmp_path / "mnt"), tmp_path / "mnt")
    rnd = random.Random(14)
    want = {f"f{i}": rnd.randbytes(rnd.randrange(STRIPE, 6 * STRIPE)) for i in range(5)}
    for name, data in want.items():
        (mp.mountpoint / name).write_bytes(data)

    on_failed = len(shard_files([paths[3]]))
    out = shoal("store", "fail", cp, paths[3]).stdout
    assert "failed" in out and "declared failed" in mp.log_text()  # the daemon did it, not this process
    repaired = shoal("repair", cp, "--wait").stdout
    assert "the queue is empty" in repaired
    assert int(repaired.split("repair: ")[1].split()[0]) > 0  # shards were rebuilt by the daemon
    assert "no problems" in shoal("scrub", cp, "--wait").stdout
    st = json.loads(shoal("status", cp, "--json").stdout)
    assert st["pool"]["mounted"] and st["stripes"]["degraded"] == st["stripes"]["critical"] == 0
    assert {s["path"]: s["state"] for s in st["stores"]}[str(paths[3])] == "failed"
    r = subprocess.run(shoal_argv("store", "fail", cp, paths[3]), capture_output=True, text=True, timeout=60)
    assert r.returncode == 1 and "already failed" in r.stderr
    Path("/proc/sys/vm/drop_caches").write_text("3\n")
    for name, data in want.items():
        assert (mp.mountpoint / name).read_bytes() == data
    assert len(shard_files([paths[3]])) == on_failed  # a failed store is neither written nor cleaned
    mp.unmount()


@requires_root
@pytest.mark.allow_errors("is lost")
async def test_stripe_with_fewer_than_k_shards_left_is_reported_lost_not_invented(store_dirs, pool_config):
    paths = store_dirs(6)
    cfg = await init(pool_config(4, 6, stores=paths, stripe_size=STRIPE, extra=QUIET))
    async with open_pool(cfg) as pool:
        files = await write_files(pool, 2, seed=15)
        for p in paths[:3]:
            await fail_store(pool, p)
        rep = Repairer(pool, cfg)
        stats = await rep.run_until_empty()
        stripes = len(await all_stripes(pool))
        assert stats["stripes_lost"] == stripes and stats["repaired_shards"] == 0
        assert stats["queue_stripes"] == 0
        for ino in files:
            with pytest.raises(ShoalError):
                await read_file(pool, ino)

"""The dispersal engine through the pool API: write path with the
write-quorum gate, read path with degraded decode, memory cap, clean-up."""
from __future__ import annotations

import os
import random
import stat

import pytest
import trio

from faults import FaultPlan, FaultyStore
from gateway.errors import QuorumError, ReadOnly, StripeLost
from gateway.pool import open_pool
from pooltools import KiB, make_config, read_file, shard_files, write_file

STRIPE = 64 * KiB


async def test_round_trip_sizes(tmp_path):
    cfg = make_config(tmp_path, k=4, n=6, w=5, stripe_size=STRIPE)
    rng = random.Random(1)
    sizes = [0, 1, STRIPE - 1, STRIPE, STRIPE + 1, 3 * STRIPE, 5 * STRIPE + 777]
    files = {f"run-{s:07d}.bin".encode(): rng.randbytes(s) for s in sizes}
    async with open_pool(cfg) as pool:
        for name, data in files.items():
            await write_file(pool, name, data, chunk=rng.choice([4096, 10_000, STRIPE]))
        for name, data in files.items():
            assert await read_file(pool, name) == data
    async with open_pool(cfg) as pool:  # and after a restart, from the stores alone
        for name, data in files.items():
            assert await read_file(pool, name) == data
    # Every stripe is on n distinct stores: n shard files per stripe.
    stripes = sum(-(-s // STRIPE) for s in sizes)
    assert len(shard_files(cfg)) == 6 * stripes


async def test_random_offsets_match_a_bytearray(tmp_path):
    """Writes at any offset, holes as zeros: the same writes on a bytearray are the reference."""
    cfg = make_config(tmp_path, k=2, n=3, stripe_size=16 * KiB)
    rng = random.Random(7)
    ref = bytearray()
    async with open_pool(cfg) as pool:
        node = await pool.create(1, b"sparse", mode=stat.S_IFREG | 0o644, uid=0, gid=0)
        for round_ in range(4):
            fh = await pool.open(node.ino, write=True)
            for _ in range(30):
                off = rng.randrange(0, 200 * KiB)
                data = rng.randbytes(rng.randrange(1, 9000))
                await pool.write(fh, off, data)
                if len(ref) < off + len(data):
                    ref.extend(bytes(off + len(data) - len(ref)))
                ref[off:off + len(data)] = data
                if rng.random() < 0.2:
                    assert await pool.read(fh, off, len(data)) == data  # uncommitted writes are visible
            await pool.flush(fh)
            await pool.release(fh)
            assert await read_file(pool, b"sparse") == bytes(ref)
        cut = 50 * KiB + 3
        await pool.setattr(node.ino, size=cut)
        del ref[cut:]
        await pool.setattr(node.ino, size=cut + 30 * KiB)  # truncate up: the gap reads as zeros
        ref.extend(bytes(30 * KiB))
        assert await read_file(pool, b"sparse") == bytes(ref)
    async with open_pool(cfg) as pool:
        assert await read_file(pool, b"sparse") == bytes(ref)


async def test_degraded_reads_and_lost_stripes(tmp_path):
    cfg = make_config(tmp_path, k=4, n=6, stripe_size=STRIPE)
    data = os.urandom(4 * STRIPE + 100)
    async with open_pool(cfg) as pool:
        await write_file(pool, b"a", data)
    # Take away n - k = 2 whole stores' shards: reads still bit-exact.
    for store in cfg.stores[:2]:
        for p in (store.path / "shards").rglob("*.shd"):
            p.unlink()
    async with open_pool(cfg) as pool:
        assert await read_file(pool, b"a") == data
        assert pool.io.stats.degraded_reads > 0
    for p in (cfg.stores[2].path / "shards").rglob("*.shd"):
        p.unlink()
    async with open_pool(cfg) as pool:
        with pytest.raises(StripeLost, match="3 of k=4"):
            await read_file(pool, b"a")


@pytest.mark.parametrize("damage", ["flip", "truncate", "foreign-header"])
async def test_corrupt_shards_are_missing_and_queued(tmp_path, damage):
    cfg = make_config(tmp_path, k=4, n=6, stripe_size=STRIPE)
    data = os.urandom(2 * STRIPE)
    async with open_pool(cfg) as pool:
        await write_file(pool, b"a", data)
    victims = [p for p in shard_files(cfg) if p.name.endswith(".0.shd")]  # a data shard of each stripe
    for p in victims:
        blob = bytearray(p.read_bytes())
        if damage == "flip":
            blob[len(blob) // 2] ^= 0x40
        elif damage == "truncate":
            del blob[len(blob) - 100:]
        else:  # a valid shard of another stripe under this name
            other = next(q for q in shard_files(cfg) if q.name.endswith(".1.shd"))
            blob = bytearray(other.read_bytes())
        p.write_bytes(bytes(blob))
    async with open_pool(cfg) as pool:
        assert await read_file(pool, b"a") == data
        assert pool.io.stats.checksum_failures >= len(victims)
        await pool.flush_news()
        queued = await pool.db(pool.catalog.repair_queue)
        assert {idx for _, idx, _ in queued} == {0, 1}


def _faulty(pool, indexes, action):
    """Swap FaultyStores into the given slots: every put gets `action`."""
    wrapped = []
    for i, slot in enumerate(pool.slots.values()):
        if i in indexes:
            slot.store = FaultyStore(slot.store, FaultPlan.from_spec([("put", None, action)]))
            wrapped.append(slot.store)
    return wrapped


@pytest.mark.parametrize("action", ["unavailable", "full", "stall"])
@pytest.mark.parametrize("w_rel", ["k", "k+1", "n"])
async def test_write_quorum(tmp_path, action, w_rel):
    """A commit returns only with >= w durable shards per stripe; otherwise
    QuorumError and the previous content stays."""
    k, n = 3, 5
    w = {"k": k, "k+1": k + 1, "n": n}[w_rel]
    cfg = make_config(tmp_path, k=k, n=n, w=w, stripe_size=16 * KiB, extra="[store_io]\ndeadline = 0.5")
    v1, v2 = os.urandom(40 * KiB), os.urandom(50 * KiB)
    async with open_pool(cfg) as pool:
        await write_file(pool, b"f", v1)
        for failing in range(0, n - k + 1):
            stores = _faulty(pool, set(range(failing)), action)
            try:
                if n - failing >= w:
                    await write_file(pool, b"f", v2)
                    assert await read_file(pool, b"f") == v2
                    await write_file(pool, b"f", v1)
                else:
                    with pytest.raises(QuorumError, match=f"fewer than w = {w}"):
                        await write_file(pool, b"f", v2)
                    assert await read_file(pool, b"f") == v1
                    assert pool.quorum_failures > 0
            finally:
                for s in stores:
                    s.release()
                for slot in pool.slots.values():
                    if isinstance(slot.store, FaultyStore):
                        slot.store = slot.store.store
    async with open_pool(cfg) as pool:
        assert await read_file(pool, b"f") == v1


async def test_memory_cap_bounds_buffered_data(tmp_path):
    cfg = make_config(tmp_path, k=2, n=3, stripe_size=16 * KiB, memory_cap=32 * KiB)
    data = os.urandom(64 * 16 * KiB)
    async with open_pool(cfg) as pool:
        await write_file(pool, b"big", data, chunk=4 * KiB)
        assert pool.budget.peak <= cfg.memory_cap
        assert await read_file(pool, b"big") == data


async def test_sequential_small_reads_use_the_cache(tmp_path):
    cfg = make_config(tmp_path, k=4, n=6, stripe_size=STRIPE)
    data = os.urandom(3 * STRIPE)
    async with open_pool(cfg) as pool:
        await write_file(pool, b"a", data)
    async with open_pool(cfg) as pool:
        assert await read_file(pool, b"a", chunk=4 * KiB) == data
        gets = sum(s.store.statistics().gets for s in pool.slots.values())
        assert gets <= 3 * 6  # about k per stripe, not k per 4 KiB read


async def test_overwrite_is_copy_on_write(tmp_path):
    cfg = make_config(tmp_path, k=2, n=3, stripe_size=16 * KiB)
    async with open_pool(cfg) as pool:
        await write_file(pool, b"a", os.urandom(32 * KiB))
        before = set(shard_files(cfg))
        await write_file(pool, b"a", os.urandom(32 * KiB))
        await pool.flush_news()
        await pool.collect_garbage()
    after = set(shard_files(cfg))
    assert len(after) == 6 and not (before & after)  # new versions; the old shards are gone


async def test_orphans_of_a_crash_are_removed_at_start(tmp_path):
    cfg = make_config(tmp_path, k=2, n=3, stripe_size=16 * KiB)
    async with open_pool(cfg) as pool:
        await write_file(pool, b"kept", os.urandom(20 * KiB))
        kept = set(shard_files(cfg))
        node = await pool.create(1, b"lost", mode=stat.S_IFREG | 0o644, uid=0, gid=0)
        fh = await pool.open(node.ino, write=True)
        await pool.write(fh, 0, os.urandom(64 * KiB))  # four full stripes: dispatched, never committed
        await pool.drain()
        pool.handles.clear()  # the daemon dies here: no flush, no release
        pool.open_files.clear()
    assert len(shard_files(cfg)) > len(kept)
    async with open_pool(cfg) as pool:
        assert set(shard_files(cfg)) == kept
        assert (await pool.getattr(node.ino)).size == 0


async def test_unlinked_open_file_lives_until_release(tmp_path):
    cfg = make_config(tmp_path, k=2, n=3, stripe_size=16 * KiB)
    data = os.urandom(40 * KiB)
    async with open_pool(cfg) as pool:
        ino = await write_file(pool, b"a", data)
        fh = await pool.open(ino, write=True)
        await pool.unlink(1, b"a")
        assert await pool.read(fh, 0, len(data)) == data
        await pool.write(fh, len(data), b"tail")
        assert await pool.read(fh, len(data), 10) == b"tail"
        await pool.release(fh)
        await pool.flush_news()
        await pool.collect_garbage()
    assert shard_files(cfg) == []


async def test_read_only_below_write_quorum(tmp_path):
    cfg = make_config(tmp_path, k=2, n=4, w=3, stripe_size=16 * KiB)
    for store in cfg.stores[:2]:
        (store.path / "shoal-store.json").rename(store.path / "label.away")
    async with open_pool(cfg) as pool:
        assert pool.read_only
        with pytest.raises(ReadOnly):
            await pool.create(1, b"x", mode=stat.S_IFREG | 0o644, uid=0, gid=0)


async def test_capacity_is_free_space_times_k_over_n(tmp_path):
    # Capacity arithmetic, common practice for k-of-n codes: usable = free x k/n.
    cfg = make_config(tmp_path, k=4, n=6)
    async with open_pool(cfg) as pool:
        free = sum(s.free_bytes for s in pool.slots.values())
        assert pool.statfs().free_bytes == free * 4 // 6


async def test_a_failed_commit_is_reported_to_every_open_handle(tmp_path):
    """flush carries no owner: a dup's close must not take the writer's error away."""
    cfg = make_config(tmp_path, k=2, n=3, w=3, stripe_size=16 * KiB, extra="[store_io]\ndeadline = 0.5")
    async with open_pool(cfg) as pool:
        ino = await write_file(pool, b"f", b"v1" * 100)
        writer = await pool.open(ino, write=True)
        dup = await pool.open(ino, write=True)  # another descriptor of the same file
        stores = _faulty(pool, {0}, "unavailable")
        await pool.write(writer, 0, os.urandom(40 * KiB))
        with pytest.raises(QuorumError):
            await pool.flush(dup)  # the dup closes first and sees the failure
        with pytest.raises(QuorumError):
            await pool.flush(writer)  # and so does the writer's own close
        await pool.flush(writer)  # reported once per handle
        for s in stores:
            s.release()
        await pool.release(dup)
        await pool.release(writer)
        assert await read_file(pool, b"f") == b"v1" * 100

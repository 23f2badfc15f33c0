"""Crash safety: whatever stores fail, fill up, stall or lose power, and
wherever the daemon dies, every file whose commit returned reads back
bit-exact after a restart."""
from __future__ import annotations

import random
import shutil
import stat
import tempfile
from pathlib import Path

import trio
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from faults import FaultPlan, FaultyStore
from gateway.errors import ShoalError
from gateway.pool import open_pool
from pooltools import KiB, make_config, read_file

STRIPE = 16 * KiB
N_STORES = 5

fault = st.tuples(
    st.integers(0, N_STORES - 1),
    st.sampled_from(["put", "get", "delete"]),
    st.integers(1, 40),
    st.sampled_from(["unavailable", "full", "stall", "crash", "crash_late", "corrupt", "pause"]),
)
op = st.tuples(st.integers(0, 2), st.integers(0, 3 * STRIPE), st.integers(1, 2 * STRIPE + 5), st.integers(0, 2**32))


def _spec(faults, store):
    out = []
    for s, o, nth, action in faults:
        if s != store:
            continue
        if action == "corrupt" and o != "get":
            o = "get"
        if action in ("crash", "crash_late", "pause") and o != "put":
            o = "put"
        out.append((o, nth, action))
    return out


async def scenario(base: Path, ops, faults, crash_at: int, seed: int) -> None:
    cfg = make_config(base, k=3, n=5, w=4, stripe_size=STRIPE, extra="[store_io]\ndeadline = 0.3")
    committed: dict[bytes, bytes] = {}
    wrapped = []
    async with open_pool(cfg) as pool:
        for i, slot in enumerate(pool.slots.values()):
            slot.store = FaultyStore(slot.store, FaultPlan.from_spec(_spec(faults, i)))
            wrapped.append(slot.store)
        try:
            for step, (f, off, size, dseed) in enumerate(ops):
                if step == crash_at:
                    break
                name = f"run-{f}.dat".encode()
                data = random.Random(dseed).randbytes(size)
                before = committed.get(name, b"")
                try:
                    try:
                        node = await pool.lookup(1, name)
                    except ShoalError:
                        node = await pool.create(1, name, mode=stat.S_IFREG | 0o644, uid=0, gid=0)
                    fh = await pool.open(node.ino, write=True)
                    try:
                        await pool.write(fh, off, data)
                        await pool.flush(fh)
                    finally:
                        pool.handles.pop(fh, None)  # no release: a later crash must not commit for us
                        of = pool.open_files.get(node.ino)
                        if of is not None:
                            of.handles -= 1
                            if of.handles == 0 and not of.changed:
                                del pool.open_files[node.ino]
                except ShoalError:
                    continue  # not acknowledged: the file keeps its committed content
                new = bytearray(before)
                if len(new) < off + size:
                    new.extend(bytes(off + size - len(new)))
                new[off:off + size] = data
                committed[name] = bytes(new)
        finally:
            # Power fails on every store and the daemon dies: puts still in
            # flight keep only their temp files, nothing more is committed.
            for s in wrapped:
                await s.crash()
                s.release()
            pool.handles.clear()
            pool.open_files.clear()
    async with open_pool(cfg) as pool:
        for name, content in committed.items():
            assert await read_file(pool, name) == content, name


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(ops=st.lists(op, min_size=1, max_size=8), faults=st.lists(fault, max_size=5),
       crash_at=st.integers(0, 8), seed=st.integers(0, 1000))
def test_committed_files_survive_faults_and_crashes(ops, faults, crash_at, seed):
    base = Path(tempfile.mkdtemp(prefix="shoal-crash-"))
    try:
        trio.run(scenario, base, ops, faults, crash_at, seed)
    finally:
        shutil.rmtree(base, ignore_errors=True)

"""Moving one stripe between memory and the stores.

``StripeIO.write`` encodes a stripe in a worker thread and puts its shards
on their stores in parallel, reporting each shard's fate as it lands.
``StripeIO.read`` fetches k shards (data shards first), verifies each one,
fetches more when one is missing or corrupt, and decodes. With fewer than k
valid shards it raises StripeLost: it never returns wrong bytes.

Part of the pool layer: it uses store, codec and stats, nothing above.
"""
from __future__ import annotations

import logging
import time
from dataclasses import dataclass, field
from typing import Callable

import trio

from . import codec
from .errors import ShardCorrupt, ShardMissing, ShoalError, StoreError, StoreUnavailable, StripeLost
from .ids import FileId, PoolId, StoreId
from .store import ShardName, Store

log = logging.getLogger(__name__)

# Store states (the glossary): readable ones still serve shards.
STATES = ("online", "offline", "stalled", "full", "foreign", "retiring", "failed")
READABLE = frozenset({"online", "full", "retiring"})


@dataclass(eq=False, kw_only=True)
class StoreSlot:
    """A store as the pool sees it: the Store object plus its live state."""
    store: Store
    store_id: StoreId
    path: str
    domain: str
    admin: str = "active"  # catalog: active | retiring | retired | failed
    state: str = "offline"
    reason: str = "not probed yet"
    free_bytes: int = 0
    total_bytes: int = 0
    state_since: float = field(default_factory=time.time)

    @property
    def readable(self) -> bool:
        return self.state in READABLE

    @property
    def writable(self) -> bool:
        return self.state == "online" and self.admin == "active"


@dataclass(frozen=True, kw_only=True)
class StripeRef:
    """What a reader needs to find a stripe's shards."""
    ino: int | None  # for the repair queue; None for a stripe not yet in the catalog
    file_id: FileId
    idx: int
    version: int
    length: int  # valid bytes; the rest of the stripe reads as zeros
    coded_length: int  # bytes that were encoded (the header's stripe_length)
    k: int
    n: int
    shards: tuple[tuple[int, StoreId | None, str], ...]  # (shard index, store id, state)


@dataclass
class IOStats:
    bytes_read: int = 0
    degraded_reads: int = 0
    checksum_failures: int = 0
    missing_shards: int = 0
    stripes_lost: int = 0


BadShard = Callable[[StripeRef, int, str], None]  # (stripe, shard index, "missing" | "corrupt" | "unreachable")


class StripeIO:
    def __init__(self, *, pool_id: PoolId, slots: dict[StoreId, StoreSlot], code_threads: int = 2,
                 on_bad_shard: BadShard | None = None):
        self.pool_id = pool_id
        self.slots = slots
        self.code_limiter = trio.CapacityLimiter(code_threads)
        self.on_bad_shard = on_bad_shard or (lambda ref, i, why: None)
        self.stats = IOStats()

    # -- write ------------------------------------------------------------
    def _encode(self, data, file_id: FileId, idx: int, version: int, k: int, n: int) -> list[list]:
        if isinstance(data, list):  # the stripe's k data shards, as written
            payloads = codec.encode_pieces(data, k, n)
            length = sum(len(p) for p in data)
        else:
            payloads = codec.encode(data, k, n)
            length = len(data)
        out = []
        for i, p in enumerate(payloads):
            h = codec.make_header(pool_id=self.pool_id, file_id=file_id, stripe_index=idx, stripe_version=version,
                                  shard_index=i, k=k, n=n, stripe_length=length, payload=p)
            out.append(codec.pack(h, p))
        return out

    async def encode(self, data, *, file_id: FileId, idx: int, version: int, k: int, n: int) -> list[list]:
        """Shard files (lists of buffers) for shards 0..n-1, built in a worker
        thread. data is the stripe's bytes, or a list of its k data shards."""
        return await trio.to_thread.run_sync(self._encode, data, file_id, idx, version, k, n, limiter=self.code_limiter)

    async def put_shard(self, store_id: StoreId, name: ShardName, buffers: list) -> None:
        """Put one shard file; raises StoreError subclasses."""
        slot = self.slots.get(store_id)
        if slot is None or not slot.writable:
            raise StoreError(str(slot.path if slot else store_id), f"not writable ({slot.state if slot else 'unknown'})")
        await slot.store.put(name, buffers)

    # -- read -------------------------------------------------------------
    def _verify(self, blob: bytes, ref: StripeRef, shard: int) -> memoryview:
        header, payload = codec.parse(blob, pool_id=self.pool_id)
        if (header.file_id, header.stripe_index, header.stripe_version, header.shard_index, header.k, header.n,
                header.stripe_length) != (ref.file_id, ref.idx, ref.version, shard, ref.k, ref.n, ref.coded_length):
            raise ShardCorrupt(f"header names another shard ({header.file_id}/{header.stripe_index} "
                               f"v{header.stripe_version} #{header.shard_index})")
        return payload

    async def fetch_shard(self, ref: StripeRef, shard: int, store_id: StoreId) -> memoryview:
        """One verified payload. Raises ShardMissing, ShardCorrupt or StoreError."""
        slot = self.slots.get(store_id)
        if slot is None or not slot.readable:
            raise ShardMissing(f"store {slot.path if slot else store_id} is {slot.state if slot else 'unknown'}")
        name = ShardName(file_id=ref.file_id, stripe_index=ref.idx, version=ref.version, shard_index=shard)
        limit = codec.shard_length(ref.coded_length, ref.k) + 8192
        return await slot.store.get_checked(name, max_bytes=limit, check=lambda blob: self._verify(blob, ref, shard))

    async def fetch_shards(self, store_id: StoreId, wants: list[tuple[StripeRef, int]]) -> list:
        """Verified payloads of several shards on one store, in one worker-thread
        call: for each (stripe, shard index), in order, the payload or the
        ShoalError it met (ShardMissing, ShardCorrupt, a StoreError). Raises
        StoreError when the store is not readable or stalls."""
        slot = self.slots.get(store_id)
        if slot is None or not slot.readable:
            raise StoreUnavailable(str(slot.path if slot else store_id), f"not readable ({slot.state if slot else 'unknown'})")
        names = [ShardName(file_id=ref.file_id, stripe_index=ref.idx, version=ref.version, shard_index=i)
                 for ref, i in wants]
        limit = max(codec.shard_length(ref.coded_length, ref.k) for ref, _ in wants) + 8192
        return await slot.store.get_many_checked(
            names, max_bytes=limit, check=lambda pos, blob: self._verify(blob, wants[pos][0], wants[pos][1]))

    async def put_shards(self, store_id: StoreId, items: list[tuple[ShardName, list]]) -> list:
        """Put several shard files on one store in one worker-thread call; for
        each, in order, None or its StoreError. Raises StoreError when the
        store is not writable or stalls."""
        slot = self.slots.get(store_id)
        if slot is None or not slot.writable:
            raise StoreError(str(slot.path if slot else store_id), f"not writable ({slot.state if slot else 'unknown'})")
        return await slot.store.put_many(items)

    def _order(self, ref: StripeRef) -> list[tuple[int, StoreId]]:
        """Data shards before parity; shards believed good before doubtful ones."""
        def key(item):
            shard, sid, state = item
            return (state != "ok", shard >= ref.k, shard)
        return [(s, sid) for s, sid, st in sorted(ref.shards, key=key)
                if sid is not None and sid in self.slots and self.slots[sid].readable]

    async def read(self, ref: StripeRef) -> bytes:
        """The stripe's ref.length valid bytes, verified. Raises StripeLost."""
        order = self._order(ref)
        good: dict[int, memoryview] = {}
        failures: list[str] = []
        pos = 0

        async def one(shard: int, sid: StoreId, send: trio.MemorySendChannel) -> None:
            try:
                payload = await self.fetch_shard(ref, shard, sid)
                await send.send((shard, sid, payload, None))
            except (ShoalError, OSError) as e:
                await send.send((shard, sid, None, e))

        send, recv = trio.open_memory_channel(len(order) + 1)
        async with trio.open_nursery() as nursery:
            running = 0
            while pos < len(order) and running < ref.k:
                nursery.start_soon(one, *order[pos], send)
                pos += 1
                running += 1
            while running:
                shard, sid, payload, err = await recv.receive()
                running -= 1
                if payload is not None:
                    good[shard] = payload
                    if len(good) >= ref.k:
                        nursery.cancel_scope.cancel()
                        break
                    continue
                slot = self.slots.get(sid)
                if isinstance(err, ShardCorrupt):
                    kind = "corrupt"
                elif isinstance(err, ShardMissing) and slot is not None and slot.readable:
                    kind = "missing"
                else:
                    kind = "unreachable"  # the store, not the shard
                if kind == "corrupt":
                    self.stats.checksum_failures += 1
                else:
                    self.stats.missing_shards += 1
                failures.append(f"shard {shard}: {err}")
                self.on_bad_shard(ref, shard, kind)
                if pos < len(order):
                    nursery.start_soon(one, *order[pos], send)
                    pos += 1
                    running += 1
        if len(good) < ref.k:
            self.stats.stripes_lost += 1
            detail = "; ".join(failures[-4:]) or "no store holding its shards is readable"
            raise StripeLost(f"stripe {ref.idx} of file {ref.file_id}: {len(good)} of k={ref.k} shards readable ({detail})")
        size = codec.shard_length(ref.coded_length, ref.k)
        data_shards = -(-ref.coded_length // size)  # data shards that hold real bytes
        if any(i not in good for i in range(data_shards)):
            self.stats.degraded_reads += 1  # a decode, not a concatenation
        data = await trio.to_thread.run_sync(codec.decode, good, ref.k, ref.n, ref.coded_length, limiter=self.code_limiter)
        self.stats.bytes_read += ref.length
        if ref.length < len(data):
            data = data[:ref.length]
        return data


"""FaultyStore: a real Store with faults injected, for tests of the layers above.

It wraps a real ``gateway.store.Store`` and offers the same async methods.
A ``FaultPlan`` names, per operation, which call (1-based, or every call)
gets which action:

* ``unavailable`` / ``full``: raise StoreUnavailable / StoreFull instead of
  doing the operation.
* ``stall``: block a worker thread of the real store, under its real
  deadline and limiter, so the caller sees StoreStalled at the deadline and
  the blocked thread holds a limiter token, as a hung mount's would, until
  ``release()``. The operation itself never happens.
* ``corrupt``: do the read, then flip one byte of what it returns.
* ``crash`` (write operations): crash the store in the middle of the write,
  after the data is written and before the rename, so only the temp file
  is left. ``crash_late``: crash after the rename but before the directory
  fsync (the rename is dropped, as unsynced). ``pause``: hold the write
  before its rename until ``crash()`` or ``release()``; ``paused()`` says
  when one is held.

``crash()`` simulates losing power: every write that has not returned keeps
only its temp file (a rename already done is undone: it was not promised
durable), the real store's OS layer refuses every later call, and this
wrapper refuses every operation with StoreUnavailable until ``restart()``.
A write whose rename had replaced an older file cannot bring that file back;
shard names carry a version, so the layers above never overwrite a shard.
Deletes in flight are not undone.

Drive it from hypothesis with ``FaultPlan.from_spec(list of (op, nth, action))``
and strategies over ``OPS`` and ``ACTIONS``.
"""
from __future__ import annotations

import errno
import os
import threading
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import trio

from gateway.errors import ShoalError, StoreError, StoreFull, StoreStalled, StoreUnavailable
from gateway.store import FileOps, ShardName, Store

WRITE_OPS = ("put", "put_file", "copy_file_in")
READ_OPS = ("get", "get_prefix", "get_file")
OPS = WRITE_OPS + READ_OPS + (
    "delete", "exists", "list_shards", "list_temp", "remove_temp", "space", "probe",
    "list_files", "delete_file", "fetch_file_to", "read_label", "check_label", "write_label",
)
ACTIONS = ("unavailable", "full", "stall", "corrupt", "crash", "crash_late", "pause")
_ACTIONS_FOR = {
    "corrupt": READ_OPS,
    "crash": WRITE_OPS, "crash_late": WRITE_OPS, "pause": WRITE_OPS,
}
_STALL_CAP = 60.0  # a stalled thread gives up by itself after this, should a test forget release()


@dataclass(frozen=True)
class Fault:
    op: str
    nth: int | None  # 1-based call number; None: every call
    action: str

    def __post_init__(self) -> None:
        if self.op not in OPS:
            raise ValueError(f"unknown operation {self.op!r}; known: {', '.join(OPS)}")
        if self.action not in ACTIONS:
            raise ValueError(f"unknown action {self.action!r}; known: {', '.join(ACTIONS)}")
        if self.op not in _ACTIONS_FOR.get(self.action, OPS):
            raise ValueError(f"{self.action} applies only to {', '.join(_ACTIONS_FOR[self.action])}, not {self.op}")
        if self.nth is not None and (isinstance(self.nth, bool) or not isinstance(self.nth, int) or self.nth < 1):
            raise ValueError(f"nth must be a call number from 1, or None for every call; got {self.nth!r}")


@dataclass(frozen=True)
class FaultPlan:
    faults: tuple[Fault, ...] = ()

    @classmethod
    def from_spec(cls, spec: Iterable[tuple[str, int | None, str]]) -> FaultPlan:
        return cls(tuple(Fault(op, nth, action) for op, nth, action in spec))

    def action_for(self, op: str, call: int) -> str | None:
        """The first fault that matches this call of op, if any."""
        for f in self.faults:
            if f.op == op and (f.nth is None or f.nth == call):
                return f.action
        return None


@dataclass
class _Write:
    """One write in flight, keyed by its final path."""
    action: str | None
    renamed_from: str | None = None  # the temp path, once the rename is done
    undone: bool = False


class _CrashOps(FileOps):
    """The real store's OS layer with a power switch. Each call runs under a
    lock, so once crash() holds it no call after the crash reaches the disk."""

    def __init__(self, inner: FileOps):
        self.inner = inner
        self.lock = threading.Lock()
        self.crashed = False
        self.inflight: dict[str, _Write] = {}
        self.gate = threading.Event()  # released pauses go on
        self.paused = threading.Event()  # a write is being held

    def _dead(self) -> OSError:
        return OSError(errno.EIO, "simulated crash: the store lost power")

    def _call(self, fn: Any, *args: Any) -> Any:
        with self.lock:
            if self.crashed:
                raise self._dead()
            return fn(*args)

    def crash_now(self) -> None:
        """Power off: undo renames of writes that have not returned."""
        with self.lock:
            if self.crashed:
                return
            self.crashed = True
            for dst, w in list(self.inflight.items()):  # a snapshot: the trio thread adds and removes writes
                if w.renamed_from is not None and not w.undone:
                    os.rename(dst, w.renamed_from)  # the unsynced rename is lost
                    w.undone = True
            self.gate.set()

    def open_new(self, path: str) -> int:
        return self._call(self.inner.open_new, path)

    def writev(self, fd: int, views: Sequence[memoryview]) -> int:
        return self._call(self.inner.writev, fd, views)

    def fsync(self, fd: int) -> None:
        self._call(self.inner.fsync, fd)

    def close(self, fd: int) -> None:
        self.inner.close(fd)  # closing frees our fd and writes nothing: always allowed

    def unlink(self, path: str) -> None:
        self._call(self.inner.unlink, path)

    def mkdir(self, path: str) -> None:
        self._call(self.inner.mkdir, path)

    def rename(self, src: str, dst: str) -> None:
        w = self.inflight.get(dst)
        if w is not None and w.action == "pause":
            self.paused.set()
            self.gate.wait(_STALL_CAP)
        if w is not None and w.action == "crash":
            self.crash_now()
        with self.lock:
            if self.crashed:
                raise self._dead()
            self.inner.rename(src, dst)
            if w is not None:
                w.renamed_from = src

    def fsync_dir(self, path: str) -> None:
        late = [w for d, w in list(self.inflight.items())
                if w.action == "crash_late" and w.renamed_from is not None and os.path.dirname(d) == path]
        if late:
            self.crash_now()
        self._call(self.inner.fsync_dir, path)


class FaultyStore:
    """A real Store with a FaultPlan applied; same async interface.

    Installs a crash-aware OS layer on the wrapped store (store.fsops).
    Attributes not defined here (path, store_id, deadline, statistics, ...)
    come from the real store. Call ``release()`` when done, so stalled and
    paused threads end.
    """

    def __init__(self, store: Store, plan: FaultPlan | None = None):
        self.store = store
        self.plan = plan or FaultPlan()
        self.calls: dict[str, int] = {}
        self._ops = _CrashOps(store.fsops)
        store.fsops = self._ops
        self._stall_events: list[threading.Event] = []

    def __getattr__(self, name: str) -> Any:
        if name == "store":  # not set yet: no recursion
            raise AttributeError(name)
        return getattr(self.store, name)

    def __repr__(self) -> str:
        return f"FaultyStore({self.store!r})"

    # ---- controls

    @property
    def crashed(self) -> bool:
        return self._ops.crashed

    async def crash(self) -> None:
        """Lose power now (see the module docstring)."""
        await trio.to_thread.run_sync(self._ops.crash_now)

    def restart(self) -> None:
        """Power back on: operations work again; temp files left by the crash stay."""
        with self._ops.lock:
            self._ops.crashed = False
            self._ops.inflight.clear()
            self._ops.gate = threading.Event()
            self._ops.paused = threading.Event()

    def release(self) -> None:
        """Let stalled and paused threads end (a stalled operation never happens)."""
        for ev in self._stall_events:
            ev.set()
        self._ops.gate.set()

    async def paused(self) -> None:
        """Wait until a `pause` write is being held before its rename."""
        await trio.to_thread.run_sync(self._ops.paused.wait, _STALL_CAP)

    # ---- the fault gate

    def _action(self, op: str) -> str | None:
        if self._ops.crashed:
            raise StoreUnavailable(str(self.store.path), f"{op}: the store crashed and has not restarted")
        n = self.calls[op] = self.calls.get(op, 0) + 1
        return self.plan.action_for(op, n)

    async def _pre(self, op: str) -> str | None:
        """Apply the actions that replace the operation; return the rest."""
        action = self._action(op)
        where = str(self.store.path)
        if action == "unavailable":
            raise StoreUnavailable(where, f"{op}: injected fault (call {self.calls[op]})")
        if action == "full":
            raise StoreFull(where, f"{op}: injected fault (call {self.calls[op]}): No space left on device")
        if action == "stall":
            ev = threading.Event()
            self._stall_events.append(ev)
            await self.store.run_blocking(op, ev.wait, _STALL_CAP)
            # Released before the deadline: the operation still never happened.
            raise StoreUnavailable(where, f"{op}: injected stall released before the deadline")
        return action

    async def _write(self, op: str, final: str, call: Any) -> None:
        action = await self._pre(op)
        w = _Write(action)
        self._ops.inflight[final] = w
        try:
            await call()
        finally:
            self._ops.inflight.pop(final, None)
        if w.undone or self._ops.crashed:
            raise StoreUnavailable(str(self.store.path), f"{op}: the store crashed before the write returned")

    @staticmethod
    def _flip(data: bytes) -> bytes:
        if not data:
            return data
        b = bytearray(data)
        b[len(b) // 2] ^= 0xFF
        return bytes(b)

    # ---- the Store interface

    async def put(self, name: ShardName, buffers: Sequence[bytes | memoryview]) -> None:
        await self._write("put", os.path.join(self.store.path, name.relpath()),
                          lambda: self.store.put(name, buffers))

    async def put_file(self, name: str, buffers: Sequence[bytes | memoryview]) -> None:
        await self._write("put_file", os.path.join(self.store.path, "catalog", name),
                          lambda: self.store.put_file(name, buffers))

    async def copy_file_in(self, name: str, local_path: str | os.PathLike) -> None:
        await self._write("copy_file_in", os.path.join(self.store.path, "catalog", name),
                          lambda: self.store.copy_file_in(name, local_path))

    async def get(self, name: ShardName, *, max_bytes: int | None = None) -> bytes:
        action = await self._pre("get")
        data = await self.store.get(name, max_bytes=max_bytes)
        return self._flip(data) if action == "corrupt" else data

    async def get_checked(self, name: ShardName, *, check, max_bytes: int | None = None):
        """Through get(), so read faults apply; the check runs in a worker thread."""
        data = await self.get(name, max_bytes=max_bytes)
        return await trio.to_thread.run_sync(check, data)

    async def get_many_checked(self, names, *, check, max_bytes: int | None = None):
        """One get() per name, so read faults apply to each; errors come back in place."""
        out = []
        for pos, name in enumerate(names):
            try:
                data = await self.get(name, max_bytes=max_bytes)
                out.append(await trio.to_thread.run_sync(check, pos, data))
            except StoreStalled:
                raise
            except ShoalError as e:
                out.append(e)
        return out

    async def put_many(self, items):
        """One put() per item, so write faults apply to each; errors come back in place."""
        out = []
        for name, buffers in items:
            try:
                await self.put(name, buffers)
                out.append(None)
            except StoreStalled:
                raise
            except StoreError as e:
                out.append(e)
        return out

    async def get_prefix(self, name: ShardName, size: int) -> bytes:
        action = await self._pre("get_prefix")
        data = await self.store.get_prefix(name, size)
        return self._flip(data) if action == "corrupt" else data

    async def get_file(self, name: str) -> bytes:
        action = await self._pre("get_file")
        data = await self.store.get_file(name)
        return self._flip(data) if action == "corrupt" else data

    async def _plain(self, op: str, *args: Any, **kwargs: Any) -> Any:
        await self._pre(op)
        return await getattr(self.store, op)(*args, **kwargs)

    async def delete(self, name: ShardName) -> bool:
        return await self._plain("delete", name)

    async def exists(self, name: ShardName) -> bool:
        return await self._plain("exists", name)

    async def list_shards(self) -> list[tuple[ShardName, float]]:
        return await self._plain("list_shards")

    async def list_temp(self, older_than: float) -> list[str]:
        return await self._plain("list_temp", older_than)

    async def remove_temp(self, relname: str) -> bool:
        return await self._plain("remove_temp", relname)

    async def space(self) -> Any:
        return await self._plain("space")

    async def probe(self) -> Any:
        return await self._plain("probe")

    async def list_files(self) -> list[tuple[str, int, float]]:
        return await self._plain("list_files")

    async def delete_file(self, name: str) -> bool:
        return await self._plain("delete_file", name)

    async def fetch_file_to(self, name: str, local_path: str | os.PathLike) -> int:
        return await self._plain("fetch_file_to", name, local_path)

    async def read_label(self) -> Any:
        return await self._plain("read_label")

    async def check_label(self) -> Any:
        return await self._plain("check_label")

    async def write_label(self, label: Any) -> None:
        await self._plain("write_label", label)

"""What recover, export and check share: their errors, the pool lock (no
daemon may serve the pool meanwhile), the survey of the configured stores,
a runner of catalog calls one at a time, and small file helpers."""
from __future__ import annotations

import os
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import trio

from ..catalog import Catalog
from ..config import PoolConfig
from ..errors import ShoalError, StoreError
from ..ids import StoreId
from ..store import Label, Store
from ..stripeio import StoreSlot

Progress = Callable[[str, int, "int | None"], None]  # (phase, done, total or None)
LOST_AND_FOUND = b"lost+found"


class RecoveryRefused(ShoalError):
    """The tool will not run as asked (an existing catalog or destination); nothing was changed."""


class ExportFailed(ShoalError):
    """Writing the destination failed (the OSError is the cause); files already
    exported stay, the one being written is removed."""


def _noop(phase: str, done: int, total: int | None) -> None:
    pass


LOCK_NAME = "daemon.lock"  # the daemon holds an exclusive flock on state_dir/daemon.lock while it serves


def _lock(state_dir: Path, what: str) -> int:
    import fcntl

    state_dir.mkdir(parents=True, exist_ok=True)
    fd = os.open(state_dir / LOCK_NAME, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o600)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        holder = os.pread(fd, 200, 0).decode(errors="replace").strip()
        os.close(fd)
        raise RecoveryRefused(f"the pool is in use ({holder or 'by another process'}): unmount it before {what}") from None
    os.ftruncate(fd, 0)
    os.pwrite(fd, f"pid {os.getpid()} ({what})\n".encode(), 0)
    return fd


class _Exclusive:
    """Hold the pool's lock, so that no daemon serves it meanwhile (and refuse if one does)."""

    def __init__(self, cfg: PoolConfig, what: str):
        self.cfg, self.what, self.fd = cfg, what, -1

    async def __aenter__(self):
        self.fd = await trio.to_thread.run_sync(_lock, self.cfg.state_dir, self.what)
        return self

    async def __aexit__(self, *exc):
        await trio.to_thread.run_sync(os.close, self.fd)


# ---------------------------------------------------------------- stores

@dataclass(eq=False, kw_only=True)
class StoreView:
    path: str
    domain: str
    label: Label | None = None
    store: Store | None = None  # set when the store belongs to the pool and answers
    problem: str | None = None

    @property
    def store_id(self) -> StoreId | None:
        return StoreId(self.label.store_id) if self.label else None


async def survey_stores(cfg: PoolConfig, pool_id: str | None = None) -> tuple[str | None, list[StoreView], list[str]]:
    """Read the label of every configured store. Returns (pool id, views,
    warnings). Without pool_id, the pool is the one most labels name."""
    views = [StoreView(path=str(sc.path), domain=sc.domain) for sc in cfg.stores]
    warnings: list[str] = []

    async def one(v: StoreView) -> None:
        probe = Store(path=Path(v.path), pool_id=pool_id or "", deadline=cfg.store_io.deadline, concurrency=1)
        try:
            v.label = await probe.read_label()
            if v.label is None:
                v.problem = "has no Shoal label (a disk that is not mounted?)"
        except StoreError as e:
            v.problem = e.problem

    async with trio.open_nursery() as nursery:
        for v in views:
            nursery.start_soon(one, v)
    if pool_id is None:
        votes = Counter(v.label.pool_id for v in views if v.label)
        named = {v.label.pool_id for v in views if v.label and v.label.pool_name == cfg.name}
        if votes:
            pool_id = max(votes, key=lambda p: (votes[p], p in named, p))
    for v in views:
        if v.label is None:
            if v.problem:
                warnings.append(f"store {v.path} is not usable: {v.problem}")
            continue
        if v.label.pool_id != pool_id:
            v.problem = f"labelled for another pool, {v.label.pool_name!r} ({v.label.pool_id})"
            warnings.append(f"store {v.path} is ignored: {v.problem}")
            continue
        v.store = Store(path=Path(v.path), pool_id=pool_id, store_id=v.label.store_id,
                        deadline=cfg.store_io.deadline, concurrency=cfg.store_io.concurrency)
    return pool_id, views, warnings


def _slots(views: list[StoreView]) -> dict[StoreId, StoreSlot]:
    """Read-only slots for StripeIO: no probe (a probe writes), the label was read."""
    return {v.store_id: StoreSlot(store=v.store, store_id=v.store_id, path=v.path, domain=v.domain, state="online",
                                  reason="label matches") for v in views if v.store is not None}


class _Serial:
    """Run calls on one Catalog in worker threads, one at a time."""

    def __init__(self, catalog: Catalog):
        self.catalog = catalog
        self._limiter = trio.CapacityLimiter(1)

    async def __call__(self, fn: Callable, *args):
        return await trio.to_thread.run_sync(lambda: fn(*args), limiter=self._limiter)


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _unlink_quietly(path: Path) -> None:
    try:
        os.unlink(path)
    except FileNotFoundError:
        pass

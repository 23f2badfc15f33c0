"""Store health: a state machine per store, and the monitor that drives it.

States (the glossary): online, offline, stalled, full, foreign, retiring,
failed. Three groups matter:

* serving: online, full, retiring. The store is read; only online (with
  admin 'active') is written, so placement uses only online stores.
* out: offline, stalled, foreign. Nothing is read from or written to it.
* failed: declared by the administrator; absorbing (a failed store is
  replaced, not revived).

Events come from probes (``probe_ok``, ``space_low``, ``probe_failed``,
``label_missing``, ``probe_stalled``, ``label_foreign``) and from the
administrator (``admin_retire``, ``admin_fail``).

``TABLE[state][event]`` is ``(target, gated)``. Two targets are symbolic:
``up`` is where a healthy store serves (online, or retiring for a store
whose admin is retiring or retired) and ``low`` is where a healthy store
short of space serves (full, or retiring likewise). A gated entry is the
hysteresis: it fires only on the ``need``-th good probe in a row (``need``
is ``[store_io] good_probes_to_return``), and until then the store stays
where it is and the streak grows. Every entry that is not gated resets the
streak. So a store goes out at once on a bad probe and comes back only
after ``need`` good ones: one good probe between failures never puts a
flapping disk back into placement.

``transition`` is pure and is the only place these rules live; the monitor
(``HealthMonitor``) probes, turns the outcome into an event, applies the
result to the pool's StoreSlot at once and logs every change with its
reason. It also records in the catalog when a store went away
(``away_since``), which repair uses for its grace period.
"""
from __future__ import annotations

import collections
import logging
import time
from dataclasses import dataclass

import trio

from .config import PoolConfig
from .errors import StoreError, StoreForeign, StoreFull, StoreStalled, StoreUnlabelled
from .ids import StoreId
from .stripeio import READABLE, STATES, StoreSlot

log = logging.getLogger(__name__)

EVENTS = ("probe_ok", "space_low", "probe_failed", "label_missing", "probe_stalled", "label_foreign",
          "admin_retire", "admin_fail")
GOOD_EVENTS = frozenset({"probe_ok", "space_low"})
OUT = frozenset({"offline", "stalled", "foreign"})

# A store is short of space below both of these (the same rule as the pool's first probe).
LOW_SPACE_BYTES = 64 << 20
LOW_SPACE_RATIO = 0.01

_BAD = {"probe_failed": ("offline", False), "label_missing": ("offline", False),
        "probe_stalled": ("stalled", False), "label_foreign": ("foreign", False),
        "admin_fail": ("failed", False)}
_OUT_ROW = {"probe_ok": ("up", True), "space_low": ("low", True), **_BAD,
            "admin_retire": ("same", False)}  # stays out; comes back as retiring

TABLE: dict[str, dict[str, tuple[str, bool]]] = {
    "online": {"probe_ok": ("up", False), "space_low": ("low", False), **_BAD, "admin_retire": ("retiring", False)},
    "full": {"probe_ok": ("up", True), "space_low": ("low", False), **_BAD, "admin_retire": ("retiring", False)},
    "retiring": {"probe_ok": ("up", False), "space_low": ("low", False), **_BAD, "admin_retire": ("retiring", False)},
    "offline": dict(_OUT_ROW),
    "stalled": dict(_OUT_ROW),
    "foreign": dict(_OUT_ROW),
    "failed": {e: ("failed", False) for e in EVENTS},
}


def _resolve(target: str, state: str, admin: str) -> str:
    winding_down = admin in ("retiring", "retired")
    if target == "up":
        return "retiring" if winding_down else "online"
    if target == "low":
        return "retiring" if winding_down else "full"
    if target == "same":
        return state
    return target


def transition(state: str, event: str, streak: int, *, need: int = 3, admin: str = "active") -> tuple[str, int]:
    """The next (state, streak) of a store in `state` after `event`.

    `streak` is the run of good probes counted towards a gated entry so
    far; `need` is how many a gated entry takes; `admin` is the catalog's
    admin field (active, retiring, retired, failed), which decides what
    ``up`` and ``low`` mean. Raises ValueError for an unknown state or
    event, or need < 1.
    """
    if need < 1:
        raise ValueError(f"need is {need}; at least one good probe is needed to return")
    try:
        target, gated = TABLE[state][event]
    except KeyError:
        raise ValueError(f"no transition for state {state!r} and event {event!r}") from None
    if admin == "failed" and state != "failed":
        return "failed", 0  # the admin's word wins over any probe
    new = _resolve(target, state, admin)
    if gated:
        streak += 1
        if streak < need:
            return state, streak
    return new, 0


# ---------------------------------------------------------------- probing

@dataclass(frozen=True, kw_only=True)
class Change:
    """One state change of one store, as logged."""
    time: float
    store_id: StoreId
    path: str
    old: str
    new: str
    event: str
    reason: str


async def probe_event(slot: StoreSlot, deadline: float) -> tuple[str, str]:
    """Probe one store under `deadline` seconds; returns (event, reason) and
    refreshes the slot's space figures on success. Never raises StoreError."""
    with trio.move_on_after(deadline):
        try:
            res = await slot.store.probe()
        except StoreForeign as e:
            return "label_foreign", str(e)
        except StoreUnlabelled as e:
            return "label_missing", str(e)
        except StoreStalled as e:
            return "probe_stalled", str(e)
        except StoreFull as e:
            return "space_low", str(e)
        except StoreError as e:
            return "probe_failed", str(e)
        slot.free_bytes, slot.total_bytes = res.space.free_bytes, res.space.total_bytes
        free, total = res.space.free_bytes, res.space.total_bytes
        if free < LOW_SPACE_BYTES and free < total * LOW_SPACE_RATIO:
            return "space_low", f"{free} of {total} bytes free"
        return "probe_ok", f"probe passed in {res.latency * 1000:.1f} ms"
    return "probe_stalled", f"probe did not finish within the {deadline:g}s probe deadline (a hung mount?)"


def set_state(slot: StoreSlot, new: str, reason: str, event: str) -> Change | None:
    """Put a slot into state `new` now, logging the change; None if unchanged."""
    old = slot.state
    slot.reason = reason
    if new == old:
        return None
    slot.state, slot.state_since = new, time.time()
    back = new in READABLE and old not in READABLE
    log.log(logging.INFO if back or new == "retiring" else logging.WARNING,
            "store %s: %s -> %s (%s: %s)", slot.path, old, new, event, reason)
    return Change(time=slot.state_since, store_id=slot.store_id, path=slot.path, old=old, new=new,
                  event=event, reason=reason)


def apply_admin(slot: StoreSlot, event: str, reason: str) -> Change | None:
    """Apply an admin event (admin_retire, admin_fail) to a slot whose
    ``admin`` field the caller has already set."""
    new, _ = transition(slot.state, event, 0, admin=slot.admin)
    return set_state(slot, new, reason, event)


async def note_presence(pool) -> None:
    """Bring the catalog's away_since in line with the stores' states: set it
    (to when the store's state changed) for a store that is out and has none,
    clear it for a store that serves. A store in the catalog that the config
    does not list counts as away."""
    records = await pool.db(pool.catalog.stores)
    for rec in records:
        slot = pool.slots.get(rec.store_id)
        if rec.admin == "retired":
            continue
        here = slot is not None and slot.readable
        if not here and rec.away_since is None:
            since = slot.state_since if slot is not None else time.time()
            await pool.db(pool.catalog.update_store, rec.store_id, away_since=since)
        elif here and rec.away_since is not None:
            await pool.db(pool.catalog.update_store, rec.store_id, away_since=None)


class HealthMonitor:
    """Probes every store of a pool on its own schedule and drives its state.

    Each store has its own probing task, so a store whose probe hangs (up to
    ``probe_deadline``) never delays the others. A change applies to the
    StoreSlot at once, so placement and reads follow it on their next use.
    """

    def __init__(self, pool, cfg: PoolConfig | None = None):
        self.pool = pool
        cfg = cfg or pool.cfg
        self.interval = cfg.store_io.probe_interval
        self.deadline = cfg.store_io.probe_deadline
        self.need = max(1, cfg.store_io.good_probes_to_return)
        self._streak: dict[StoreId, tuple[str, int]] = {}  # the state the streak was counted in, and the streak
        self._watching: set[StoreId] = set()
        self.probes: collections.Counter[StoreId] = collections.Counter()
        self.changes: collections.deque[Change] = collections.deque(maxlen=256)
        self.change_count = 0
        self.running = False

    async def run(self) -> None:
        """Probe until cancelled. New stores (``shoal store add``) are picked
        up within one interval; a store gone from pool.slots stops being probed."""
        self.running = True
        try:
            await note_presence(self.pool)
            async with trio.open_nursery() as nursery:
                while True:
                    for sid, slot in list(self.pool.slots.items()):
                        if sid not in self._watching:
                            self._watching.add(sid)
                            nursery.start_soon(self._watch, sid, slot)
                    await trio.sleep(self.interval)
        finally:
            self.running = False

    async def _watch(self, sid: StoreId, slot: StoreSlot) -> None:
        try:
            while self.pool.slots.get(sid) is slot:
                await self.probe_once(slot)
                await trio.sleep(self.interval)
        finally:
            self._watching.discard(sid)

    async def probe_once(self, slot: StoreSlot) -> Change | None:
        """Probe one store and apply the outcome; returns the change, if any."""
        event, reason = await probe_event(slot, self.deadline)
        self.probes[slot.store_id] += 1
        return await self.apply(slot, event, reason)

    async def apply(self, slot: StoreSlot, event: str, reason: str) -> Change | None:
        counted_in, streak = self._streak.get(slot.store_id, (slot.state, 0))
        if counted_in != slot.state:
            streak = 0  # someone else moved the store (an admin command): start afresh
        old = slot.state
        new, streak = transition(old, event, streak, need=self.need, admin=slot.admin)
        self._streak[slot.store_id] = (new, streak)
        if new == old and streak:
            reason = f"{reason}; {streak} of {self.need} good probes to return"
        change = set_state(slot, new, reason, event)
        if change is None:
            return None
        self.changes.append(change)
        self.change_count += 1
        if (new in READABLE) != (old in READABLE):
            try:
                await self.pool.db(self.pool.catalog.update_store, slot.store_id,
                                   away_since=None if new in READABLE else change.time)
            except Exception:  # the state change stands; the next change records it
                log.exception("store %s: could not record its %s in the catalog", slot.path,
                              "return" if new in READABLE else "departure")
        return change

    def register_control(self, control) -> None:
        """Control-socket op for the daemon: health -> statistics()."""
        async def health(args: dict):
            return self.statistics()

        control.register("health", health)

    def statistics(self) -> dict:
        return {
            "running": self.running,
            "changes": self.change_count,
            "stores": {sid: {"path": s.path, "state": s.state, "reason": s.reason, "since": s.state_since,
                             "probes": self.probes.get(sid, 0),
                             "good_probes": self._streak.get(sid, (s.state, 0))[1]}
                       for sid, s in self.pool.slots.items()},
            "recent": [{"time": c.time, "path": c.path, "old": c.old, "new": c.new, "event": c.event,
                        "reason": c.reason} for c in list(self.changes)[-20:]],
        }


__all__ = ["EVENTS", "GOOD_EVENTS", "OUT", "STATES", "TABLE", "Change", "HealthMonitor", "apply_admin",
           "note_presence", "probe_event", "set_state", "transition"]

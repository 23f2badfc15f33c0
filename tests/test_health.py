"""Store health: the transition table (pure, property tests) and the monitor
against real stores on tmpfs: pulled, foreign, stalled, flapping."""
from __future__ import annotations

import stat

import pytest
import trio
from hypothesis import given, settings
from hypothesis import strategies as st

from faults import FaultPlan, FaultyStore
from gateway import admin, config
from gateway.catalog import ROOT
from gateway.health import EVENTS, GOOD_EVENTS, OUT, STATES, TABLE, HealthMonitor, transition
from gateway.pool import open_pool
from gateway.store import Label, read_label, write_label
from gateway.stripeio import READABLE
from mounting import requires_root

BAD = {"probe_failed": "offline", "label_missing": "offline", "probe_stalled": "stalled", "label_foreign": "foreign"}
ADMINS = ("active", "retiring", "retired", "failed")
PROBE_EVENTS = tuple(e for e in EVENTS if not e.startswith("admin_"))

states = st.sampled_from(STATES)
events = st.sampled_from(EVENTS)
probe_events = st.sampled_from(PROBE_EVENTS)
needs = st.integers(min_value=1, max_value=6)


def run(seq, need, *, state="online", admin="active"):
    """States after each event of seq, starting from state."""
    streak, out = 0, []
    for e in seq:
        state, streak = transition(state, e, streak, need=need, admin=admin)
        out.append(state)
    return out


# ---------------------------------------------------------------- the table

def test_table_is_total():
    assert set(TABLE) == set(STATES)
    for s in STATES:
        assert set(TABLE[s]) == set(EVENTS), s


def test_rejects_unknown_names():
    with pytest.raises(ValueError):
        transition("online", "probe_maybe", 0)
    with pytest.raises(ValueError):
        transition("sleepy", "probe_ok", 0)
    with pytest.raises(ValueError):
        transition("online", "probe_ok", 0, need=0)


@given(states, events, st.integers(0, 20), needs, st.sampled_from(ADMINS))
def test_result_is_a_state_and_streak_is_bounded(state, event, streak, need, adm):
    new, s = transition(state, event, min(streak, need - 1), need=need, admin=adm)
    assert new in STATES
    assert 0 <= s < need
    if s:  # a streak only grows while the store waits where it is
        assert new == state


@given(states, st.sampled_from(sorted(BAD)), st.integers(0, 5), needs)
def test_bad_probe_takes_a_store_out_at_once(state, event, streak, need):
    new, s = transition(state, event, min(streak, need - 1), need=need)
    assert (new, s) == (("failed", 0) if state == "failed" else (BAD[event], 0))


@given(st.lists(events, max_size=30), needs, st.sampled_from(ADMINS))
def test_failed_is_absorbing(seq, need, adm):
    assert set(run(seq, need, state="failed", admin=adm)) <= {"failed"}


@given(states, needs)
def test_admin_fail_always_fails(state, need):
    assert transition(state, "admin_fail", 0, need=need)[0] == "failed"


@given(st.sampled_from(sorted(OUT)), needs, st.sampled_from(sorted(GOOD_EVENTS)))
def test_exactly_need_good_probes_bring_a_store_back(start, need, good):
    seq = [good] * need
    states_ = run(seq, need, state=start)
    assert all(s == start for s in states_[:-1])
    assert states_[-1] == ("online" if good == "probe_ok" else "full")


@given(st.lists(probe_events, max_size=60), needs)
def test_never_serves_before_need_good_probes_in_a_row(seq, need):
    state, streak, run_len = "offline", 0, 0
    for e in seq:
        prev = state
        state, streak = transition(state, e, streak, need=need)
        run_len = run_len + 1 if e in GOOD_EVENTS else 0
        if prev in OUT and state in READABLE:
            assert run_len >= need, (seq, need)


@given(st.lists(probe_events, max_size=60), needs)
def test_no_flapping(seq, need):
    """Returns to service are at most the runs of >= need good probes."""
    states_ = run(seq, need)
    prev = ["online"] + states_[:-1]
    returns = sum(1 for a, b in zip(prev, states_) if a in OUT and b in READABLE)
    runs, cur = 0, 0
    for e in seq + ["probe_failed"]:
        if e in GOOD_EVENTS:
            cur += 1
        else:
            runs += cur >= need
            cur = 0
    assert returns <= runs


@given(st.lists(probe_events, max_size=40), needs, st.sampled_from(("retiring", "retired")))
def test_a_retiring_store_never_becomes_writable(seq, need, adm):
    assert not {"online", "full"} & set(run(seq, need, state="retiring", admin=adm))


@given(st.lists(probe_events, max_size=40), needs)
def test_an_active_store_never_turns_retiring_by_itself(seq, need):
    assert "retiring" not in run(seq, need)


@settings(max_examples=50)
@given(st.lists(probe_events, max_size=30), needs)
def test_retire_while_out_comes_back_retiring(seq, need):
    states_ = run(["probe_failed", "admin_retire", *seq, *["probe_ok"] * need], need, admin="retiring")
    assert states_[-1] == "retiring"


def test_full_needs_good_probes_to_return_to_online():
    assert run(["space_low", "probe_ok", "probe_ok", "space_low", "probe_ok", "probe_ok", "probe_ok"], 3) == \
        ["full", "full", "full", "full", "full", "full", "online"]


# ---------------------------------------------------------------- the monitor, real stores

FAST = {"store_io": {"probe_interval": 0.05, "probe_deadline": 0.5, "deadline": 2, "good_probes_to_return": 3}}


async def until(cond, timeout: float = 20.0, step: float = 0.02) -> None:
    with trio.fail_after(timeout):
        while not cond():
            await trio.sleep(step)


async def write_file(pool, name: bytes, data: bytes) -> int:
    node = await pool.create(ROOT, name, mode=stat.S_IFREG | 0o644, uid=0, gid=0)
    fh = await pool.open(node.ino, write=True)
    await pool.write(fh, 0, data)
    await pool.flush(fh)
    await pool.release(fh)
    return node.ino


def changes_of(mon: HealthMonitor, sid) -> list[tuple[str, str]]:
    return [(c.old, c.new) for c in mon.changes if c.store_id == sid]


@requires_root
async def test_pulled_store_goes_offline_and_returns_once(bound_stores, pool_config):
    stores = bound_stores(6)
    cfg = config.load(pool_config(4, 6, stores=[s.path for s in stores], stripe_size="64KiB", extra=FAST))
    await trio.to_thread.run_sync(admin.init_pool, cfg)
    async with open_pool(cfg) as pool, trio.open_nursery() as nursery:
        mon = HealthMonitor(pool, cfg)
        nursery.start_soon(mon.run)
        slot = next(s for s in pool.slots.values() if s.path == str(stores[2].path))
        await until(lambda: mon.probes[slot.store_id] >= 2)
        assert slot.state == "online"

        stores[2].pull()
        await until(lambda: slot.state == "offline")
        assert "label" in slot.reason
        rec = next(r for r in await pool.db(pool.catalog.stores) if r.store_id == slot.store_id)
        assert rec.away_since is not None
        assert slot.store_id not in pool.placement("0" * 32, 0)
        ino = await write_file(pool, b"while-away", bytes(200_000))
        recs = await pool.db(pool.catalog.stripes, ino)
        assert all(s.store_id != slot.store_id for r in recs.values() for s in r.shards)

        stores[2].put_back()
        await until(lambda: slot.state == "online")
        nursery.cancel_scope.cancel()
    assert changes_of(mon, slot.store_id) == [("online", "offline"), ("offline", "online")]
    async with open_pool(cfg) as pool:
        rec = next(r for r in await pool.db(pool.catalog.stores) if r.store_id == slot.store_id)
        assert rec.away_since is None


@requires_root
async def test_flapping_store_stays_out_until_it_is_steady(store_dirs, pool_config):
    cfg = config.load(pool_config(2, 3, stripe_size="64KiB", extra=FAST))
    await trio.to_thread.run_sync(admin.init_pool, cfg)
    async with open_pool(cfg) as pool, trio.open_nursery() as nursery:
        slot = next(iter(pool.slots.values()))
        # Calls 1, 3, 5, ... 19 fail, the others pass: never three good probes in a row until call 20.
        faulty = FaultyStore(slot.store, FaultPlan.from_spec([("probe", i, "unavailable") for i in range(1, 20, 2)]))
        slot.store = faulty
        mon = HealthMonitor(pool, cfg)
        nursery.start_soon(mon.run)
        await until(lambda: faulty.calls.get("probe", 0) >= 19)
        assert slot.state == "offline"
        assert changes_of(mon, slot.store_id) == [("online", "offline")]
        await until(lambda: slot.state == "online")
        assert faulty.calls["probe"] >= 22  # calls 20, 21, 22 were the three good ones
        nursery.cancel_scope.cancel()
    assert changes_of(mon, slot.store_id) == [("online", "offline"), ("offline", "online")]


@requires_root
async def test_foreign_label_is_noticed_and_never_written(store_dirs, pool_config):
    cfg = config.load(pool_config(2, 3, stripe_size="64KiB", extra=FAST))
    await trio.to_thread.run_sync(admin.init_pool, cfg)
    async with open_pool(cfg) as pool, trio.open_nursery() as nursery:
        mon = HealthMonitor(pool, cfg)
        nursery.start_soon(mon.run)
        slot = next(iter(pool.slots.values()))
        ours = read_label(slot.path)
        other = Label.new(pool_id="f" * 32, pool_name="elsewhere")
        write_label(slot.path, other)
        await until(lambda: slot.state == "foreign")
        assert not slot.writable and not slot.readable
        write_label(slot.path, ours)
        await until(lambda: slot.state == "online")
        nursery.cancel_scope.cancel()
    assert changes_of(mon, slot.store_id) == [("online", "foreign"), ("foreign", "online")]


@requires_root
async def test_stalled_store_does_not_delay_the_others(store_dirs, pool_config):
    cfg = config.load(pool_config(2, 3, stripe_size="64KiB", extra=FAST))
    await trio.to_thread.run_sync(admin.init_pool, cfg)
    async with open_pool(cfg) as pool, trio.open_nursery() as nursery:
        slot, *others = list(pool.slots.values())
        faulty = FaultyStore(slot.store, FaultPlan.from_spec([("probe", None, "stall")]))
        slot.store = faulty
        try:
            mon = HealthMonitor(pool, cfg)
            nursery.start_soon(mon.run)
            await until(lambda: slot.state == "stalled")
            assert slot.store_id not in pool.placement("0" * 32, 0)
            # While one store hangs, the others are probed again and again.
            base = {o.store_id: mon.probes[o.store_id] for o in others}
            stalled_before = mon.probes[slot.store_id]
            await until(lambda: mon.probes[slot.store_id] >= stalled_before + 2)
            assert all(mon.probes[o.store_id] >= base[o.store_id] + 4 for o in others)
            assert all(o.state == "online" for o in others)
            faulty.plan = FaultPlan()
        finally:
            faulty.release()
        await until(lambda: slot.state == "online")
        nursery.cancel_scope.cancel()
    assert changes_of(mon, slot.store_id) == [("online", "stalled"), ("stalled", "online")]

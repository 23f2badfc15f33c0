"""Tests for gateway.placement: weighted rendezvous placement and domain survival.

Outside references used here:
- Rendezvous (highest random weight) hashing: Thaler and Ravishankar, "Using
  name-based mappings to increase hit rates", IEEE/ACM ToN 1998 (from
  memory): removing a node moves only the keys that mapped to it.
- Weighted scores -w / ln(u): the chance of ranking first is proportional
  to the weight (a property of exponential races; common practice for
  weighted rendezvous hashing).
- Three domains of three stores at k=5, n=9 surviving any one domain but
  not two: common practice for spreading a 5+4 code over three sites.
"""
from __future__ import annotations

import collections
import itertools
import math
import random

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from gateway.config import spread_cap
from gateway.placement import (
    MAX_LOSS_SETS,
    Candidate,
    DomainLoss,
    domain_survival,
    place,
    rank,
    stripe_key,
)

FAST = settings(max_examples=40, deadline=None)


def _sid(i: int) -> str:
    return f"{i:032x}"


def _fid(i: int) -> str:
    return f"{i * 7919 + 1:032x}"


def _stores(layout: dict[str, int], weight: float = 1000.0) -> list[Candidate]:
    out, i = [], 0
    for domain, count in layout.items():
        for _ in range(count):
            out.append(Candidate(_sid(i), domain, weight))
            i += 1
    return out


def _keys(count: int) -> list[bytes]:
    return [stripe_key(_fid(f), s) for f in range(count // 10 + 1) for s in range(10)][:count]


# ---------------------------------------------------------------- stripe_key

def test_stripe_key_is_distinct_and_fixed_size():
    keys = {stripe_key(_fid(f), s) for f in range(50) for s in range(50)}
    assert len(keys) == 2500
    assert {len(k) for k in keys} == {24}
    assert stripe_key("00" * 16, 1) == bytes(16) + b"\x00" * 7 + b"\x01"


@pytest.mark.parametrize(("file_id", "index"), [("xyz", 0), ("0" * 31, 0), ("0" * 32, -1), ("0" * 32, 2**64), (5, 0)])
def test_stripe_key_rejects_bad_input(file_id, index):
    with pytest.raises(ValueError):
        stripe_key(file_id, index)


# ---------------------------------------------------------------- place

def test_deterministic_whatever_the_candidate_order():
    stores = _stores({"a": 3, "b": 3, "c": 3})
    rng = random.Random(7)
    for key in _keys(200):
        first = place(key, stores, 6, 2)
        shuffled = stores[:]
        rng.shuffle(shuffled)
        assert place(key, shuffled, 6, 2) == first
        assert place(key, tuple(stores), 6, 2) == first


def test_distinct_and_under_the_cap():
    stores = _stores({"a": 3, "b": 3, "c": 3})
    domain_of = {c.store_id: c.domain for c in stores}
    for key in _keys(300):
        chosen = place(key, stores, 9, 3)
        assert len(chosen) == 9 == len(set(chosen))
        counts = collections.Counter(domain_of[s] for s in chosen)
        assert max(counts.values()) <= 3


def test_keys_spread_over_all_stores():
    stores = _stores({f"d{i}": 1 for i in range(8)})
    used = collections.Counter(s for key in _keys(800) for s in place(key, stores, 3, 1))
    assert set(used) == {c.store_id for c in stores}
    # Equal weights: each store takes about 3/8 of 800 stripes (300); loose bound.
    assert all(200 < count < 400 for count in used.values())


def test_weight_three_is_chosen_about_three_times_as_often():
    stores = [Candidate(_sid(i), f"d{i}", 1.0) for i in range(9)] + [Candidate(_sid(9), "d9", 3.0)]
    keys = _keys(20000)
    first = collections.Counter(place(key, stores, 1, 1)[0] for key in keys)
    heavy = first[_sid(9)] / len(keys)
    light = sum(first[_sid(i)] for i in range(9)) / 9 / len(keys)
    # Expected shares 3/12 and 1/12 (first pick is proportional to weight).
    assert 0.22 < heavy < 0.28
    assert 2.5 < heavy / light < 3.5
    # And among three picks the heavy store is still clearly favoured.
    three = collections.Counter(s for key in keys[:5000] for s in place(key, stores, 3, 1))
    assert three[_sid(9)] > 1.8 * max(three[_sid(i)] for i in range(9))


def test_removing_a_store_moves_only_its_stripes():
    stores = _stores({"a": 4, "b": 4, "c": 4})
    gone = stores[5].store_id
    rest = [c for c in stores if c.store_id != gone]
    moved = 0
    keys = _keys(2000)
    for key in keys:
        before = place(key, stores, 6, 2)
        after = place(key, rest, 6, 2)
        if gone not in before:
            assert after == before  # the rendezvous property
        else:
            moved += 1
            # The other chosen stores stay; exactly one newcomer takes over.
            assert set(before) - {gone} <= set(after)
            assert len(set(after) - set(before)) == 1
    # About 6/12 of the stripes used the removed store; loose bound.
    assert 0.35 * len(keys) < moved < 0.65 * len(keys)


def test_adding_a_store_moves_only_stripes_it_joins():
    stores = _stores({"a": 3, "b": 3, "c": 3})
    new = Candidate(_sid(99), "b", 1000.0)
    for key in _keys(1000):
        before = place(key, stores, 6, 2)
        after = place(key, stores + [new], 6, 2)
        if new.store_id not in after:
            assert after == before


def test_fewer_than_n_when_the_domains_cannot_hold_n():
    stores = _stores({"a": 1, "b": 1, "c": 3})
    for key in _keys(50):
        chosen = place(key, stores, 6, 2)
        # a and b hold one each, c holds its cap of 2.
        assert len(chosen) == 4


def test_weights_of_zero_or_less_are_excluded():
    stores = _stores({"a": 2, "b": 2})
    stores[1] = Candidate(stores[1].store_id, "a", 0)
    stores[2] = Candidate(stores[2].store_id, "b", -5.0)
    stores.append(Candidate(_sid(50), "c", float("nan")))
    for key in _keys(50):
        assert sorted(place(key, stores, 4, 4)) == sorted([stores[0].store_id, stores[3].store_id])
    assert place(b"k", [], 3, 1) == []


def test_duplicate_store_ids_are_refused():
    with pytest.raises(ValueError, match="twice"):
        place(b"key", [Candidate(_sid(1), "a", 1), Candidate(_sid(1), "b", 2)], 2, 1)


@pytest.mark.parametrize(("n", "cap"), [(0, 1), (3, 0)])
def test_bad_n_or_cap(n, cap):
    with pytest.raises(ValueError):
        place(b"key", _stores({"a": 3}), n, cap)


def test_rank_is_the_order_place_follows():
    stores = _stores({f"d{i}": 1 for i in range(6)})
    for key in _keys(50):
        assert place(key, stores, 4, 1) == [c.store_id for c in rank(key, stores)[:4]]


layouts = st.dictionaries(st.sampled_from("abcdefgh"), st.integers(1, 5), min_size=1, max_size=8)


@FAST
@given(layout=layouts, k=st.integers(1, 12), extra=st.integers(0, 6), seed=st.integers(0, 2**32))
def test_place_properties(layout, k, extra, seed):
    # For any layout and (k, n): distinct stores, the cap holds, and exactly
    # as many as the domains can take under the cap (the greedy pass never
    # skips a store whose domain has room).
    n = k + extra
    rng = random.Random(seed)
    stores = [Candidate(c.store_id, c.domain, rng.uniform(1, 1e12)) for c in _stores(layout)]
    cap = spread_cap(n, len(layout))
    domain_of = {c.store_id: c.domain for c in stores}
    for s in range(5):
        chosen = place(stripe_key(_fid(seed % 1000), s), stores, n, cap)
        assert len(chosen) == len(set(chosen)) == min(n, sum(min(cap, size) for size in layout.values()))
        assert max(collections.Counter(domain_of[x] for x in chosen).values()) <= cap


# ---------------------------------------------------------------- domain_survival

def test_three_domains_of_three_at_5_of_9():
    result = domain_survival(5, 9, 6, {"site-a": 3, "site-b": 3, "site-c": 3})
    singles = [r for r in result if len(r.lost) == 1]
    pairs = [r for r in result if len(r.lost) == 2]
    assert len(singles) == 3 and len(pairs) == 3 and len(result) == 6
    assert all(r.worst_shards_lost == 3 and r.reads_ok and r.writes_ok for r in singles)
    assert all(r.worst_shards_lost == 6 and not r.reads_ok and not r.writes_ok for r in pairs)
    assert singles[0] == DomainLoss(lost=("site-a",), worst_shards_lost=3, reads_ok=True, writes_ok=True)
    # The worst case is what placement really does here: three shards per domain.
    stores = _stores({"site-a": 3, "site-b": 3, "site-c": 3})
    domain_of = {c.store_id: c.domain for c in stores}
    for key in _keys(100):
        counts = collections.Counter(domain_of[s] for s in place(key, stores, 9, spread_cap(9, 3)))
        assert counts == {"site-a": 3, "site-b": 3, "site-c": 3}


def test_reads_survive_but_writes_do_not():
    # 4+2 over three domains of two: losing one domain costs 2 shards
    # (readable) and leaves room for 4 < w = 5 (writes stop).
    result = domain_survival(4, 6, 5, {"a": 2, "b": 2, "c": 2})
    assert all(r.reads_ok and not r.writes_ok for r in result if len(r.lost) == 1)


def test_small_domains_hold_fewer_shards():
    # n=6 over four domains: cap 2, but domain "x" has one store, so losing it costs one shard.
    result = {r.lost: r for r in domain_survival(4, 6, 6, {"x": 1, "y": 2, "z": 2, "u": 2})}
    assert result[("x",)].worst_shards_lost == 1
    assert result[("y",)].worst_shards_lost == 2 and result[("y",)].reads_ok
    assert result[("x", "y")].worst_shards_lost == 3 and not result[("x", "y")].reads_ok
    assert result[("x",)].writes_ok and not result[("y",)].writes_ok  # 6 vs 5 places left for w = 6


def test_enumeration_stops_after_the_first_size_that_is_always_lost():
    result = domain_survival(2, 6, 4, {f"d{i}": 1 for i in range(6)})  # cap 1: a domain costs one shard
    sizes = collections.Counter(len(r.lost) for r in result)
    # Sizes 1..4 survive in part (4 = n - k is the last good one), 5 is all lost, 6 is not listed.
    assert sizes == {s: math.comb(6, s) for s in range(1, 6)}
    assert all(r.reads_ok == (len(r.lost) <= 4) for r in result)


def test_enumeration_is_capped_for_many_domains():
    result = domain_survival(1, 40, 1, {f"d{i:02}": 1 for i in range(40)})
    assert len(result) == MAX_LOSS_SETS
    assert result[0].lost == ("d00",)


@pytest.mark.parametrize(("k", "n", "w", "domains"), [
    (0, 3, 2, {"a": 3}), (3, 2, 2, {"a": 3}), (2, 4, 1, {"a": 4}), (2, 4, 5, {"a": 4}),
    (2, 4, 3, {}), (2, 4, 3, {"a": 0, "b": 4}),
])
def test_domain_survival_rejects_bad_input(k, n, w, domains):
    with pytest.raises(ValueError):
        domain_survival(k, n, w, domains)


@FAST
@given(layout=layouts, k=st.integers(1, 8), extra=st.integers(0, 5))
def test_placement_never_loses_more_than_the_worst_case(layout, k, extra):
    # Links the two halves: for real placements, the shards a stripe has on
    # any set of lost domains never exceed worst_shards_lost.
    n = k + extra
    w = k
    stores = _stores(layout)
    cap = spread_cap(n, len(layout))
    domain_of = {c.store_id: c.domain for c in stores}
    placements = [place(key, stores, n, cap) for key in _keys(60)]
    for loss in domain_survival(k, n, w, layout):
        on_lost = [sum(domain_of[s] in loss.lost for s in chosen) for chosen in placements]
        assert max(on_lost) <= loss.worst_shards_lost
        assert loss.reads_ok == (loss.worst_shards_lost <= n - k)


def test_every_listed_set_is_distinct_and_sorted():
    result = domain_survival(3, 6, 4, {"c": 2, "a": 2, "b": 2})
    assert [r.lost for r in result] == [("a",), ("b",), ("c",), ("a", "b"), ("a", "c"), ("b", "c")]
    assert len({r.lost for r in result}) == len(result)
    assert all(tuple(sorted(r.lost)) == r.lost for r in result)
    assert list(itertools.chain.from_iterable(r.lost for r in result[:3])) == ["a", "b", "c"]

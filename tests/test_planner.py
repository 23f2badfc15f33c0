"""Tests for gateway.planner, checked against published formulas, standard
results for birth-death chains and plain arithmetic where possible."""
from __future__ import annotations

import itertools
import math
from fractions import Fraction

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from gateway import planner as pl
from gateway.errors import ShoalError
from gateway.planner import Assumptions, Layout, PlanError

HOURS = 8766.0


def first_passage_mttdl(stores: int, margin: int, lam: Fraction, mu: Fraction) -> Fraction:
    """Independent exact MTTDL: the sum of expected first-passage times
    i -> i+1 of a birth-death chain, t_i = (1 + b_i t_{i-1}) / a_i
    (a standard result for birth-death chains, common practice). It shares
    no code with the planner's linear solve."""
    total, t_prev = Fraction(0), Fraction(0)
    for i in range(margin + 1):
        a = (stores - i) * lam
        b = mu if i else Fraction(0)
        t = (1 + b * t_prev) / a
        total += t
        t_prev = t
    return total


def rel(a: float, b: float) -> float:
    return abs(a - b) / abs(b)


# --- the chain against closed forms ------------------------------------------

@pytest.mark.parametrize("n", [2, 3, 4, 6, 9, 12])
def test_single_margin_exact_closed_form(n):
    # For n - k = 1 the chain's exact MTTDL is ((2n-1)λ + μ) / (n(n-1)λ²)
    # (solving the two-state chain by hand; the issue states the same form).
    lam, mu = pl.failure_rate(0.03), 1 / 36.0
    got = pl.mttdl_exact(n, 1, lam, mu)
    L, M = Fraction(lam), Fraction(mu)
    assert got == ((2 * n - 1) * L + M) / (n * (n - 1) * L * L)  # exact in rationals
    assert rel(float(got), ((2 * n - 1) * lam + mu) / (n * (n - 1) * lam**2)) < 1e-3


@pytest.mark.parametrize("n", [3, 5, 8, 10])
def test_single_parity_tends_to_patterson_gibson_katz(n):
    # Patterson, Gibson and Katz, "A Case for Redundant Arrays of Inexpensive
    # Disks (RAID)", SIGMOD 1988: MTTDL of one single-parity group of N disks
    # is MTTF² / (N (N-1) MTTR). It is the μ >> λ limit of the exact chain.
    lam = pl.failure_rate(0.02)
    mttf, mttr = 1 / lam, 10.0
    exact = float(pl.mttdl_exact(n, 1, lam, 1 / mttr))
    assert rel(exact, mttf**2 / (n * (n - 1) * mttr)) < 1e-3
    # The gap closes as repair gets faster relative to failure.
    gaps = [rel(float(pl.mttdl_exact(n, 1, lam, 1 / h)), mttf**2 / (n * (n - 1) * h)) for h in (100.0, 10.0, 1.0)]
    assert gaps[0] > gaps[1] > gaps[2]


@pytest.mark.parametrize("n", [4, 6, 9, 12])
def test_double_parity_tends_to_widely_quoted_approximation(n):
    # The widely quoted double-parity approximation MTTF³ / (N(N-1)(N-2) MTTR²),
    # quoted from memory (no page to cite): the μ >> λ limit for n - k = 2.
    lam = pl.failure_rate(0.01)
    mttf, mttr = 1 / lam, 2.0
    exact = float(pl.mttdl_exact(n, 2, lam, 1 / mttr))
    assert rel(exact, mttf**3 / (n * (n - 1) * (n - 2) * mttr**2)) < 1e-3


def test_no_margin_is_first_failure():
    # With k = n the first of n exponential lifetimes ends the data: mean 1/(nλ)
    # (the minimum of independent exponentials, common practice).
    lam = pl.failure_rate(0.05)
    assert pl.mttdl_exact(7, 0, lam, 0.1) == 1 / (7 * Fraction(lam))


@settings(max_examples=60, deadline=None)
@given(stores=st.integers(1, 40), margin=st.integers(0, 12),
       afr=st.floats(1e-4, 0.9), repair=st.floats(0.1, 1e4))
def test_linear_solve_matches_first_passage_sum(stores, margin, afr, repair):
    margin = min(margin, stores - 1)
    lam, mu = pl.failure_rate(afr), 1 / repair
    assert pl.mttdl_exact(stores, margin, lam, mu) == first_passage_mttdl(stores, margin, Fraction(lam), Fraction(mu))


def test_failure_rate_definition():
    # Exponential lifetime: P(survive a year) = exp(-8766 λ) = 1 - AFR.
    for afr in (0.005, 0.02, 0.3):
        assert math.isclose(math.exp(-HOURS * pl.failure_rate(afr)), 1 - afr, rel_tol=1e-12)


def test_annual_loss_probability_formula():
    assert math.isclose(pl.annual_loss_probability(HOURS), 1 - math.exp(-1), rel_tol=1e-12)
    # tiny values keep their precision (expm1), ≈ 8766 / MTTDL
    assert math.isclose(pl.annual_loss_probability(1e20), HOURS / 1e20, rel_tol=1e-9)


def test_more_margin_never_hurts_and_wide_margins_stay_finite():
    a = Assumptions(afr=0.02, repair_hours=24)
    probs = [pl.evaluate(Layout(k=12 - m, n=12), a).annual_loss_probability for m in range(6)]
    assert all(x > y for x, y in zip(probs, probs[1:]))
    wide = pl.evaluate(Layout(k=1, n=200), a)  # MTTDL beyond float range
    assert wide.mttdl_hours == math.inf and wide.annual_loss_probability == 0.0


# --- Monte Carlo --------------------------------------------------------------

def test_monte_carlo_agrees_with_exact_within_99_percent_interval():
    # Failure rates high enough that loss comes within tens of events.
    d = pl.evaluate(Layout(k=3, n=5), Assumptions(afr=0.999, repair_hours=100))
    sim = pl.simulate(d, runs=4000, seed=11)
    assert sim.repair == "exponential" and sim.confidence == 0.99
    assert sim.ci_low_hours <= d.mttdl_hours <= sim.ci_high_hours
    assert sim.agrees
    assert sim.annual_ci_low <= d.annual_loss_probability <= sim.annual_ci_high
    assert pl.simulate(d, runs=4000, seed=11) == sim  # seeded: reproducible


def test_fixed_repair_simulation_matches_renewal_formula():
    # Fixed repair time T, n - k = 1: by renewal-reward (common practice) a cycle
    # is an Exp(Nλ) wait plus min(T, Exp((N-1)λ)); it ends in loss with
    # p = 1 - exp(-(N-1)λT), so MTTDL = (1/(Nλ) + p/((N-1)λ)) / p.
    n, T = 4, 200.0
    d = pl.evaluate(Layout(k=3, n=n), Assumptions(afr=0.99, repair_hours=T))
    lam = d.failure_rate_per_hour
    p = -math.expm1(-(n - 1) * lam * T)
    expected = (1 / (n * lam) + p / ((n - 1) * lam)) / p
    sim = pl.simulate(d, runs=4000, seed=5, fixed_repair=True)
    assert sim.repair == "fixed"
    assert sim.ci_low_hours <= expected <= sim.ci_high_hours


def test_simulation_refuses_rare_loss_and_few_runs():
    d = pl.evaluate(Layout(k=4, n=6), Assumptions(afr=0.02, repair_hours=24))
    with pytest.raises(PlanError, match="too rare to sample"):
        pl.simulate(d, runs=100)
    with pytest.raises(PlanError, match="at least 10 runs"):
        pl.simulate(d, runs=3)


# --- overhead, tolerance, domains (common practice) ----------------------------

def test_common_practice_overhead_and_tolerance():
    a = Assumptions()
    # Common practice: 5 of 9 tolerates 4 losses at overhead 9/5 = 1.8.
    r = pl.evaluate(Layout(k=5, n=9, w=6), a)
    assert (r.tolerated_read, r.tolerated_write, r.overhead) == (4, 3, 1.8)
    # Common practice: three full copies cost 3.0 and survive two losses.
    plan = pl.make_plan(Layout(k=4, n=6), a)
    three = next(x for x in plan.alternatives if x.name == "3 full copies")
    assert (three.k, three.n, three.overhead, three.tolerated_read) == (1, 3, 3.0, 2)
    names = [x.name for x in plan.alternatives]
    assert names == ["2 full copies", "3 full copies", "single parity (5 of 6)", "double parity (4 of 6)"]


def test_nine_stores_three_domains_survive_one_domain():
    # Common practice: 9 stores in three domains of three at k=5, n=9, w=6
    # keep reading and accepting writes with any one domain down, not two.
    plan = pl.make_plan(Layout(k=5, n=9, w=6, domains={"a": 3, "b": 3, "c": 3}), Assumptions())
    s = plan.domain_summary
    assert (s.domains, s.reads, s.writes, s.complete, s.independent) == (3, 1, 1, True, False)
    singles = [d for d in plan.domain_losses if len(d.lost) == 1]
    assert len(singles) == 3 and all(d.reads_ok and d.writes_ok for d in singles)
    assert "beyond 1 domain" in plan.dominant_risk


def test_domain_that_holds_too_much_is_the_dominant_risk():
    # Two domains, 5 + 4 stores, 5 of 9: one domain may hold 5 shards > n - k = 4.
    plan = pl.make_plan(Layout(k=5, n=9, domains={"shelf1": 5, "shelf2": 4}), Assumptions())
    assert plan.domain_summary.reads == 0
    assert "whole-domain loss" in plan.dominant_risk and "shelf1" in plan.dominant_risk
    # With no domains named the output still names correlated failure.
    plain = pl.make_plan(Layout(k=5, n=9), Assumptions())
    assert plain.domain_summary is None and "correlated failure" in plain.dominant_risk


# --- repair time and sector errors --------------------------------------------

def test_rebuild_time_arithmetic():
    # Common-practice arithmetic: 8 TB at 100 MB/s is 80 000 s = 22.2 h.
    assert math.isclose(pl.rebuild_hours(k=4, n=6, stores=6, store_bytes=8e12, repair_rate=100e6), 80000 / 3600)
    # Spread over 11 survivors, each reads 4/11 and writes 1/11 of a store.
    assert math.isclose(pl.rebuild_hours(k=4, n=6, stores=12, store_bytes=8e12, repair_rate=100e6),
                        5 / 11 * 80000 / 3600)
    # A pool-wide cap of 50 MB/s of regenerated data sets the floor.
    assert math.isclose(pl.rebuild_hours(k=4, n=6, stores=12, store_bytes=8e12, repair_rate=100e6,
                                         repair_limit=50e6), 160000 / 3600)
    d = pl.evaluate(Layout(k=4, n=6), Assumptions(disk_size=8 * 10**12, repair_delay_hours=0.5))
    assert math.isclose(d.repair_hours, 0.5 + 80000 / 3600) and math.isclose(d.rebuild_hours, 80000 / 3600)


def test_sector_error_arithmetic():
    # Common practice: reading 1/p bits at p errors per bit meets at least one
    # error with probability 1 - (1 - p)^(1/p) ≈ 1 - 1/e.
    p = 1e-14
    store = 1e14 / 8 / 3  # k = 3 shards of this store size: 1e14 bits in all
    got = pl.ure_loss_probability(k=3, n=4, stores=4, store_bytes=store, ure_per_bit=p)
    assert math.isclose(got, 1 - math.exp(-1), rel_tol=1e-6)
    # Common-practice arithmetic: 3 surviving 8 TB disks read in full is
    # 1.92e14 bits; at 1e-14 that expects 1.92 errors.
    got = pl.ure_loss_probability(k=3, n=4, stores=4, store_bytes=8e12, ure_per_bit=1e-14)
    assert math.isclose(got, 1 - math.exp(-1.92), rel_tol=1e-6)


@pytest.mark.parametrize("stores,k,n", [(7, 2, 4), (8, 3, 5), (6, 1, 3), (9, 5, 9)])
def test_critical_share_matches_enumeration(stores, k, n):
    # Count by brute force the n-store sets that contain all m failed stores
    # (every placement equally likely), against the planner's closed form.
    m = n - k
    sets = list(itertools.combinations(range(stores), n))
    critical = sum(1 for s in sets if set(range(m)) <= set(s))
    # per stripe k shards of size store_bytes * stores / (n * len(sets)) per placement
    bits = 8 * k * 1.0 * stores / n * critical / len(sets)
    p = 1e-3
    expected = 1 - (1 - p) ** bits
    got = pl.ure_loss_probability(k=k, n=n, stores=stores, store_bytes=1.0, ure_per_bit=p)
    assert math.isclose(got, expected, rel_tol=1e-9)


def test_sector_errors_shorten_mttdl():
    a = Assumptions(disk_size=8 * 10**12)
    d = pl.evaluate(Layout(k=5, n=6), a)
    assert 0 < d.ure_loss_probability < 1
    assert d.mttdl_with_ure_hours < d.mttdl_hours
    assert d.annual_loss_probability_with_ure > d.annual_loss_probability
    assert pl.evaluate(Layout(k=6, n=6), a).ure_loss_probability is None


# --- more stores than n ----------------------------------------------------------

def test_more_stores_than_n_is_a_pessimistic_bound():
    a = Assumptions(afr=0.02, repair_hours=24)
    tight = pl.evaluate(Layout(k=4, n=6), a)
    wide = pl.evaluate(Layout(k=4, n=6, stores=12), a)
    assert (tight.model, wide.model) == ("exact", "bound")
    assert wide.mttdl_hours < tight.mttdl_hours  # more combinations hit some stripe
    assert wide.mttdl_hours == float(first_passage_mttdl(12, 2, Fraction(tight.failure_rate_per_hour), Fraction(1 / 24)))
    # With a disk size the spread rebuild is shorter than the single-target one.
    b = Assumptions(disk_size=8 * 10**12)
    assert pl.evaluate(Layout(k=4, n=6, stores=12), b).repair_hours < pl.evaluate(Layout(k=4, n=6), b).repair_hours


def test_candidates_cover_every_shape():
    c = pl.candidates(4, Assumptions())
    assert sorted((d.k, d.n) for d in c) == sorted((k, n) for n in range(1, 5) for k in range(1, n + 1))
    assert all(d.stores == 4 for d in c)
    # The chart's float solve agrees with the exact one to rounding.
    a = Assumptions(afr=0.02, repair_hours=24)
    for d in pl.candidates(10, a):
        assert math.isclose(d.mttdl_hours, pl.evaluate(Layout(k=d.k, n=d.n, stores=10), a).mttdl_hours, rel_tol=1e-9)
    b = Assumptions(disk_size=4 * 10**12)
    for k, n, s in [(4, 6, 6), (5, 9, 12), (2, 8, 20)]:
        fast, slow = pl.evaluate(Layout(k=k, n=n, stores=s), b, exact=False), pl.evaluate(Layout(k=k, n=n, stores=s), b)
        assert math.isclose(fast.mttdl_with_ure_hours, slow.mttdl_with_ure_hours, rel_tol=1e-9)


# --- bad input ----------------------------------------------------------------

@pytest.mark.parametrize("kw,msg", [
    (dict(k=7, n=6), "more than n"),
    (dict(k=0, n=6), "at least 1"),
    (dict(k=4, n=6, w=3), "write quorum"),
    (dict(k=4, n=6, w=7), "write quorum"),
    (dict(k=4, n=6, stores=5), "cannot hold"),
    (dict(k=4, n=6, domains={"a": 4, "b": 1}), "cannot hold n = 6"),
    (dict(k=4, n=6, stores=7, domains={"a": 3, "b": 3}), "domains hold 6"),
    (dict(k=4, n=300), "at most 255"),
])
def test_bad_layout(kw, msg):
    with pytest.raises(PlanError, match=msg) as e:
        Layout(**kw)
    assert isinstance(e.value, ShoalError)


@pytest.mark.parametrize("kw,msg", [
    (dict(afr=0.0), "strictly between 0 and 1"),
    (dict(afr=1.0), "strictly between 0 and 1"),
    (dict(afr=-0.1), "strictly between 0 and 1"),
    (dict(afr=float("nan")), "strictly between 0 and 1"),
    (dict(repair_hours=-3.0), "must be positive"),
    (dict(repair_hours=0.0), "must be positive"),
    (dict(disk_size=0), "must be positive"),
    (dict(fill=1.5), "fill"),
    (dict(ure_per_bit=2.0), "per bit"),
])
def test_bad_assumptions(kw, msg):
    with pytest.raises(PlanError, match=msg):
        Assumptions(**kw)

"""The durability model behind `shoal plan`. Pure: no I/O, no printing.

Model (docs/durability.md spells it out):

* Stores fail independently with exponential lifetimes at rate
  ``lam = -ln(1 - AFR) / 8766`` per hour (8766 h = 365.25 days).
* State i is the number of failed stores. From state i <= m (m = n - k, the
  margin) a failure moves to i + 1 at rate ``(N - i) * lam`` and a repair
  moves to i - 1 at rate ``mu = 1 / repair_hours`` (one repair at a time).
  State m + 1 is data loss. N = n when the pool has n stores.
* MTTDL is the expected time to absorption from state 0, found by solving
  the chain's tridiagonal linear system exactly in rational arithmetic
  (fractions.Fraction), then rounded once to a float.
* The annual loss probability is ``1 - exp(-8766 / MTTDL)``.

With S > n stores each stripe sits on n of the S. The same chain over S
stores with absorption at m + 1 failures is then a *bound*: it is exact
for "some stripe is lost" once every set of m + 1 stores shares at least
one stripe (true with many stripes spread by placement), and it is
pessimistic otherwise; it also ignores that repair could reach the few
critical stripes first. Declustering shortens the rebuild: a failed
store's shards are rebuilt onto all S - 1 survivors, each reading k/(S-1)
and writing 1/(S-1) of its content (see ``rebuild_hours``).

Errors: every bad input raises PlanError (a ShoalError) with a message
that says what to change.
"""
from __future__ import annotations

import math
import random
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from fractions import Fraction
from statistics import NormalDist

from .config import spread_cap, spread_shortfall
from .errors import ShoalError
from .placement import MAX_LOSS_SETS, DomainLoss, domain_survival

__all__ = [
    "Assumptions", "DomainSummary", "Durability", "HOURS_PER_YEAR", "Layout", "Plan", "PlanError",
    "Simulation", "annual_loss_probability", "candidates", "evaluate", "expected_events", "failure_rate", "make_plan",
    "mttdl_exact", "rebuild_hours", "simulate", "ure_loss_probability",
]

HOURS_PER_YEAR = 8766.0  # 365.25 days

# Defaults, each stated in the output when used (docs/durability.md).
DEFAULT_AFR = 0.02  # from memory: published fleet figures for hard disks mostly lie between 1% and 3% a year
DEFAULT_REPAIR_HOURS = 24.0  # a judgement: a day to notice, replace and rebuild a disk at home
DEFAULT_REPAIR_RATE = 100e6  # bytes/s per disk for repair I/O; from memory, well under a modern disk's sequential rate
DEFAULT_URE_PER_BIT = 1e-14  # common practice: consumer disk data sheets quote < 1 error per 1e14 bits read
DEFAULT_FILL = 1.0  # full disks: the worst case for rebuild time and sector-error risk

# Above this annual probability independent failures are no longer small
# next to the correlated events a home or lab setup sees (a judgement).
CORRELATED_REFERENCE = 0.01
MAX_SIM_EVENTS = 10_000_000  # keeps --simulate to seconds in pure Python
CONFIDENCE = 0.99


class PlanError(ShoalError):
    """The planner's inputs are out of range or inconsistent."""


@dataclass(frozen=True, kw_only=True)
class Layout:
    """k-of-n with write quorum w over ``stores`` stores (S >= n).

    ``w`` defaults to min(k + 1, n), the pool config's default; ``stores``
    to n. ``domains`` maps domain name to store count (summing to stores),
    or is None when the layout says nothing about shared fate. Validates
    itself; raises PlanError.
    """

    k: int
    n: int
    w: int | None = None
    stores: int | None = None
    domains: Mapping[str, int] | None = None

    def __post_init__(self) -> None:
        k, n = self.k, self.n
        for name, v in (("k", k), ("n", n)):
            if not isinstance(v, int) or isinstance(v, bool):
                raise PlanError(f"{name} must be a whole number, got {v!r}")
        if k < 1:
            raise PlanError(f"k is {k}; it must be at least 1 (the shards needed to read)")
        if n < k:
            raise PlanError(f"k = {k} is more than n = {n}: a stripe cannot need more shards than it has; raise n or lower k")
        if n > 255:
            raise PlanError(f"n is {n}; the code supports at most 255 shards per stripe")
        w = min(k + 1, n) if self.w is None else self.w
        if not isinstance(w, int) or not k <= w <= n:
            raise PlanError(f"w is {w!r}; the write quorum must lie between k = {k} and n = {n}")
        doms = None
        if self.domains is not None:
            doms = dict(sorted(self.domains.items()))
            if not doms:
                raise PlanError("no domains given")
            for d, c in doms.items():
                if not isinstance(c, int) or isinstance(c, bool) or c < 1:
                    raise PlanError(f"domain {d!r} has {c!r} stores; each domain needs at least one")
        s = self.stores if self.stores is not None else (sum(doms.values()) if doms else n)
        if not isinstance(s, int) or isinstance(s, bool):
            raise PlanError(f"stores must be a whole number, got {s!r}")
        if s < n:
            raise PlanError(f"{s} stores cannot hold n = {n} shards of a stripe on distinct stores; add stores or lower n")
        if doms is not None:
            if sum(doms.values()) != s:
                raise PlanError(f"the domains hold {sum(doms.values())} stores but the layout has {s}")
            short = spread_shortfall(n, doms)
            if short:
                raise PlanError(
                    f"{len(doms)} domains cannot hold n = {n} shards with at most {spread_cap(n, len(doms))} per domain "
                    f"({short} short): add stores to the small domains, merge domains or lower n")
        object.__setattr__(self, "w", w)
        object.__setattr__(self, "stores", s)
        object.__setattr__(self, "domains", doms)

    @property
    def margin(self) -> int:
        return self.n - self.k


@dataclass(frozen=True, kw_only=True)
class Assumptions:
    """Disk and repair figures. Validates itself; raises PlanError.

    ``repair_hours`` (when given) is the whole mean time to repair; else it
    is derived from ``disk_size`` (bytes per store), ``fill``,
    ``repair_rate`` (bytes/s each disk gives to repair I/O),
    ``repair_limit`` (pool-wide regenerated bytes/s, None = unlimited) and
    ``repair_delay_hours`` (time before a rebuild starts); without a disk
    size it is DEFAULT_REPAIR_HOURS. ``defaulted`` names the fields the
    user did not give, so the output can say so.
    """

    afr: float = DEFAULT_AFR
    repair_hours: float | None = None
    disk_size: int | None = None
    fill: float = DEFAULT_FILL
    repair_rate: float = DEFAULT_REPAIR_RATE
    repair_limit: float | None = None
    repair_delay_hours: float = 0.0
    ure_per_bit: float = DEFAULT_URE_PER_BIT
    defaulted: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if not 0.0 < self.afr < 1.0:  # also rejects NaN
            raise PlanError(f"AFR {self.afr!r} must lie strictly between 0 and 1 (0.02 means 2% of disks fail per year)")
        if self.repair_hours is not None and not 0.0 < self.repair_hours < math.inf:
            raise PlanError(f"repair time {self.repair_hours!r} hours must be positive and finite")
        if self.disk_size is not None and not self.disk_size > 0:
            raise PlanError(f"disk size {self.disk_size!r} must be positive")
        if not 0.0 < self.fill <= 1.0:
            raise PlanError(f"fill {self.fill!r} must lie in (0, 1]: the share of each disk that holds shards")
        if not 0.0 < self.repair_rate < math.inf:
            raise PlanError(f"repair rate {self.repair_rate!r} bytes/s must be positive")
        if self.repair_limit is not None and not 0.0 < self.repair_limit < math.inf:
            raise PlanError(f"repair limit {self.repair_limit!r} bytes/s must be positive (or none)")
        if not 0.0 <= self.repair_delay_hours < math.inf:
            raise PlanError(f"repair delay {self.repair_delay_hours!r} hours must not be negative")
        if not 0.0 <= self.ure_per_bit < 1.0:
            raise PlanError(f"unrecoverable read error rate {self.ure_per_bit!r} per bit must lie in [0, 1)")


@dataclass(frozen=True, kw_only=True)
class Durability:
    """The model's figures for one layout on given disks.

    ``model`` is "exact" when stores == n, "bound" when stores > n (the
    MTTDL is then a lower bound, the loss probability an upper bound).
    ``rebuild_hours`` is the data-moving part of ``repair_hours`` (None
    when the repair time was given outright). ``ure_loss_probability`` is
    the chance that one rebuild from the critical state (exactly k shards
    left) meets an unreadable sector and loses a stripe; None without a
    disk size or without redundancy. The ``*_with_ure`` figures add that
    path to the chain.
    """

    name: str
    k: int
    n: int
    w: int
    stores: int
    overhead: float
    usable_bytes: int | None
    tolerated_read: int
    tolerated_write: int
    failure_rate_per_hour: float
    repair_hours: float
    rebuild_hours: float | None
    model: str
    mttdl_hours: float
    annual_loss_probability: float
    ure_loss_probability: float | None
    mttdl_with_ure_hours: float | None
    annual_loss_probability_with_ure: float | None


@dataclass(frozen=True, kw_only=True)
class DomainSummary:
    """``reads``/``writes``: the largest j such that losing any j whole
    domains (and any fewer) keeps reads / writes going. ``complete`` is
    False when the listing was cut short. ``independent`` is True when
    every domain holds one store (nothing is known about shared fate)."""

    domains: int
    reads: int
    writes: int
    complete: bool
    independent: bool


@dataclass(frozen=True, kw_only=True)
class Plan:
    layout: Layout
    assumptions: Assumptions
    result: Durability
    alternatives: tuple[Durability, ...]
    skipped: tuple[str, ...]  # alternatives that do not fit, with the reason
    domain_losses: tuple[DomainLoss, ...]
    domain_summary: DomainSummary | None
    dominant_risk: str
    cautions: tuple[str, ...]


@dataclass(frozen=True, kw_only=True)
class Simulation:
    """Monte Carlo estimate of MTTDL from ``runs`` sampled timelines.

    The interval is the normal-approximation (Wald) interval for the mean
    time to loss at ``confidence``: mean +- z * s / sqrt(runs). The annual
    loss interval maps its ends through 1 - exp(-8766 / t), which is
    monotone. ``repair`` is "exponential" (the chain's assumption, so the
    exact value should fall inside) or "fixed" (every repair takes exactly
    repair_hours, closer to a real rebuild).
    """

    runs: int
    seed: int
    repair: str
    events: int
    confidence: float
    mttdl_hours: float
    ci_low_hours: float
    ci_high_hours: float
    annual_loss_probability: float
    annual_ci_low: float
    annual_ci_high: float
    exact_mttdl_hours: float
    agrees: bool  # the exact value lies inside the interval


# --- the chain -------------------------------------------------------------

def failure_rate(afr: float) -> float:
    """Per-hour exponential failure rate with annual failure probability afr."""
    if not 0.0 < afr < 1.0:
        raise PlanError(f"AFR {afr!r} must lie strictly between 0 and 1")
    return -math.log1p(-afr) / HOURS_PER_YEAR


def _solve_tridiagonal(sub: Sequence[Fraction], diag: Sequence[Fraction], sup: Sequence[Fraction],
                       rhs: Sequence[Fraction]) -> list[Fraction]:
    """Gaussian elimination without pivoting on a tridiagonal system (the
    Thomas algorithm), exact in Fractions. Row i reads
    sub[i] x[i-1] + diag[i] x[i] + sup[i] x[i+1] = rhs[i]. The chain's
    matrix is diagonally dominant, so no pivot is ever zero."""
    size = len(diag)
    c = [Fraction(0)] * size
    d = [Fraction(0)] * size
    for i in range(size):
        pivot = diag[i] - (sub[i] * c[i - 1] if i else 0)
        if pivot == 0:
            raise PlanError("the chain's linear system is singular")  # cannot happen with positive rates
        c[i] = sup[i] / pivot
        d[i] = (rhs[i] - (sub[i] * d[i - 1] if i else 0)) / pivot
    x = [Fraction(0)] * size
    for i in range(size - 1, -1, -1):
        x[i] = d[i] - (c[i] * x[i + 1] if i + 1 < size else 0)
    return x


def _absorption(stores: int, margin: int, lam: float, mu: float, ure_q: float, per_step: bool,
                exact: bool = True) -> Fraction | float:
    """Expected time (or, with per_step, number of transitions) from state 0
    to loss. A repair out of the critical state (margin) fails with
    probability ure_q and loses data.

    exact: the chain's linear system in Fractions. Otherwise floats, by the
    first-passage recurrence t_i = (r_i + b_i t_{i-1}) / a_i summed over
    states: elimination in floats cancels catastrophically on wide margins,
    while this recurrence only adds positive terms."""
    if not exact:
        total = prev = 0.0
        for i in range(margin + 1):
            birth, death = (stores - i) * lam, (mu if i else 0.0)
            r = birth + death if per_step else 1.0
            if i < margin:
                prev = (r + death * prev) / birth
            else:  # the last state: failures and failed repairs both end in loss
                prev = (r + death * (1 - ure_q) * prev) / (birth + death * ure_q)
            total += prev
        return total
    lam_f, mu_f, q = Fraction(lam), Fraction(mu), Fraction(ure_q)
    sub, diag, sup, rhs = [], [], [], []
    for i in range(margin + 1):
        birth = (stores - i) * lam_f
        death = mu_f if i else Fraction(0)
        out = birth + death
        back = death * (1 - q) if i == margin else death  # the rest of the repair rate ends in loss
        sub.append(-back)
        diag.append(out)
        sup.append(-birth if i < margin else Fraction(0))  # a failure in the last state is absorption
        rhs.append(out if per_step else Fraction(1))
    return _solve_tridiagonal(sub, diag, sup, rhs)[0]


def mttdl_exact(stores: int, margin: int, lam: float, mu: float, ure_q: float = 0.0) -> Fraction:
    """Exact expected hours from state 0 to state margin + 1 of the chain
    with ``stores`` stores (rates taken as the exact rationals of the
    floats given). Raises PlanError on rates out of range."""
    if not (lam > 0 and mu > 0 and math.isfinite(lam) and math.isfinite(mu)):
        raise PlanError(f"rates must be positive and finite (failure {lam!r}/h, repair {mu!r}/h)")
    if not 0 <= margin < stores:
        raise PlanError(f"margin {margin} must lie in 0..{stores - 1}")
    if not 0.0 <= ure_q <= 1.0:
        raise PlanError(f"sector-error probability {ure_q!r} must lie in [0, 1]")
    return _absorption(stores, margin, lam, mu, ure_q, per_step=False)


def _to_float(x: Fraction | float) -> float:
    try:
        x = float(x)
    except OverflowError:  # a margin so wide the MTTDL leaves float range
        return math.inf
    return x if x < math.inf else math.inf  # float solves overflow to inf or nan


def annual_loss_probability(mttdl_hours: float) -> float:
    """1 - exp(-8766 / MTTDL), computed without losing small values."""
    if mttdl_hours <= 0:
        raise PlanError(f"MTTDL {mttdl_hours!r} must be positive")
    return -math.expm1(-HOURS_PER_YEAR / mttdl_hours)


# --- disks, rebuild and sector errors ----------------------------------------

def rebuild_hours(*, k: int, n: int, stores: int, store_bytes: float, repair_rate: float,
                  repair_limit: float | None = None) -> float:
    """Hours to regenerate one failed store's ``store_bytes``.

    stores == n: the shards can only go to the store that replaces the
    failed one, so its writes bound the time (store_bytes / repair_rate;
    each survivor reads k/(n-1) <= 1 of a store). stores > n: the shards
    are rebuilt onto the S - 1 survivors, each reading k/(S-1) and writing
    1/(S-1) of a store, so (k + 1) * store_bytes / ((S - 1) * repair_rate),
    never more than the single-target time. ``repair_limit`` caps the
    pool's regenerated bytes per second.
    """
    if stores == n:
        seconds = store_bytes / repair_rate
    else:
        seconds = min(store_bytes, (k + 1) * store_bytes / (stores - 1)) / repair_rate
    if repair_limit:
        seconds = max(seconds, store_bytes / repair_limit)
    return seconds / 3600.0


def ure_loss_probability(*, k: int, n: int, stores: int, store_bytes: float, ure_per_bit: float) -> float:
    """Chance that rebuilding the critical stripes (exactly k shards left,
    m = n - k stores down) meets at least one unreadable sector.

    Each critical stripe reads k shards. A stripe is critical when all m
    failed stores hold one of its shards: a share C(S-m, n-m) / C(S, n) of
    the S * store_bytes / (n * shard) stripes, so the bits read are
    8 k store_bytes (S / n) C(S-m, n-m) / C(S, n) (= 8 k store_bytes when
    S = n). Sector errors are taken as independent per bit.
    """
    m = n - k
    share = Fraction(math.comb(stores - m, n - m), math.comb(stores, n)) * Fraction(stores, n)
    bits = 8.0 * k * store_bytes * float(share)
    return -math.expm1(bits * math.log1p(-ure_per_bit))


def evaluate(layout: Layout, a: Assumptions, name: str = "", *, exact: bool = True) -> Durability:
    """All figures for ``layout`` under ``a``. With exact=False the chain is
    solved in floats (for the chart's many candidates; agrees to rounding).
    Raises PlanError."""
    k, n, s, m = layout.k, layout.n, layout.stores, layout.margin
    store_bytes = a.disk_size * a.fill if a.disk_size else None
    if a.repair_hours is not None:
        repair, rebuild = a.repair_hours, None
    elif store_bytes is not None:
        rebuild = rebuild_hours(k=k, n=n, stores=s, store_bytes=store_bytes,
                                repair_rate=a.repair_rate, repair_limit=a.repair_limit)
        repair = a.repair_delay_hours + rebuild
    else:
        repair, rebuild = DEFAULT_REPAIR_HOURS, None
    if not repair > 0:
        raise PlanError("the repair time works out to zero; give a repair time or a disk size")
    lam, mu = failure_rate(a.afr), 1.0 / repair
    mttdl = _to_float(_absorption(s, m, lam, mu, 0.0, False, exact))
    q = mttdl_u = annual_u = None
    if store_bytes is not None and m > 0:
        q = ure_loss_probability(k=k, n=n, stores=s, store_bytes=store_bytes, ure_per_bit=a.ure_per_bit)
        mttdl_u = _to_float(_absorption(s, m, lam, mu, q, False, exact))
        annual_u = annual_loss_probability(mttdl_u)
    return Durability(
        name=name or f"{k} of {n}", k=k, n=n, w=layout.w, stores=s, overhead=n / k,
        usable_bytes=int(a.disk_size * s * k // n) if a.disk_size else None,
        tolerated_read=m, tolerated_write=n - layout.w, failure_rate_per_hour=lam,
        repair_hours=repair, rebuild_hours=rebuild, model="exact" if s == n else "bound",
        mttdl_hours=mttdl, annual_loss_probability=annual_loss_probability(mttdl),
        ure_loss_probability=q, mttdl_with_ure_hours=mttdl_u, annual_loss_probability_with_ure=annual_u,
    )


def _alternatives(layout: Layout, a: Assumptions) -> tuple[list[Durability], list[str]]:
    n, s = layout.n, layout.stores
    wanted = [("2 full copies", 1, 2), ("3 full copies", 1, 3),
              (f"single parity ({n - 1} of {n})", n - 1, n), (f"double parity ({n - 2} of {n})", n - 2, n)]
    out, skipped = [], []
    for name, k, nn in wanted:
        if k < 1:
            skipped.append(f"{name.split(' (')[0]}: needs n of {nn - k + 1} or more")
        elif nn > s:
            skipped.append(f"{name}: needs {nn} stores, the layout has {s}")
        else:
            out.append(evaluate(Layout(k=k, n=nn, stores=s), a, name))
    return out, skipped


def candidates(stores: int, a: Assumptions) -> list[Durability]:
    """Every k-of-n with 1 <= k <= n <= stores, over ``stores`` stores (for
    the chart; solved in floats, as up to 32640 layouts may be asked)."""
    if not isinstance(stores, int) or stores < 1:
        raise PlanError(f"stores must be at least 1, got {stores!r}")
    return [evaluate(Layout(k=k, n=n, stores=stores), a, exact=False)
            for n in range(1, stores + 1) for k in range(1, n + 1)]


def _summarise(losses: Sequence[DomainLoss], domains: Mapping[str, int]) -> DomainSummary:
    by_size: dict[int, list[DomainLoss]] = {}
    for d in losses:
        by_size.setdefault(len(d.lost), []).append(d)
    reads = writes = 0
    complete = len(losses) < MAX_LOSS_SETS
    for size in range(1, len(domains) + 1):
        group = by_size.get(size, [])
        if len(group) < math.comb(len(domains), size):
            break  # cut short, or not listed because no set of the size before kept reads
        if reads == size - 1 and all(g.reads_ok for g in group):
            reads = size
        if writes == size - 1 and all(g.writes_ok for g in group):
            writes = size
    return DomainSummary(domains=len(domains), reads=reads, writes=writes, complete=complete,
                         independent=all(c == 1 for c in domains.values()))


def _dominant(r: Durability, losses: Sequence[DomainLoss], summary: DomainSummary | None) -> str:
    if r.tolerated_read == 0:
        return "no redundancy: k = n, so any one store failure loses data"
    if summary and not summary.independent and summary.reads == 0:
        bad = [", ".join(d.lost) for d in losses if len(d.lost) == 1 and not d.reads_ok]
        return (f"a whole-domain loss: losing domain {bad[0]} alone loses data, whatever the disks do; "
                "spread the stores over more domains or raise n - k")
    worst = max(r.annual_loss_probability, r.annual_loss_probability_with_ure or 0.0)
    if worst >= CORRELATED_REFERENCE:
        if worst > 2 * r.annual_loss_probability:
            return (f"unreadable sectors met while rebuilding critical stripes: with them the model gives {worst:.2g} "
                    f"a year ({r.ure_loss_probability:.2g} per rebuild from k shards); raise n - k")
        return (f"independent store failures: they alone give {worst:.2g} a year; "
                "raise n - k, shorten repair, or use fewer, more reliable stores")
    if summary is None or summary.independent:
        return ("a correlated failure: the layout names no shared domains, so the model treats every store as "
                "independent, but stores in one host, on one power supply, from one disk batch or at one site fail "
                "together far more often than independent deaths suggest; name the domains to see whole-domain losses")
    return (f"a correlated failure beyond {summary.reads} domain(s): a site-wide event, a batch of disks dying "
            "together or an operator mistake is far likelier than the independent-failure figure")


CAUTIONS = (
    "Shoal is not a backup: deletions, overwrites and mistakes are dispersed as faithfully as data. "
    "Keep an independent backup of data you cannot lose.",
    "These figures are a model, not a promise: real failures correlate (one batch, one power supply, one site).",
    "Lifetimes are taken as exponential (no infant mortality, no wear-out) and repairs as exponential with the "
    "stated mean; a slow or failed repair lengthens every window of risk.",
)


def make_plan(layout: Layout, a: Assumptions) -> Plan:
    """The full answer for ``layout``: its figures, the alternatives on the
    same stores, the whole-domain view, the dominant risk and cautions."""
    result = evaluate(layout, a, f"this layout ({layout.k} of {layout.n})")
    alts, skipped = _alternatives(layout, a)
    losses: list[DomainLoss] = []
    summary = None
    if layout.domains:
        losses = domain_survival(layout.k, layout.n, layout.w, layout.domains)
        summary = _summarise(losses, layout.domains)
    cautions = list(CAUTIONS)
    if layout.stores > layout.n:
        cautions.append(f"{layout.stores} stores hold {layout.n}-shard stripes: the figures are a bound "
                        "(any n - k + 1 failures among all stores counted as loss), so the true risk is at most this.")
    if a.disk_size is None:
        cautions.append("no disk size given: the sector-error risk during rebuild is not computed.")
    elif result.annual_loss_probability_with_ure is not None and (
            result.annual_loss_probability_with_ure > 2 * result.annual_loss_probability):
        cautions.append("within the independent model, unreadable sectors met while rebuilding from k shards "
                        "outweigh further disk deaths: scrubbing finds bad sectors before a rebuild needs them.")
    return Plan(layout=layout, assumptions=a, result=result, alternatives=tuple(alts), skipped=tuple(skipped),
                domain_losses=tuple(losses), domain_summary=summary,
                dominant_risk=_dominant(result, losses, summary), cautions=tuple(cautions))


# --- Monte Carlo -------------------------------------------------------------

def expected_events(d: Durability) -> float:
    """Expected failures plus repairs in one timeline until loss (exact chain)."""
    lam, mu = d.failure_rate_per_hour, 1.0 / d.repair_hours
    return _to_float(_absorption(d.stores, d.tolerated_read, lam, mu, 0.0, per_step=True, exact=False))


def simulate(d: Durability, *, runs: int, seed: int = 0, fixed_repair: bool = False,
             max_events: int = MAX_SIM_EVENTS) -> Simulation:
    """Sample ``runs`` timelines of d's stores until data loss.

    Failures come from the superposed memoryless lifetimes of the working
    stores (rate (S - i) lam); one repair runs at a time, each lasting an
    exponential (or, with fixed_repair, exactly repair_hours) time. The
    same seed gives the same result. Raises PlanError if runs < 10 or the
    expected number of events passes max_events (loss too rare to sample
    directly; the exact solution needs no sampling).
    """
    if not isinstance(runs, int) or runs < 10:
        raise PlanError(f"--simulate needs at least 10 runs for an interval, got {runs!r}")
    need = expected_events(d) * runs
    if need > max_events:
        raise PlanError(
            f"direct simulation would take about {need:.2g} events ({runs} runs), more than {max_events:.2g}: "
            "loss is too rare to sample here (good news). The exact MTTDL needs no sampling; to see the "
            "cross-check, use fewer runs, a higher --afr or a longer --repair-hours")
    rng = random.Random(seed)
    lam, hours, m, s = d.failure_rate_per_hour, d.repair_hours, d.tolerated_read, d.stores
    duration = (lambda: hours) if fixed_repair else (lambda: rng.expovariate(1.0 / hours))
    times: list[float] = []
    events = 0
    for _ in range(runs):
        t, failed, repair_end = 0.0, 0, math.inf
        while True:
            next_failure = t + rng.expovariate((s - failed) * lam)  # memoryless: resampling is exact
            events += 1
            if repair_end <= next_failure:
                t, failed = repair_end, failed - 1
                repair_end = t + duration() if failed else math.inf
                continue
            t, failed = next_failure, failed + 1
            if failed > m:
                break
            if failed == 1:
                repair_end = t + duration()
        times.append(t)
    mean = sum(times) / runs
    sd = math.sqrt(sum((x - mean) ** 2 for x in times) / (runs - 1))
    half = NormalDist().inv_cdf(0.5 + CONFIDENCE / 2) * sd / math.sqrt(runs)
    lo, hi = mean - half, mean + half
    return Simulation(
        runs=runs, seed=seed, repair="fixed" if fixed_repair else "exponential", events=events,
        confidence=CONFIDENCE, mttdl_hours=mean, ci_low_hours=max(lo, 0.0), ci_high_hours=hi,
        annual_loss_probability=annual_loss_probability(mean),
        annual_ci_low=annual_loss_probability(hi), annual_ci_high=annual_loss_probability(lo) if lo > 0 else 1.0,
        exact_mttdl_hours=d.mttdl_hours, agrees=lo <= d.mttdl_hours <= hi,
    )

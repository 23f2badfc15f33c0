"""Placement: which n stores hold the shards of a stripe. Pure, no I/O.

Weighted rendezvous hashing (highest random weight): every candidate store
gets a score from a hash of (stripe key, store id), scaled by its weight,
and the stripe goes to the best-scoring stores. The score is
``-weight / ln(u)`` with ``u`` uniform in (0, 1); under it a store's chance
of ranking first is proportional to its weight, and removing a store only
moves the stripes that ranked it among their chosen stores (common practice
for weighted rendezvous hashing).

On top of the ranking the spread rule applies: at most ``cap`` shards of a
stripe per failure domain (``gateway.config.spread_cap``). Stores are taken
greedily by descending score, skipping those whose domain is full.

``domain_survival`` is the matching durability view: which sets of whole
domains a pool can lose and still read, and still write.
"""
from __future__ import annotations

import hashlib
import itertools
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

from .config import spread_cap
from .ids import FileId, StoreId

__all__ = [
    "Candidate",
    "DomainLoss",
    "MAX_LOSS_SETS",
    "domain_survival",
    "place",
    "rank",
    "stripe_key",
]

# 2**53: the float mantissa, so (h + 0.5) / _U_SCALE is exact and in (0, 1).
_U_SCALE = float(1 << 53)

# Upper bound on the number of domain sets domain_survival examines.
MAX_LOSS_SETS = 4096


@dataclass(frozen=True)
class Candidate:
    """A store that may take a shard.

    ``weight`` is normally the store's free bytes; a weight <= 0 (full, or
    retiring) keeps the store out of placement.
    """

    store_id: StoreId
    domain: str
    weight: float


def stripe_key(file_id: FileId, stripe_index: int) -> bytes:
    """The placement key of a stripe: 16 bytes of file id, 8 of stripe index.

    Raises ValueError if file_id is not 32 hex digits or stripe_index is
    outside 0..2**64-1.
    """
    if not isinstance(stripe_index, int) or isinstance(stripe_index, bool) or not 0 <= stripe_index < 1 << 64:
        raise ValueError(f"stripe index {stripe_index!r} must be an int in 0..2**64-1")
    if not isinstance(file_id, str) or len(file_id) != 32:
        raise ValueError(f"file id {file_id!r} must be 32 hex digits")
    return bytes.fromhex(file_id) + stripe_index.to_bytes(8, "big")


def _score(key: bytes, store: bytes, weight: float) -> float:
    # One short hash per candidate; the top 53 bits make u exact in (0, 1).
    h = int.from_bytes(hashlib.blake2b(key + store, digest_size=8).digest(), "big")
    u = ((h >> 11) + 0.5) / _U_SCALE
    return -weight / math.log(u)


def rank(key: bytes, candidates: Iterable[Candidate]) -> list[Candidate]:
    """All candidates with weight > 0, best first (ties broken by store id).

    Raises ValueError on duplicate store ids.
    """
    scored: list[tuple[float, str, Candidate]] = []
    seen: set[str] = set()
    for c in candidates:
        if c.store_id in seen:
            raise ValueError(f"store id {c.store_id!r} appears twice among the candidates")
        seen.add(c.store_id)
        if not c.weight > 0:  # also drops NaN
            continue
        scored.append((_score(key, c.store_id.encode(), float(c.weight)), c.store_id, c))
    # Highest score first; equal scores fall back to the smaller store id.
    scored.sort(key=lambda t: (-t[0], t[1]))
    return [c for _, _, c in scored]


def place(key: bytes, candidates: Sequence[Candidate], n: int, cap: int) -> list[StoreId]:
    """Choose up to n distinct stores for the stripe with placement key ``key``.

    Stores are taken by descending rendezvous score, skipping any whose
    domain already holds ``cap`` of the chosen. Shard i goes to element i.
    The result has fewer than n elements only when the candidates with
    weight > 0 cannot hold n under the cap. Deterministic: the same key and
    candidate set give the same list, whatever the candidates' order.

    Raises ValueError on duplicate store ids, n < 1 or cap < 1.
    """
    if n < 1:
        raise ValueError(f"n is {n}; it must be at least 1")
    if cap < 1:
        raise ValueError(f"cap is {cap}; it must be at least 1")
    chosen: list[StoreId] = []
    per_domain: dict[str, int] = {}
    for c in rank(key, candidates):
        used = per_domain.get(c.domain, 0)
        if used >= cap:
            continue
        per_domain[c.domain] = used + 1
        chosen.append(c.store_id)
        if len(chosen) == n:
            break
    return chosen


@dataclass(frozen=True, kw_only=True)
class DomainLoss:
    """The effect of losing every store of the domains in ``lost`` at once.

    ``worst_shards_lost`` is the most shards of one stripe that can be on
    those domains under the spread rule; ``reads_ok`` says every stripe
    keeps at least k shards; ``writes_ok`` says the other domains can still
    take w shards of a new stripe under the same cap.
    """

    lost: tuple[str, ...]
    worst_shards_lost: int
    reads_ok: bool
    writes_ok: bool


def domain_survival(k: int, n: int, w: int, domains: Mapping[str, int]) -> list[DomainLoss]:
    """Which sets of whole domains the pool survives losing.

    ``domains`` maps each domain to its number of stores. The cap is
    ``spread_cap(n, len(domains))``; a stripe has at most min(cap, size) of
    its shards in a domain, so losing a set of domains costs a stripe at
    most min(n, sum of min(cap, size)) shards; reads survive if that is at
    most n - k. Writes survive if the remaining domains hold at least w
    shards under the cap.

    Sets are listed by size (1, 2, ...), within a size in the order of
    ``itertools.combinations`` over the domain names sorted. The listing
    stops after the first size at which no set survives for reads, after
    every domain has been lost, or once MAX_LOSS_SETS sets have been
    listed (so with many domains the larger sizes may be cut short).

    Raises ValueError unless 1 <= k <= w <= n and every domain has at
    least one store.
    """
    if not (isinstance(k, int) and isinstance(n, int) and isinstance(w, int)) or not 1 <= k <= w <= n:
        raise ValueError(f"need 1 <= k <= w <= n, got k={k}, w={w}, n={n}")
    if not domains:
        raise ValueError("no domains given")
    for d, size in domains.items():
        if not isinstance(size, int) or size < 1:
            raise ValueError(f"domain {d!r} has {size!r} stores; it needs at least 1")
    cap = spread_cap(n, len(domains))
    hold = {d: min(cap, size) for d, size in domains.items()}
    total = sum(hold.values())
    names = sorted(domains)
    out: list[DomainLoss] = []
    for size in range(1, len(names) + 1):
        any_read = False
        for lost in itertools.combinations(names, size):
            if len(out) >= MAX_LOSS_SETS:
                return out
            lost_hold = sum(hold[d] for d in lost)
            worst = min(n, lost_hold)
            reads_ok = worst <= n - k
            any_read = any_read or reads_ok
            out.append(DomainLoss(
                lost=lost, worst_shards_lost=worst, reads_ok=reads_ok,
                writes_ok=total - lost_hold >= w,
            ))
        if not any_read:
            break
    return out

"""Plain statistics that components expose; only gateway.metrics turns
them into Prometheus families. No locks: each instance is updated from one
trio loop (or under the caller's own lock)."""
from __future__ import annotations

import bisect
from dataclasses import dataclass

# Seconds; suits shard I/O on local disks through to slow remote mounts.
LATENCY_BUCKETS: tuple[float, ...] = (
    0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0,
)


@dataclass(frozen=True, kw_only=True)
class HistogramSnapshot:
    bounds: tuple[float, ...]
    counts: tuple[int, ...]  # per bucket, not cumulative; len(bounds) + 1 (the last is +Inf)
    total: float  # sum of observations
    count: int

    def cumulative(self) -> list[tuple[str, int]]:
        """[(le, cumulative count)], ending with ('+Inf', count)."""
        out, run = [], 0
        for b, c in zip(self.bounds, self.counts):
            run += c
            out.append((repr(float(b)), run))
        out.append(("+Inf", self.count))
        return out

    def quantile(self, q: float) -> float:
        """Upper bound of the bucket holding quantile q (coarse, for tests and status)."""
        if not self.count:
            return 0.0
        need, run = q * self.count, 0
        for b, c in zip(self.bounds, self.counts):
            run += c
            if run >= need:
                return b
        return float("inf")


class Histogram:
    def __init__(self, bounds: tuple[float, ...] = LATENCY_BUCKETS):
        self.bounds = tuple(sorted(bounds))
        self.counts = [0] * (len(self.bounds) + 1)
        self.total = 0.0
        self.count = 0

    def observe(self, value: float) -> None:
        self.counts[bisect.bisect_left(self.bounds, value)] += 1
        self.total += value
        self.count += 1

    def snapshot(self) -> HistogramSnapshot:
        return HistogramSnapshot(bounds=self.bounds, counts=tuple(self.counts), total=self.total, count=self.count)

"""Prometheus exposition of the daemon's statistics snapshot.

This is the only module that imports prometheus_client. The daemon builds a
plain snapshot (the shape is in docs/architecture.md, "statistics
snapshot") about once a second and hands it to ``Exporter.update``; a
custom collector turns the most recent one into metric families whenever
the registry is read, by ``Exporter.render`` or by an HTTP scrape.

Contract
- ``Exporter()`` owns a private ``CollectorRegistry``; the global registry
  (and with it the process/platform collectors) is never touched.
- ``update(snapshot)`` takes ownership of the mapping: the caller must not
  change it afterwards. Publishing is one reference assignment, so the HTTP
  thread sees either the old snapshot or the new one, never a mix.
- Collecting never raises for a missing or malformed key: what is missing
  is left out (a section whose code fails is logged and skipped, the rest is
  still exported). Before the first update only ``shoal_build_info`` is
  exported. ``shoal_stripes`` carries all four health values whenever the
  snapshot has a ``pool.stripes`` mapping (absent keys count 0), and
  ``shoal_scrub_errors_total`` always carries corrupt, missing and orphan.
- ``serve("host:port")`` starts prometheus_client's HTTP server in a daemon
  thread (the metrics are at /metrics; the library answers any path alike).
  It blocks briefly (bind, host name lookup), so the trio daemon should run
  it and ``close()`` in a worker thread. Errors while binding raise
  ``ShoalError`` with the OSError as ``__cause__``.

Label ``store`` is the store's path, ``domain`` its failure-domain label;
both are on every per-store series so alerts can name them directly.
Timestamps are Unix wall-clock seconds as the daemon reports them.

Metrics (type, labels: meaning)

==============================================  =========  ======================  ==========================================
name                                            type       labels                  meaning
==============================================  =========  ======================  ==========================================
shoal_build_info                                gauge      version, python         always 1; the running build
shoal_snapshot_age_seconds                      gauge                              time since the daemon last called update()
shoal_pool_info                                 gauge      pool                    always 1; the pool's name
shoal_pool_k                                    gauge                              shards needed to read a stripe
shoal_pool_n                                    gauge                              shards written per stripe
shoal_pool_write_quorum                         gauge                              durable shards needed to acknowledge (w)
shoal_pool_read_only                            gauge                              1 while the pool refuses writes
shoal_pool_write_bytes_total                    counter                            file bytes written by clients
shoal_pool_read_bytes_total                     counter                            file bytes read by clients
shoal_pool_degraded_reads_total                 counter                            stripe reads that needed a decode
shoal_pool_checksum_failures_total              counter                            shards whose checksum did not match
shoal_pool_quorum_failures_total                counter                            commits refused: fewer than w shards durable
shoal_write_quorum_wait_seconds                 histogram                          wait from stripe sealed to w shards durable
shoal_stripes                                   gauge      health                  stripes per health: intact..lost
shoal_store_info                                gauge      store, domain, store_id always 1; ties a path to its store id
shoal_store_up                                  gauge      store, domain           1 if the store answers, else 0
shoal_store_state                               gauge      store, domain, state    1 for the store's current state, else 0
shoal_store_free_bytes                          gauge      store, domain           free bytes on the store's filesystem
shoal_store_used_bytes                          gauge      store, domain           bytes in use on the store's filesystem
shoal_store_size_bytes                          gauge      store, domain           total bytes of the store's filesystem
shoal_store_shard_write_seconds                 histogram  store, domain           time to write and fsync one shard
shoal_store_shard_read_seconds                  histogram  store, domain           time to read one shard
shoal_store_errors_total                        counter    store, domain           failed store operations
shoal_repair_queue_stripes                      gauge                              stripes waiting for repair
shoal_repair_bytes_total                        counter                            shard bytes regenerated by repair
shoal_repair_shards_total                       counter                            shards regenerated by repair
shoal_repair_rate_bytes_per_second              gauge                              recent repair throughput
shoal_repair_last_progress_timestamp_seconds    gauge                              when repair last finished a shard
shoal_scrub_running                             gauge                              1 while a scrub pass runs
shoal_scrub_progress_ratio                      gauge                              share of the current pass done, 0..1
shoal_scrub_checked_shards_total                counter                            shards read and verified by scrub
shoal_scrub_checked_bytes_total                 counter                            bytes read and verified by scrub
shoal_scrub_errors_total                        counter    kind                    scrub findings: corrupt, missing, orphan
shoal_scrub_last_complete_timestamp_seconds     gauge                              when the last full pass ended
shoal_catalog_mirror_age_seconds                gauge                              age of the newest catalog mirror
shoal_catalog_generation                        gauge                              catalog generation (rises with commits)
==============================================  =========  ======================  ==========================================
"""
from __future__ import annotations

import logging
import math
import platform
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Mapping
from typing import Any

from prometheus_client import CollectorRegistry, generate_latest, start_http_server
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, HistogramMetricFamily, Metric
from prometheus_client.registry import Collector

from . import __version__
from .errors import ShoalError
from .stats import HistogramSnapshot

log = logging.getLogger(__name__)

HEALTHS: tuple[str, ...] = ("intact", "degraded", "critical", "lost")
STORE_STATES: tuple[str, ...] = ("online", "offline", "stalled", "full", "foreign", "retiring", "failed")
SCRUB_ERROR_KINDS: tuple[str, ...] = ("corrupt", "missing", "orphan")

# name -> HELP text; one place, so every family is documented the same way.
HELP: dict[str, str] = {
    "shoal_build_info": "Always 1; labels name the running Shoal version and Python version.",
    "shoal_snapshot_age_seconds": "Seconds since the daemon last published its statistics (a rising value means its loop is stuck).",
    "shoal_pool_info": "Always 1; the label names the pool.",
    "shoal_pool_k": "Shards needed to read a stripe (k).",
    "shoal_pool_n": "Shards written per stripe (n).",
    "shoal_pool_write_quorum": "Durable shards per stripe before a write is acknowledged (w).",
    "shoal_pool_read_only": "1 while the pool refuses writes because fewer than w stores can take them, else 0.",
    "shoal_pool_write_bytes": "File bytes written by clients.",
    "shoal_pool_read_bytes": "File bytes read by clients.",
    "shoal_pool_degraded_reads": "Stripe reads that had to decode from parity because a shard was missing or bad.",
    "shoal_pool_checksum_failures": "Shards read whose checksum did not match.",
    "shoal_pool_quorum_failures": "Commits refused because fewer than w shards of a stripe became durable.",
    "shoal_write_quorum_wait_seconds": "Seconds from a stripe being sealed until w of its shards were durable.",
    "shoal_stripes": "Stripes by health: intact (n valid shards), degraded (more than k), critical (exactly k), lost (fewer than k).",
    "shoal_store_info": "Always 1; ties a store's path to its store id.",
    "shoal_store_up": "1 if the store answers its probes, else 0.",
    "shoal_store_state": "1 for the store's current state, 0 for the others.",
    "shoal_store_free_bytes": "Free bytes on the store's filesystem.",
    "shoal_store_used_bytes": "Bytes in use on the store's filesystem.",
    "shoal_store_size_bytes": "Total bytes of the store's filesystem.",
    "shoal_store_shard_write_seconds": "Seconds to write and fsync one shard on the store.",
    "shoal_store_shard_read_seconds": "Seconds to read one shard from the store.",
    "shoal_store_errors": "Store operations that failed (I/O errors, deadlines passed, no space).",
    "shoal_repair_queue_stripes": "Stripes waiting in the repair queue.",
    "shoal_repair_bytes": "Shard bytes regenerated and written by repair.",
    "shoal_repair_shards": "Shards regenerated and written by repair.",
    "shoal_repair_rate_bytes_per_second": "Recent repair throughput in bytes per second, as the repair worker measures it.",
    "shoal_repair_last_progress_timestamp_seconds": "Unix time when repair last wrote a regenerated shard.",
    "shoal_scrub_running": "1 while a scrub pass is running, else 0.",
    "shoal_scrub_progress_ratio": "Share of the current (or last) scrub pass done, 0 to 1.",
    "shoal_scrub_checked_shards": "Shards read and verified by scrub.",
    "shoal_scrub_checked_bytes": "Bytes read and verified by scrub.",
    "shoal_scrub_errors": "Problems found by scrub, by kind: corrupt, missing or orphan shards.",
    "shoal_scrub_last_complete_timestamp_seconds": "Unix time when the last full scrub pass ended.",
    "shoal_catalog_mirror_age_seconds": "Seconds since the newest catalog mirror was written to the stores.",
    "shoal_catalog_generation": "Catalog generation number; it rises with every commit.",
}

_STORE_LABELS = ("store", "domain")


def _gauge(name: str, labels: Iterable[str] = ()) -> GaugeMetricFamily:
    return GaugeMetricFamily(name, HELP[name], labels=list(labels))


def _counter(name: str, labels: Iterable[str] = ()) -> CounterMetricFamily:
    # prometheus_client appends _total itself when rendering a counter.
    return CounterMetricFamily(name, HELP[name], labels=list(labels))


def _histogram(name: str, labels: Iterable[str] = ()) -> HistogramMetricFamily:
    return HistogramMetricFamily(name, HELP[name], labels=list(labels))


def _number(value: Any) -> float | None:
    """A sample value, or None when the snapshot holds nothing usable."""
    if isinstance(value, bool):
        return float(value)
    if isinstance(value, (int, float)):
        return float(value)
    return None


def _section(parent: Any, key: str) -> Mapping[str, Any]:
    value = parent.get(key) if isinstance(parent, Mapping) else None
    return value if isinstance(value, Mapping) else {}


def _add(family: Metric, labels: list[str], value: Any) -> None:
    v = _number(value)
    if v is not None:
        family.add_metric(labels, v)


def _add_histogram(family: HistogramMetricFamily, labels: list[str], snap: Any) -> None:
    # A snapshot whose counts do not match its bounds would render a broken
    # histogram; leave it out instead.
    if isinstance(snap, HistogramSnapshot) and len(snap.counts) == len(snap.bounds) + 1:
        family.add_metric(labels, snap.cumulative(), sum_value=snap.total)


def _nonempty(families: Iterable[Metric]) -> Iterator[Metric]:
    # An empty family still prints HELP/TYPE; leave it out so a scrape shows
    # only what the snapshot knows.
    return (f for f in families if f.samples)


def _pool_families(snap: Mapping[str, Any]) -> Iterator[Metric]:
    pool = _section(snap, "pool")
    if not pool:
        return iter(())
    out: list[Metric] = []
    name = pool.get("name")
    info = _gauge("shoal_pool_info", ["pool"])
    if isinstance(name, str):
        info.add_metric([name], 1.0)
    out.append(info)
    for key, metric in (("k", "shoal_pool_k"), ("n", "shoal_pool_n"), ("w", "shoal_pool_write_quorum"),
                        ("read_only", "shoal_pool_read_only")):
        g = _gauge(metric)
        _add(g, [], pool.get(key))
        out.append(g)
    for key, metric in (("bytes_written", "shoal_pool_write_bytes"), ("bytes_read", "shoal_pool_read_bytes"),
                        ("degraded_reads", "shoal_pool_degraded_reads"),
                        ("checksum_failures", "shoal_pool_checksum_failures"),
                        ("quorum_failures", "shoal_pool_quorum_failures")):
        c = _counter(metric)
        _add(c, [], pool.get(key))
        out.append(c)
    h = _histogram("shoal_write_quorum_wait_seconds")
    _add_histogram(h, [], pool.get("quorum_wait_seconds"))
    out.append(h)
    stripes = pool.get("stripes")
    if isinstance(stripes, Mapping):
        g = _gauge("shoal_stripes", ["health"])
        for health in HEALTHS:
            # A count mapping may leave out zeros; every health is exported.
            v = _number(stripes.get(health, 0))
            g.add_metric([health], 0.0 if v is None else v)
        out.append(g)
    return _nonempty(out)


def _store_families(snap: Mapping[str, Any]) -> Iterator[Metric]:
    stores = snap.get("stores")
    if not isinstance(stores, (list, tuple)):
        return iter(())
    info = _gauge("shoal_store_info", (*_STORE_LABELS, "store_id"))
    up = _gauge("shoal_store_up", _STORE_LABELS)
    state = _gauge("shoal_store_state", (*_STORE_LABELS, "state"))
    free = _gauge("shoal_store_free_bytes", _STORE_LABELS)
    used = _gauge("shoal_store_used_bytes", _STORE_LABELS)
    size = _gauge("shoal_store_size_bytes", _STORE_LABELS)
    wlat = _histogram("shoal_store_shard_write_seconds", _STORE_LABELS)
    rlat = _histogram("shoal_store_shard_read_seconds", _STORE_LABELS)
    errors = _counter("shoal_store_errors", _STORE_LABELS)
    for s in stores:
        if not isinstance(s, Mapping):
            continue
        path = s.get("path") if s.get("path") is not None else s.get("store_id")
        if path is None:
            continue  # nothing to name the series by
        lv = [str(path), str(s.get("domain") or "")]
        if s.get("store_id") is not None:
            info.add_metric([*lv, str(s["store_id"])], 1.0)
        _add(up, lv, s.get("up"))
        current = s.get("state")
        if isinstance(current, str):
            # One-hot over every known state, so a query for state="stalled"
            # finds a 0 rather than nothing; an unknown state is shown too.
            for st in STORE_STATES if current in STORE_STATES else (*STORE_STATES, current):
                state.add_metric([*lv, st], 1.0 if st == current else 0.0)
        _add(free, lv, s.get("free_bytes"))
        _add(used, lv, s.get("used_bytes"))
        _add(size, lv, s.get("total_bytes"))
        _add_histogram(wlat, lv, s.get("write_latency_seconds"))
        _add_histogram(rlat, lv, s.get("read_latency_seconds"))
        errs = s.get("errors")
        if isinstance(errs, Mapping):  # counts by kind: the family has no kind label
            errs = sum(v for v in (_number(x) for x in errs.values()) if v is not None)
        _add(errors, lv, errs)
    return _nonempty((info, up, state, free, used, size, wlat, rlat, errors))


def _repair_families(snap: Mapping[str, Any]) -> Iterator[Metric]:
    repair = _section(snap, "repair")
    out: list[Metric] = []
    for key, metric, make in (
        ("queue_stripes", "shoal_repair_queue_stripes", _gauge),
        ("repaired_bytes", "shoal_repair_bytes", _counter),
        ("repaired_shards", "shoal_repair_shards", _counter),
        ("rate_bytes_per_second", "shoal_repair_rate_bytes_per_second", _gauge),
        ("last_progress_time", "shoal_repair_last_progress_timestamp_seconds", _gauge),
    ):
        f = make(metric)
        _add(f, [], repair.get(key))
        out.append(f)
    return _nonempty(out)


def _scrub_families(snap: Mapping[str, Any]) -> Iterator[Metric]:
    scrub = _section(snap, "scrub")
    if not scrub:
        return iter(())
    out: list[Metric] = []
    for key, metric, make in (
        ("running", "shoal_scrub_running", _gauge),
        ("progress_ratio", "shoal_scrub_progress_ratio", _gauge),
        ("shards_checked", "shoal_scrub_checked_shards", _counter),
        ("bytes_checked", "shoal_scrub_checked_bytes", _counter),
        ("last_complete_time", "shoal_scrub_last_complete_timestamp_seconds", _gauge),
    ):
        f = make(metric)
        _add(f, [], scrub.get(key))
        out.append(f)
    found = _section(scrub, "errors")
    errors = _counter("shoal_scrub_errors", ["kind"])
    # The known kinds are always present so increase() has a starting point
    # before the first error; any other kind the scrubber reports is kept.
    for kind in (*SCRUB_ERROR_KINDS, *sorted(k for k in found if isinstance(k, str) and k not in SCRUB_ERROR_KINDS)):
        v = _number(found.get(kind, 0))
        errors.add_metric([kind], 0.0 if v is None else v)
    out.append(errors)
    return _nonempty(out)


def _catalog_families(snap: Mapping[str, Any]) -> Iterator[Metric]:
    catalog = _section(snap, "catalog")
    age = _gauge("shoal_catalog_mirror_age_seconds")
    _add(age, [], catalog.get("mirror_age_seconds"))
    gen = _gauge("shoal_catalog_generation")
    _add(gen, [], catalog.get("generation"))
    return _nonempty((age, gen))


_SECTIONS: tuple[Callable[[Mapping[str, Any]], Iterator[Metric]], ...] = (
    _pool_families, _store_families, _repair_families, _scrub_families, _catalog_families,
)


def families(snapshot: Mapping[str, Any] | None, *, age: float | None = None) -> list[Metric]:
    """Metric families for one snapshot (None: only build info).

    Pure apart from logging: a section whose code fails is logged and left
    out, so one bad value cannot blank the whole scrape.
    """
    build = _gauge("shoal_build_info", ["version", "python"])
    build.add_metric([__version__, platform.python_version()], 1.0)
    out: list[Metric] = [build]
    if snapshot is None:
        return out
    if age is not None and math.isfinite(age):
        g = _gauge("shoal_snapshot_age_seconds")
        g.add_metric([], max(0.0, age))
        out.append(g)
    for section in _SECTIONS:
        try:
            out.extend(section(snapshot))
        except Exception:
            log.exception("metrics: cannot render %s; left out of this scrape", section.__name__)
    return out


class _SnapshotCollector(Collector):
    """Renders whatever the exporter published last; runs in the HTTP thread."""

    def __init__(self, latest: Callable[[], tuple[Mapping[str, Any], float] | None]):
        self._latest = latest

    def collect(self) -> Iterable[Metric]:
        published = self._latest()  # read the reference once
        if published is None:
            return families(None)
        snapshot, at = published
        return families(snapshot, age=time.monotonic() - at)


def parse_listen(listen: str) -> tuple[str, int]:
    """Split "host:port" or "[v6addr]:port" into (host, port).

    An empty host means every IPv4 interface. Raises ValueError.
    """
    host, sep, port = listen.rpartition(":")
    if not sep or not port.isdigit() or int(port) > 65535:
        raise ValueError(f"metrics listen address {listen!r} is not host:port (e.g. 127.0.0.1:9851 or [::1]:9851)")
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    elif ":" in host:
        raise ValueError(f"metrics listen address {listen!r}: write an IPv6 address in brackets, e.g. [::1]:9851")
    return host or "0.0.0.0", int(port)


class Exporter:
    """Holds the latest snapshot and exposes it through a private registry.

    ``update`` may be called from the trio loop while the HTTP thread
    renders; ``serve`` and ``close`` are not meant to race each other.
    """

    def __init__(self) -> None:
        self._published: tuple[Mapping[str, Any], float] | None = None
        self.registry = CollectorRegistry(auto_describe=False)
        self.registry.register(_SnapshotCollector(lambda: self._published))
        self._lock = threading.Lock()
        self._server: Any = None
        self._thread: threading.Thread | None = None

    def update(self, snapshot: Mapping[str, Any]) -> None:
        """Publish a new snapshot; it must not be changed afterwards.

        Raises TypeError if it is not a mapping (a bug in the caller).
        """
        if not isinstance(snapshot, Mapping):
            raise TypeError(f"metrics snapshot must be a mapping, got {type(snapshot).__name__}")
        self._published = (snapshot, time.monotonic())  # one atomic swap

    def render(self) -> bytes:
        """The Prometheus text exposition (format 0.0.4) of the latest snapshot."""
        return generate_latest(self.registry)

    def serve(self, listen: str) -> tuple[str, int]:
        """Start the HTTP endpoint on "host:port" (port 0 picks a free one).

        Returns the bound (host, port); an IPv6 host comes without brackets.
        Raises ValueError for a malformed address, ShoalError if it cannot
        bind, RuntimeError if already serving.
        """
        host, port = parse_listen(listen)
        with self._lock:
            if self._server is not None:
                raise RuntimeError("metrics endpoint is already being served")
            try:
                server, thread = start_http_server(port, addr=host, registry=self.registry)
            except OSError as e:
                raise ShoalError(f"metrics endpoint {listen}: cannot listen: {e.strerror or e}") from e
            self._server, self._thread = server, thread
            bound = server.server_address
            return str(bound[0]), int(bound[1])

    @property
    def address(self) -> tuple[str, int] | None:
        """The bound (host, port) while serving, else None."""
        server = self._server
        return None if server is None else (str(server.server_address[0]), int(server.server_address[1]))

    def close(self) -> None:
        """Stop the HTTP endpoint and release its socket; idempotent.

        Blocks until the serving thread has left its loop (under a second).
        """
        with self._lock:
            server, thread = self._server, self._thread
            self._server = self._thread = None
        if server is None:
            return
        server.shutdown()
        server.server_close()
        if thread is not None:
            thread.join()

    def __enter__(self) -> Exporter:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

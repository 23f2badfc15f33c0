"""The metrics of a running mount follow what happens to its stores.

The daemon listens on a free port ([metrics] listen = "127.0.0.1:0") and
logs the address it bound. Each scrape is parsed with prometheus_client's
own text-format parser and linted with Debian's promtool (skipped without
promtool, failed under CI), the two outside references for the exposition.
"""
from __future__ import annotations

import pytest

import mounting
from test_heal_mount import (  # noqa: F401  (make_pool is a fixture)
    LIVE_METRICS, cmp_all, make_pool, metric, metrics_url, names, promtool_check, run, scrape_until, shoal, write_runs,
)

pytestmark = [pytest.mark.fuse, mounting.requires_fuse, mounting.requires_root]


def test_metric_values_move_as_a_store_is_pulled_written_around_and_put_back(make_pool, tmp_path):
    # Repair at 256 KiB/s: rebuilding what the pulled store missed (about 1 MiB of
    # shards) takes several snapshots (one a second), so the queue is seen above
    # zero before it empties.
    pool = make_pool(4, 6, 5, bound=True, extra={**LIVE_METRICS, "repair": {"rate": "256KiB"}})
    url = metrics_url(pool.proc)
    disk = pool.stores[2]
    store = str(disk.path)
    first = write_runs(tmp_path / "first", 20, seed=21)
    for src in first.values():
        run("cp", src, pool.mountpoint / src.name)
    intact = pool.status()["stripes"]["intact"]

    text, m = scrape_until(url, lambda m: metric(m, "shoal_stripes", health="intact") == intact,
                           "shoal_stripes counts the stripes written")
    promtool_check(text)
    for p in pool.paths:
        assert metric(m, "shoal_store_up", store=str(p)) == 1.0
        assert metric(m, "shoal_store_state", store=str(p), state="online") == 1.0
    assert metric(m, "shoal_stripes", health="degraded") == 0.0
    assert metric(m, "shoal_repair_queue_stripes") == 0.0
    assert metric(m, "shoal_repair_bytes_total") == 0.0
    assert metric(m, "shoal_pool_write_bytes_total") >= sum(p.stat().st_size for p in first.values())

    disk.pull()
    text, m = scrape_until(url, lambda m: metric(m, "shoal_store_up", store=store) == 0.0,
                           "shoal_store_up of the pulled store drops to 0")
    promtool_check(text)
    assert metric(m, "shoal_store_state", store=store, state="offline") == 1.0
    assert metric(m, "shoal_store_state", store=store, state="online") == 0.0
    # Stripes are counted every few seconds; every stripe had a shard on the pulled store.
    text, m = scrape_until(url, lambda m: metric(m, "shoal_stripes", health="degraded") == intact,
                           "shoal_stripes{health=degraded} rises to every stripe")
    assert metric(m, "shoal_stripes", health="intact") == 0.0
    assert metric(m, "shoal_stripes", health="lost") == 0.0
    promtool_check(text)

    late = write_runs(tmp_path / "late", 30, seed=22, prefix="late")
    for src in late.values():
        run("cp", src, pool.mountpoint / src.name)  # w = 5: written around the pulled store
    disk.put_back()
    seen: list[float] = []

    def queued(m) -> bool:
        seen.append(metric(m, "shoal_repair_queue_stripes"))
        return seen[-1] > 0

    scrape_until(url, queued, "shoal_repair_queue_stripes rises once the store is back")
    text, m = scrape_until(
        url, lambda m: metric(m, "shoal_repair_queue_stripes") == 0.0
        and metric(m, "shoal_stripes", health="degraded") == 0.0, "the repair queue empties and no stripe is degraded",
        timeout=60)
    promtool_check(text)
    st = pool.assert_all_intact()
    assert max(seen) > 0
    assert metric(m, "shoal_store_up", store=store) == 1.0
    assert metric(m, "shoal_stripes", health="intact") == st["stripes"]["intact"] > intact
    assert metric(m, "shoal_repair_bytes_total") > 0
    assert metric(m, "shoal_repair_shards_total") == st["repair"]["repaired_shards"] > 0
    assert metric(m, "shoal_repair_last_progress_timestamp_seconds") > 0
    cmp_all({**first, **late}, pool.mountpoint)


def test_scrub_metrics_count_what_a_pass_checked(make_pool, tmp_path):
    pool = make_pool(4, 6, 5, extra=LIVE_METRICS)
    url = metrics_url(pool.proc)
    runs = write_runs(tmp_path / "src", 10, seed=23)
    for src in runs.values():
        run("cp", src, pool.mountpoint / src.name)
    text, m = scrape_until(url, lambda m: "shoal_scrub_running" in names(m), "the scrubber's metrics are exported")
    assert metric(m, "shoal_scrub_checked_shards_total") == 0.0
    shoal("scrub", pool.config, "--wait")
    checked = pool.status()["scrub"]["shards_checked"]
    assert checked == 6 * pool.status()["stripes"]["intact"]
    text, m = scrape_until(url, lambda m: metric(m, "shoal_scrub_checked_shards_total") == checked,
                           "the scrub pass counted in the metrics")
    promtool_check(text)
    assert metric(m, "shoal_scrub_progress_ratio") == 1.0
    assert metric(m, "shoal_scrub_running") == 0.0
    assert metric(m, "shoal_scrub_last_complete_timestamp_seconds") > 0
    assert metric(m, "shoal_scrub_errors_total", kind="corrupt") == 0.0

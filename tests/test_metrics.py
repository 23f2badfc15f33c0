"""gateway.metrics: snapshots in, Prometheus exposition out.

Every exposition is read back with prometheus_client's own text parser
(prometheus_client.parser.text_string_to_metric_families), not with our own
code, and a live HTTP scrape is linted by Debian's promtool
(`promtool check metrics`).
"""
from __future__ import annotations

import logging
import os
import re
import shutil
import socket
import subprocess
import threading
import urllib.error
import urllib.request

import pytest
from prometheus_client.parser import text_string_to_metric_families

import gateway
from gateway import metrics
from gateway.errors import ShoalError
from gateway.metrics import HEALTHS, STORE_STATES, Exporter, parse_listen
from gateway.stats import LATENCY_BUCKETS, Histogram, HistogramSnapshot

Labels = frozenset  # of (name, value) pairs


def hist(observations: list[float]) -> HistogramSnapshot:
    h = Histogram()
    for x in observations:
        h.observe(x)
    return h.snapshot()


def make_snapshot(*, step: int = 0, d2_state: str = "online", stripes: dict | None = None) -> dict:
    """A snapshot shaped as Daemon.snapshot() returns it (docs/architecture.md).

    ``step`` scales the counters so two snapshots differ in every value.
    """
    s = step
    return {
        "pool": {
            "name": "lab", "k": 4, "n": 6, "w": 5, "read_only": False,
            "bytes_written": 1000 * s, "bytes_read": 300 * s, "degraded_reads": s,
            "checksum_failures": 2 * s, "quorum_failures": 0,
            "quorum_wait_seconds": hist([0.002, 0.004] * (s + 1)),
            "stripes": stripes if stripes is not None else {"intact": 100 + s, "degraded": s, "critical": 0, "lost": 0},
        },
        "stores": [
            {"path": "/srv/d1/shoal", "store_id": "a" * 32, "domain": "shelf-a", "state": "online", "up": True,
             "free_bytes": 900 - s, "used_bytes": 100 + s, "total_bytes": 1000,
             "write_latency_seconds": hist([0.0004, 0.005, 0.02] + [0.3] * s),
             "read_latency_seconds": hist([0.001] * (s + 1)), "errors": 0},
            {"path": "/srv/d2/shoal", "store_id": "b" * 32, "domain": "shelf-b", "state": d2_state,
             "up": d2_state in ("online", "full", "retiring"),
             "free_bytes": 500, "used_bytes": 500, "total_bytes": 1000,
             "write_latency_seconds": hist([]), "read_latency_seconds": hist([0.002]), "errors": 3 * s},
        ],
        "repair": {"queue_stripes": 7 * s, "repaired_bytes": 4096 * s, "repaired_shards": s,
                   "rate_bytes_per_second": 1024.0 * s, "last_progress_time": 1_700_000_000.0 + s},
        "scrub": {"shards_checked": 50 * s, "bytes_checked": 51200 * s, "progress_ratio": s / 10,
                  "running": True, "last_complete_time": 1_699_990_000.0 if s else None,
                  "errors": {"corrupt": s, "missing": 0, "orphan": 2}},
        "catalog": {"mirror_age_seconds": 30.5 + s, "generation": 12 + s},
    }


def parse(text: str | bytes) -> dict[str, tuple[str, dict[tuple[str, Labels], float]]]:
    """family name -> (type, {(sample name, labels): value}), via prometheus_client's parser."""
    if isinstance(text, bytes):
        text = text.decode()
    out = {}
    for fam in text_string_to_metric_families(text):
        assert fam.name not in out, f"family {fam.name} appears twice"
        out[fam.name] = (fam.type, {(s.name, Labels(s.labels.items())): s.value for s in fam.samples})
    return out


def value(fams, name: str, **labels: str) -> float:
    """The one sample called ``name`` with exactly ``labels``."""
    key = Labels(labels.items())
    for _type, samples in fams.values():
        if (name, key) in samples:
            return samples[(name, key)]
    raise AssertionError(f"no sample {name}{labels}")


def has_sample(fams, name: str) -> bool:
    return any(n == name for _t, samples in fams.values() for (n, _l) in samples)


D1 = {"store": "/srv/d1/shoal", "domain": "shelf-a"}
D2 = {"store": "/srv/d2/shoal", "domain": "shelf-b"}


@pytest.fixture
def no_errors_logged(caplog):
    caplog.set_level(logging.WARNING, logger="gateway.metrics")
    yield
    assert not caplog.records, [r.getMessage() for r in caplog.records]


def test_before_first_update_only_build_info(no_errors_logged):
    fams = parse(Exporter().render())
    assert set(fams) == {"shoal_build_info"}
    assert fams["shoal_build_info"][0] == "gauge"
    (name, labels), v = next(iter(fams["shoal_build_info"][1].items()))
    assert v == 1.0 and dict(labels)["version"] == gateway.__version__


def test_required_names_types_and_labels(no_errors_logged):
    e = Exporter()
    e.update(make_snapshot(step=1))
    fams = parse(e.render())
    assert fams["shoal_store_up"][0] == "gauge"
    assert value(fams, "shoal_store_up", **D1) == 1.0
    assert fams["shoal_stripes"][0] == "gauge"
    assert {dict(lab)["health"] for (_n, lab) in fams["shoal_stripes"][1]} == set(HEALTHS)
    assert value(fams, "shoal_stripes", health="intact") == 101.0
    assert fams["shoal_repair_queue_stripes"][0] == "gauge"
    assert value(fams, "shoal_repair_queue_stripes") == 7.0
    for hname in ("shoal_store_shard_write_seconds", "shoal_store_shard_read_seconds", "shoal_write_quorum_wait_seconds"):
        assert fams[hname][0] == "histogram"
    assert fams["shoal_scrub_errors"][0] == "counter"
    assert value(fams, "shoal_scrub_errors_total", kind="orphan") == 2.0
    assert value(fams, "shoal_pool_write_quorum") == 5.0
    assert value(fams, "shoal_pool_k") == 4.0 and value(fams, "shoal_pool_n") == 6.0
    assert value(fams, "shoal_pool_info", pool="lab") == 1.0
    assert value(fams, "shoal_store_info", **D2, store_id="b" * 32) == 1.0
    assert value(fams, "shoal_repair_last_progress_timestamp_seconds") == 1_700_000_001.0
    assert value(fams, "shoal_catalog_mirror_age_seconds") == 31.5
    assert value(fams, "shoal_snapshot_age_seconds") >= 0.0
    # Every counter sample ends in _total (Prometheus naming conventions).
    for fname, (ftype, samples) in fams.items():
        assert fname.startswith("shoal_")
        if ftype == "counter":
            assert all(n.endswith("_total") for (n, _l) in samples), fname


def test_store_state_is_one_hot_over_all_states(no_errors_logged):
    e = Exporter()
    for state in STORE_STATES:
        e.update(make_snapshot(d2_state=state))
        fams = parse(e.render())
        got = {st: value(fams, "shoal_store_state", **D2, state=st) for st in STORE_STATES}
        assert got == {st: float(st == state) for st in STORE_STATES}
        assert value(fams, "shoal_store_up", **D2) == float(state in ("online", "full", "retiring"))


def test_histogram_buckets_match_the_observations(no_errors_logged):
    observations = [0.0004, 0.005, 0.02, 0.3, 0.3, 42.0]  # 0.005 sits on a bound: le is inclusive
    snap = make_snapshot()
    snap["stores"][0]["write_latency_seconds"] = hist(observations)
    e = Exporter()
    e.update(snap)
    fams = parse(e.render())
    for bound in LATENCY_BUCKETS:
        expected = sum(1 for x in observations if x <= bound)
        assert value(fams, "shoal_store_shard_write_seconds_bucket", **D1, le=repr(bound)) == expected
    assert value(fams, "shoal_store_shard_write_seconds_bucket", **D1, le="+Inf") == len(observations)
    assert value(fams, "shoal_store_shard_write_seconds_count", **D1) == len(observations)
    assert value(fams, "shoal_store_shard_write_seconds_sum", **D1) == pytest.approx(sum(observations))


def test_values_move_when_the_snapshot_changes(no_errors_logged):
    e = Exporter()
    e.update(make_snapshot(step=1))
    before = parse(e.render())
    e.update(make_snapshot(step=5, d2_state="offline",
                           stripes={"intact": 90, "degraded": 8, "critical": 2, "lost": 1}))
    after = parse(e.render())
    assert value(before, "shoal_store_up", **D2) == 1.0 and value(after, "shoal_store_up", **D2) == 0.0
    assert value(after, "shoal_store_state", **D2, state="offline") == 1.0
    assert value(after, "shoal_stripes", health="lost") == 1.0
    assert value(after, "shoal_stripes", health="critical") == 2.0
    for name in ("shoal_pool_write_bytes_total", "shoal_pool_read_bytes_total", "shoal_repair_bytes_total",
                 "shoal_scrub_checked_shards_total", "shoal_pool_checksum_failures_total"):
        assert value(after, name) > value(before, name), name
    assert value(after, "shoal_store_errors_total", **D2) == 15.0
    assert value(after, "shoal_scrub_errors_total", kind="corrupt") == 5.0
    assert value(after, "shoal_store_shard_write_seconds_count", **D1) == 8.0
    assert value(before, "shoal_store_shard_write_seconds_count", **D1) == 4.0
    assert value(after, "shoal_scrub_progress_ratio") == 0.5


def test_update_does_not_touch_the_snapshot():
    snap = make_snapshot(step=2)
    frozen = repr(snap)
    e = Exporter()
    e.update(snap)
    e.render()
    e.render()
    assert repr(snap) == frozen


def test_missing_sections_and_keys_do_not_crash(no_errors_logged):
    e = Exporter()
    e.update({})
    assert set(parse(e.render())) == {"shoal_build_info", "shoal_snapshot_age_seconds"}

    # A young daemon: no scrub section yet, a store still being probed,
    # counts that leave out zeros, values it does not know yet.
    e.update({
        "pool": {"name": "lab", "k": 2, "n": 3, "stripes": {"intact": 4}},
        "stores": [{"path": "/srv/d1/shoal", "domain": "shelf-a"}, {"domain": "nameless"}, "junk"],
        "repair": {"queue_stripes": 0, "last_progress_time": None, "repaired_bytes": "lots"},
        "catalog": {"mirror_age_seconds": None},
    })
    fams = parse(e.render())
    assert {dict(lab)["health"]: v for (_n, lab), v in fams["shoal_stripes"][1].items()} == {
        "intact": 4.0, "degraded": 0.0, "critical": 0.0, "lost": 0.0}
    assert value(fams, "shoal_pool_k") == 2.0
    assert not has_sample(fams, "shoal_pool_write_quorum")
    assert not any(name.startswith("shoal_scrub_") for name in fams)
    assert "shoal_store_up" not in fams and "shoal_store_state" not in fams
    assert value(fams, "shoal_repair_queue_stripes") == 0.0
    assert not has_sample(fams, "shoal_repair_bytes_total")
    assert not has_sample(fams, "shoal_repair_last_progress_timestamp_seconds")
    assert "shoal_catalog_mirror_age_seconds" not in fams

    # Scrub errors keep the known kinds even before any is counted.
    e.update({"scrub": {"running": False, "errors": {"torn": 1}}})
    fams = parse(e.render())
    kinds = {dict(lab)["kind"]: v for (_n, lab), v in fams["shoal_scrub_errors"][1].items()}
    assert kinds == {"corrupt": 0.0, "missing": 0.0, "orphan": 0.0, "torn": 1.0}


class _Exploding(dict):
    def get(self, *args):
        raise RuntimeError("boom")


@pytest.mark.allow_errors("cannot render _pool_families")
def test_a_failing_section_is_logged_and_the_rest_still_exported(caplog):
    snap = make_snapshot(step=1)
    snap["pool"] = _Exploding(snap["pool"])
    e = Exporter()
    e.update(snap)
    with caplog.at_level(logging.ERROR, logger="gateway.metrics"):
        fams = parse(e.render())
    assert "shoal_stripes" not in fams
    assert value(fams, "shoal_store_up", **D1) == 1.0
    assert any("_pool_families" in r.getMessage() for r in caplog.records)


def test_update_rejects_a_non_mapping():
    with pytest.raises(TypeError):
        Exporter().update([("pool", {})])


def test_scrapes_never_see_half_a_snapshot():
    """Each snapshot's values all derive from one step; a scrape must agree with itself."""
    e = Exporter()
    e.update(make_snapshot(step=0))
    seen: list[tuple[float, float]] = []

    def scrape():
        for _ in range(50):
            fams = parse(e.render())
            seen.append((value(fams, "shoal_pool_write_bytes_total"), value(fams, "shoal_pool_degraded_reads_total")))

    t = threading.Thread(target=scrape)
    t.start()
    step = 0
    while t.is_alive():  # publish new snapshots for as long as the scraper runs
        step += 1
        e.update(make_snapshot(step=step))
    t.join()
    assert [pair for pair in seen if pair[0] != 1000 * pair[1]] == []
    assert len({d for _w, d in seen}) > 1, "the scrapes never overlapped an update"


def test_docstring_table_lists_exactly_what_is_exported():
    e = Exporter()
    e.update(make_snapshot(step=1))
    exported = {}
    for name, (ftype, _s) in parse(e.render()).items():
        exported[name + "_total" if ftype == "counter" else name] = ftype
    documented = dict(re.findall(r"^(shoal_\w+)\s+(gauge|counter|histogram)\b", metrics.__doc__, re.M))
    assert documented == exported
    # And every family has HELP text in the one table the code uses.
    assert {n.removesuffix("_total") for n in documented} == set(metrics.HELP)


@pytest.mark.parametrize("listen, expected", [
    ("127.0.0.1:9851", ("127.0.0.1", 9851)),
    ("[::1]:0", ("::1", 0)),
    (":9851", ("0.0.0.0", 9851)),
    ("localhost:80", ("localhost", 80)),
])
def test_parse_listen(listen, expected):
    assert parse_listen(listen) == expected


@pytest.mark.parametrize("listen", ["127.0.0.1", "::1:9851", "127.0.0.1:http", "127.0.0.1:70000", ""])
def test_parse_listen_rejects(listen):
    with pytest.raises(ValueError):
        parse_listen(listen)


def scrape(host: str, port: int) -> str:
    h = f"[{host}]" if ":" in host else host
    with urllib.request.urlopen(f"http://{h}:{port}/metrics", timeout=10) as resp:
        assert resp.status == 200
        assert resp.headers["Content-Type"].startswith("text/plain")
        return resp.read().decode()


def test_http_scrape_follows_updates(no_errors_logged):
    with Exporter() as e:
        host, port = e.serve("127.0.0.1:0")
        assert host == "127.0.0.1" and port > 0 and e.address == (host, port)
        assert set(parse(scrape(host, port))) == {"shoal_build_info"}
        e.update(make_snapshot(step=1))
        first = parse(scrape(host, port))
        e.update(make_snapshot(step=2, d2_state="stalled"))
        second = parse(scrape(host, port))
        with pytest.raises(RuntimeError):
            e.serve("127.0.0.1:0")
    assert value(first, "shoal_repair_queue_stripes") == 7.0
    assert value(second, "shoal_repair_queue_stripes") == 14.0
    assert value(second, "shoal_store_state", **D2, state="stalled") == 1.0
    assert value(second, "shoal_store_up", **D2) == 0.0
    assert e.address is None
    e.close()  # idempotent
    with pytest.raises(urllib.error.URLError):
        scrape(host, port)


def _ipv6_loopback() -> bool:
    if not socket.has_ipv6:
        return False
    try:
        with socket.socket(socket.AF_INET6, socket.SOCK_STREAM) as s:
            s.bind(("::1", 0))
        return True
    except OSError:
        return False


@pytest.mark.skipif(not _ipv6_loopback(), reason="no IPv6 loopback address (::1) on this host")
def test_http_scrape_over_ipv6():
    with Exporter() as e:
        e.update(make_snapshot(step=3))
        host, port = e.serve("[::1]:0")
        assert host == "::1"
        assert value(parse(scrape(host, port)), "shoal_repair_queue_stripes") == 21.0


def test_serve_on_a_busy_port_raises_shoal_error():
    with socket.socket() as busy:
        busy.bind(("127.0.0.1", 0))
        busy.listen()
        port = busy.getsockname()[1]
        e = Exporter()
        with pytest.raises(ShoalError) as info:
            e.serve(f"127.0.0.1:{port}")
        assert isinstance(info.value.__cause__, OSError)
        assert e.address is None


def promtool() -> str:
    """Path of Debian's promtool; skip without it, but fail under CI so a missing install cannot hide."""
    path = shutil.which("promtool") or ("/usr/bin/promtool" if os.access("/usr/bin/promtool", os.X_OK) else None)
    if path is None:
        if os.environ.get("CI"):
            pytest.fail("promtool is not installed (Debian package 'prometheus'); CI must run this check")
        pytest.skip("promtool is not installed (Debian package 'prometheus')")
    return path


@pytest.mark.parametrize("state", ["online", "stalled"])
def test_promtool_check_metrics_passes_on_a_live_scrape(state):
    tool = promtool()
    with Exporter() as e:
        e.update(make_snapshot(step=4, d2_state=state))
        text = scrape(*e.serve("127.0.0.1:0"))
    # Reference check: Debian's promtool lints the exposition as Prometheus would.
    res = subprocess.run([tool, "check", "metrics"], input=text, capture_output=True, text=True, timeout=60)
    assert res.returncode == 0, f"promtool check metrics failed:\n{res.stdout}{res.stderr}"


def test_promtool_check_metrics_would_catch_a_bad_name():
    """The lint above is not vacuous: the same call rejects a counter without _total."""
    tool = promtool()
    bad = "# HELP shoal_oops_bytes x\n# TYPE shoal_oops_bytes counter\nshoal_oops_bytes 1\n"
    res = subprocess.run([tool, "check", "metrics"], input=bad, capture_output=True, text=True, timeout=60)
    assert res.returncode != 0 and "_total" in res.stdout + res.stderr


"""Healing through real mounts: pulled, returned, replaced, failed, hung and
retired stores, flipped shard bytes, a daemon killed mid-repair, and
commands that must be refused.

Every store is its own tmpfs (or a bind mount of one, so the same disk can
be pulled and put back, or a hangfs FUSE mount that can be made to hang).
The pool is driven only through the mount and the `shoal` CLI, as an
administrator would drive it. Each check names its reference: the source
files on the kernel's own filesystem (cmp, sha256sum), the shard files on
the stores as the kernel lists them, or the kernel's mount table.
"""
from __future__ import annotations

import collections
import errno
import json
import os
import random
import re
import signal
import subprocess
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

import pytest

import mounting
from gateway import config as gconfig
from gateway.cli import control_client
from mounting import BoundStore, MountProcess, drop_kernel_caches, sha256sum, shoal_argv, wait_for

pytestmark = [pytest.mark.fuse, mounting.requires_fuse, mounting.requires_root]

KiB, MiB = 1 << 10, 1 << 20
STRIPE = 64 * KiB
HANGFS = Path(__file__).resolve().with_name("hangfs.py")

# Probes every half second; two good probes in a row bring a store back;
# a store operation is given up after 2 s. Repair and scrub run unthrottled.
PROBE_INTERVAL, PROBE_DEADLINE, STORE_DEADLINE = 0.5, 1.0, 2.0
QUICK = {
    "store_io": {"probe_interval": f"{PROBE_INTERVAL}s", "probe_deadline": f"{PROBE_DEADLINE}s",
                 "good_probes_to_return": 2, "deadline": f"{STORE_DEADLINE}s"},
    "repair": {"rate": 0},
    "scrub": {"rate": 0},
}


def merged(*layers: dict) -> dict:
    """Config sections, later layers overriding earlier ones key by key."""
    out: dict[str, dict] = {}
    for layer in layers:
        for section, keys in layer.items():
            out.setdefault(section, {}).update(keys)
    return out


# -- running things --------------------------------------------------------------------------


def run(*argv: object, ok: tuple[int, ...] = (0,), timeout: float = 120) -> subprocess.CompletedProcess:
    """Run a command; its exit status must be in ok."""
    r = subprocess.run([os.fspath(a) if isinstance(a, os.PathLike) else str(a) for a in argv],
                       capture_output=True, text=True, timeout=timeout, cwd=mounting.REPO)
    assert r.returncode in ok, f"{argv} exited {r.returncode}:\n{r.stdout[-3000:]}\n{r.stderr[-3000:]}"
    return r


def shoal(*args: object, ok: tuple[int, ...] = (0,), timeout: float = 120) -> subprocess.CompletedProcess:
    """The `shoal` CLI of this checkout."""
    return run(*shoal_argv(*map(str, args)), ok=ok, timeout=timeout)


# -- instrument data ---------------------------------------------------------------------------


def write_runs(dir: Path, count: int, seed: int, *, max_stripes: int = 4, prefix: str = "run") -> dict[str, Path]:
    """Spectrometer runs on the kernel's own filesystem (the references), of
    sizes around and across stripe boundaries: name -> path."""
    rng = random.Random(seed)
    dir.mkdir(parents=True, exist_ok=True)
    edges = [0, 1, STRIPE - 1, STRIPE, STRIPE + 1]
    out = {}
    for i in range(count):
        size = edges[i] if i < len(edges) else rng.randrange(1, max_stripes * STRIPE)
        p = dir / f"{prefix}-{i:04d}.spectrum"
        p.write_bytes(rng.randbytes(size))
        out[p.name] = p
    return out


def cmp_all(sources: dict[str, Path], where: Path) -> None:
    """Every source against its copy in where. Reference: cmp(1) on the kernel's own copy."""
    drop_kernel_caches()
    for name, src in sources.items():
        run("cmp", src, where / name)


# -- shard files as the kernel lists them ---------------------------------------------------------


def shard_files(store: Path) -> dict[str, int]:
    """Shard file name (relative to the store) -> inode number."""
    out = {}
    for p in (store / "shards").rglob("*.shd"):
        out[str(p.relative_to(store))] = p.stat().st_ino
    return out


def stripe_of(rel: str) -> tuple[str, int, int]:
    """(file id, stripe index, version) from a shard file name."""
    fid, idx, version, _shard, _ = Path(rel).name.split(".")
    return fid, int(idx), int(version)


# -- a pool under test ------------------------------------------------------------------------------


@dataclass(kw_only=True)
class Pool:
    """One pool made for one test: its config, stores and daemon processes."""

    config: Path
    mountpoint: Path
    stores: list  # Path, or BoundStore
    start: object  # the mount_process fixture
    procs: list[MountProcess] = field(default_factory=list)
    _cfg: gconfig.PoolConfig | None = None

    @property
    def paths(self) -> list[Path]:
        return [s.path if isinstance(s, BoundStore) else s for s in self.stores]

    @property
    def cfg(self) -> gconfig.PoolConfig:
        """The config as loaded when the pool was made (loading resolves the store
        paths, which would wait on a store that hangs)."""
        if self._cfg is None:
            self._cfg = gconfig.load(self.config)
        return self._cfg

    @property
    def proc(self) -> MountProcess:
        return self.procs[-1]

    def mount(self) -> MountProcess:
        mp = self.start(shoal_argv("mount", self.config, self.mountpoint), self.mountpoint, timeout=30)
        self.procs.append(mp)
        return mp

    def status(self) -> dict:
        """`shoal status CONFIG --json` (exit 3 means some stripes are lost)."""
        return json.loads(shoal("status", self.config, "--json", ok=(0, 3)).stdout)

    def live_status(self) -> dict:
        """The running daemon's status op, which `shoal status --json` prints, asked
        over the control socket with the config loaded beforehand (see
        test_shoal_commands_answer_while_a_store_hangs for why)."""
        return control_client.request(self.cfg, "status", timeout=10)

    def state_of(self, status: dict, path: Path) -> str:
        return {s["path"]: s["state"] for s in status["stores"]}[str(path)]

    def wait_state(self, path: Path, pred, what: str, timeout: float = 20.0, live: bool = False) -> dict:
        """Poll `shoal status --json` (or live_status()) until pred(state of the store at path); that status."""
        def check():
            st = self.live_status() if live else self.status()
            return st if pred(self.state_of(st, path)) else None
        return wait_for(check, what, timeout=timeout, step=0.2)

    def repair_wait(self) -> str:
        """`shoal repair CONFIG --wait`; its summary line."""
        return shoal("repair", self.config, "--wait").stdout

    def assert_all_intact(self) -> dict:
        st = self.status()
        h = st["stripes"]
        assert h["intact"] > 0 and h["degraded"] == h["critical"] == h["lost"] == 0, h
        assert st["repair"]["queued_stripes"] == 0, st["repair"]
        return st


@pytest.fixture
def make_pool(tmp_path, store_dirs, bound_stores, pool_config, mount_process):
    """make(k, n, w, *, count=n, domains=None, bound=False, stores=None, extra=None, mount=True) -> Pool."""

    def make(k: int, n: int, w: int, *, count: int | None = None, domains: list[str] | None = None,
             bound: bool = False, stores: list | None = None, extra: dict | None = None, mount: bool = True,
             store_size: str = "64m") -> Pool:
        if stores is None:
            count = count or n
            stores = bound_stores(count, store_size) if bound else store_dirs(count, store_size)
        paths = [s.path if isinstance(s, BoundStore) else s for s in stores]
        cfg = pool_config(k, n, w, stripe_size=STRIPE, stores=paths, domains=domains,
                          extra=merged(QUICK, extra or {}))
        shoal("init", cfg)
        pool = Pool(config=cfg, mountpoint=tmp_path / "mnt", stores=stores, start=mount_process)
        pool.cfg  # loaded now, while every store answers
        if mount:
            pool.mount()
        return pool

    return make


class CopyLoop(threading.Thread):
    """Copies source files into the mount one after another, timing each
    close(): close() returning without error is the pool's acknowledgement."""

    def __init__(self, sources: dict[str, Path], dest: Path):
        super().__init__(daemon=True)
        self.sources, self.dest = sources, dest
        self.closed: list[str] = []
        self.close_seconds: list[float] = []
        self.errors: list[tuple[str, OSError]] = []

    def run(self) -> None:
        for name, src in self.sources.items():
            data = src.read_bytes()
            try:
                with open(self.dest / name, "wb") as f:
                    f.write(data)
                    t0 = time.monotonic()
                self.close_seconds.append(time.monotonic() - t0)  # the with block's close()
            except OSError as e:
                self.errors.append((name, e))
                continue
            self.closed.append(name)

    def finish(self, timeout: float = 120.0) -> None:
        self.join(timeout)
        assert not self.is_alive(), "the copy loop did not finish"
        assert not self.errors, f"copies failed: {self.errors[:5]}"
        assert self.closed == list(self.sources), "not every file was acknowledged"


# -- a pulled store, and the same disk put back ------------------------------------------------------


def test_store_pulled_mid_copy_goes_offline_and_the_copy_completes_then_gets_back_only_what_it_missed(
        make_pool, tmp_path):
    pool = make_pool(4, 6, 5, bound=True)
    disk = pool.stores[2]
    before_copy = write_runs(tmp_path / "src", 100, seed=1)
    loop = CopyLoop(before_copy, pool.mountpoint)
    loop.start()
    wait_for(lambda: len(loop.closed) >= 15, "15 files acknowledged", step=0.01)
    disk.pull(lazy=True)  # the store's directory is busy with shard writes: detach it lazily
    pulled_at = time.monotonic()
    acknowledged_before_pull = len(loop.closed)
    st = pool.wait_state(disk.path, lambda s: s != "online", "the pulled store leaves online")
    assert pool.state_of(st, disk.path) == "offline"
    noticed = time.monotonic() - pulled_at
    loop.finish()  # w = 5 of n = 6: every copy is acknowledged without the pulled store
    assert acknowledged_before_pull < len(before_copy), "the copy was over before the pull"
    # Writes carry on with the store away.
    after_pull = write_runs(tmp_path / "src2", 20, seed=2, prefix="late")
    late = CopyLoop(after_pull, pool.mountpoint)
    late.start()
    late.finish()
    cmp_all({**before_copy, **after_pull}, pool.mountpoint)
    st = pool.status()
    assert st["stripes"]["lost"] == st["stripes"]["critical"] == 0 and st["stripes"]["degraded"] > 0
    # Nothing landed in the bare directory the pull left behind (reference: the kernel's listing).
    assert not mounting.is_mounted(disk.path) and os.listdir(disk.path) == []

    held = shard_files(disk.backing)  # what the disk holds while away
    held_bytes = {rel: (disk.backing / rel).read_bytes() for rel in held}
    repaired_before = st["repair"]["repaired_shards"]
    disk.put_back()
    pool.wait_state(disk.path, lambda s: s == "online", "the store is back online")
    pool.repair_wait()
    st = pool.assert_all_intact()
    stripes = st["stripes"]["intact"]
    now = shard_files(disk.path)
    # With n equal to the number of stores, every intact stripe has one shard on every store.
    assert len(now) == stripes
    for other in pool.paths:
        assert len(shard_files(other)) == stripes, other
    # The shards it kept are still there, unchanged, and were not written again (same inodes);
    # only the missed ones were added. A put that was finishing at the moment of the pull may
    # have landed without the pool hearing of it (its directory fsync met the bare directory):
    # such a shard counts as missed and is written again, the same bytes under the same name.
    # At most store_io concurrency (4) puts can be in flight on one store.
    assert all(rel in now and (disk.path / rel).read_bytes() == blob for rel, blob in held_bytes.items())
    again = [rel for rel, ino in held.items() if now[rel] != ino]
    assert len(again) <= 4, again
    added = len(now) - len(held)
    assert added > 0
    assert st["repair"]["repaired_shards"] - repaired_before == added + len(again)  # and none anywhere else
    cmp_all({**before_copy, **after_pull}, pool.mountpoint)
    print(f"pulled store noticed offline within {noticed:.2f} s; {added} missed shards rebuilt onto it, "
          f"{len(again)} written again")


# -- metrics of the running daemon ---------------------------------------------------------------

LIVE_METRICS = {"metrics": {"listen": "127.0.0.1:0"}}  # any free port; the daemon logs the one it bound
_METRICS_AT = re.compile(r"metrics at (http://[^\s]+/metrics)")


def metrics_url(mp: MountProcess) -> str:
    """The endpoint the daemon bound, from its log line 'metrics at http://HOST:PORT/metrics'."""
    def find():
        m = _METRICS_AT.search(mp.log_text())
        return m.group(1) if m else None
    return wait_for(find, "the daemon logs its metrics address", timeout=10)


def scrape(url: str) -> str:
    import urllib.request

    with urllib.request.urlopen(url, timeout=10) as resp:
        assert resp.status == 200
        return resp.read().decode()


Samples = dict[tuple[str, frozenset], float]


def parse_metrics(text: str) -> Samples:
    """(sample name, labels) -> value. Reference: prometheus_client's own text-format parser."""
    from prometheus_client.parser import text_string_to_metric_families

    out: Samples = {}
    for family in text_string_to_metric_families(text):
        for s in family.samples:
            out[(s.name, frozenset(s.labels.items()))] = s.value
    return out


def metric(samples: Samples, name: str, **labels: str) -> float:
    """The one sample of name whose labels include these; fails if there is none."""
    hits = [v for (n, ls), v in samples.items() if n == name and set(labels.items()) <= ls]
    assert len(hits) == 1, f"{name}{labels}: {len(hits)} samples"
    return hits[0]


def scrape_until(url: str, pred, what: str, timeout: float = 20.0) -> tuple[str, Samples]:
    """Scrape until pred(samples) holds (the daemon publishes a new snapshot
    about once a second); the text and its samples."""
    def once():
        text = scrape(url)
        samples = parse_metrics(text)
        return (text, samples) if pred(samples) else None
    return wait_for(once, what, timeout=timeout, step=0.2)


def promtool_check(text: str) -> None:
    """Reference: Debian's promtool lints the exposition as Prometheus would. Skips
    without promtool, but fails under CI (tests/test_metrics.py's promtool())."""
    from test_metrics import promtool

    r = subprocess.run([promtool(), "check", "metrics"], input=text, capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, f"promtool check metrics failed:\n{r.stdout}{r.stderr}"


def names(samples: Samples) -> set[str]:
    return {n for n, _ in samples}


# -- an empty disk in place of a pulled one: the by-hand check ---------------------------------------


def test_by_hand_check_six_stores_one_wiped_replaced_repaired_intact_bit_exact_and_metrics_lint(
        make_pool, tmp_path):
    """Follows the issue's check literally: on a six-store pool, pull one
    store's tmpfs, mount an empty one in its place, `shoal store replace`,
    `shoal repair --wait`, then `shoal status --json` counts every stripe
    intact and every file is bit-exact; meanwhile /metrics passes promtool
    and shows shoal_store_up, shoal_stripes and shoal_repair_queue_stripes."""
    pool = make_pool(4, 6, 5, extra=LIVE_METRICS)
    url = metrics_url(pool.proc)
    sources = write_runs(tmp_path / "src", 40, seed=3)
    for src in sources.values():
        run("cp", src, pool.mountpoint / src.name)
    stripes = pool.status()["stripes"]["intact"]
    assert stripes > 0

    wiped = pool.paths[4]
    on_it = len(shard_files(wiped))
    mounting.umount(wiped, lazy=True)  # the disk is pulled
    pool.wait_state(wiped, lambda s: s == "offline", "the pulled store is offline")
    mounting.mount_tmpfs(wiped, "64m")  # an empty disk goes in its place
    assert shard_files(wiped) == {} and os.listdir(wiped) == []
    during, live = scrape_until(url, lambda m: metric(m, "shoal_store_up", store=str(wiped)) == 0.0,
                                "shoal_store_up of the pulled store drops to 0")
    promtool_check(during)
    assert {"shoal_store_up", "shoal_stripes", "shoal_repair_queue_stripes"} <= names(live)

    out = shoal("store", "replace", pool.config, wiped).stdout
    assert f"{on_it} shards to rebuild onto it" in out, out
    assert "the queue is empty" in pool.repair_wait()
    st = pool.assert_all_intact()
    assert st["stripes"]["intact"] == stripes  # every stripe, counted by `shoal status --json`
    assert pool.state_of(st, wiped) == "online"
    assert len(shard_files(wiped)) == on_it  # everything the wiped store held, back on its replacement
    cmp_all(sources, pool.mountpoint)

    after, live = scrape_until(url, lambda m: metric(m, "shoal_repair_shards_total") == on_it,
                               "the rebuilt shards counted in the metrics")
    promtool_check(after)
    assert metric(live, "shoal_store_up", store=str(wiped)) == 1.0
    assert metric(live, "shoal_repair_queue_stripes") == 0.0
    assert pool.proc.stop() == 0


# -- a failed store with more stores than n --------------------------------------------------------


def test_failed_store_is_rebuilt_on_the_others_spread_over_domains(make_pool, tmp_path):
    domains = [f"shelf-{i // 2}" for i in range(8)]  # 8 stores in 4 domains: at most 2 shards per domain
    pool = make_pool(4, 6, 5, count=8, domains=domains)
    cap = gconfig.spread_cap(6, 4)
    assert cap == 2
    domain_of = dict(zip(map(str, pool.paths), domains))
    sources = write_runs(tmp_path / "src", 30, seed=4)
    for src in sources.values():
        run("cp", src, pool.mountpoint / src.name)
    failed = pool.paths[1]
    kept = shard_files(failed)
    assert kept
    out = shoal("store", "fail", pool.config, failed).stdout
    assert "failed" in out and "declared failed" in pool.proc.log_text()  # the daemon did it
    assert "the queue is empty" in pool.repair_wait()
    st = pool.assert_all_intact()
    assert pool.state_of(st, failed) == "failed"
    assert shard_files(failed) == kept  # a failed store is neither read, written nor cleaned

    # Reference: the shard files as the kernel lists them on the stores that serve.
    where: dict[tuple, list[str]] = collections.defaultdict(list)
    for p in pool.paths:
        if p != failed:
            for rel in shard_files(p):
                where[stripe_of(rel)].append(str(p))
    assert len(where) == st["stripes"]["intact"]
    for stripe, stores in where.items():
        assert len(stores) == len(set(stores)) == 6, stripe
        per_domain = collections.Counter(domain_of[s] for s in stores)
        assert max(per_domain.values()) <= cap, (stripe, per_domain)
    cmp_all(sources, pool.mountpoint)


# -- flipped bytes: scrub finds them, repair fixes them, reads never lie ----------------------------


class Reader(threading.Thread):
    """Reads every file through the mount with sha256sum, round after round,
    until stopped; counts rounds and records any read that does not match."""

    def __init__(self, files: dict[Path, str]):
        super().__init__(daemon=True)
        self.files = files  # path in the mount -> expected sha256
        self.stop = threading.Event()
        self.rounds = 0
        self.wrong: list[str] = []

    def run(self) -> None:
        while not self.stop.is_set():
            for path, digest in self.files.items():
                r = subprocess.run(["sha256sum", "-b", str(path)], capture_output=True, text=True)
                if r.returncode != 0 or r.stdout.split()[0] != digest:
                    self.wrong.append(f"{path.name}: {r.stdout.strip() or r.stderr.strip()}")
            self.rounds += 1

    def finish(self) -> None:
        self.stop.set()
        self.join(60)
        assert not self.is_alive()
        assert not self.wrong, f"reads returned wrong bytes or failed: {self.wrong[:5]}"
        assert self.rounds > 0


def test_flipped_bytes_in_one_percent_of_shards_are_all_found_by_scrub_and_fixed_by_repair(make_pool, tmp_path):
    # A small memory cap keeps the decoded-stripe cache to a few stripes, so reads reach the stores;
    # a slow repair leaves time to read while it works.
    pool = make_pool(4, 6, 5, extra={"pool": {"memory_cap": "1MiB"}, "repair": {"rate": "32KiB"}})
    sources = write_runs(tmp_path / "src", 60, seed=5)
    for src in sources.values():
        run("cp", src, pool.mountpoint / src.name)
    pool.assert_all_intact()  # every shard written and recorded before any is touched
    digests = {pool.mountpoint / name: sha256sum(src) for name, src in sources.items()}  # reference: sha256sum

    everything = [p / rel for p in pool.paths for rel in shard_files(p)]
    rng = random.Random(6)
    rng.shuffle(everything)
    want = max(5, len(everything) // 100)
    victims: dict[Path, bytes] = {}
    hit: set[tuple] = set()
    for p in everything:  # at most one flipped shard per stripe: each stays readable
        stripe = stripe_of(p.name)
        if stripe in hit:
            continue
        hit.add(stripe)
        victims[p] = p.read_bytes()
        if len(victims) == want:
            break
    kinds = {"data" if int(p.name.split(".")[3]) < 4 else "parity" for p in victims}
    assert kinds == {"data", "parity"}  # repair rebuilds both kinds, each checked byte for byte below
    for p, blob in victims.items():
        at = rng.randrange(len(blob))
        with open(p, "r+b") as f:
            f.seek(at)
            f.write(bytes([blob[at] ^ (1 << rng.randrange(8))]))
        assert p.read_bytes() != blob

    shoal("scrub", pool.config, "--wait")
    found = pool.status()["scrub"]["last_pass"]["errors"]
    assert found["corrupt"] == len(victims), found  # every flipped shard, and nothing else
    assert found["missing"] == found["header_mismatch"] == 0, found

    reader = Reader(digests)
    reader.start()
    try:
        assert "the queue is empty" in pool.repair_wait()
    finally:
        reader.finish()
    pool.assert_all_intact()
    for p, blob in victims.items():
        # The code is deterministic: the regenerated shard is the very file that was there before the flip.
        assert p.read_bytes() == blob, p
    assert "no problems" in shoal("scrub", pool.config, "--wait").stdout
    for path, digest in digests.items():
        assert sha256sum(path) == digest, path.name  # reference: sha256sum of the source
    cmp_all(sources, pool.mountpoint)
    print(f"{len(victims)} of {len(everything)} shard files flipped; {reader.rounds} read rounds during repair")


# -- a store that hangs ---------------------------------------------------------------------------


def p99(values: list[float]) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(0.99 * len(ordered)))]


@pytest.mark.slow
def test_hung_store_is_marked_stalled_and_writes_carry_on_with_bounded_close_latency(
        make_pool, store_dirs, mount_process, tmp_path):
    (backing,) = store_dirs(1)
    hang_file = tmp_path / "hang-now"  # outside the mount: while it exists, every request to hangfs waits
    hung_path = tmp_path / "stores" / "hung"
    hangfs = mount_process([sys.executable, HANGFS, backing, hung_path, "--hang-file", hang_file], hung_path)
    pool = make_pool(4, 6, 5, stores=[*store_dirs(5), hung_path])
    sources = write_runs(tmp_path / "src", 160, seed=7, max_stripes=2)
    loop = CopyLoop(sources, pool.mountpoint)
    loop.start()
    wait_for(lambda: len(loop.closed) >= 20, "20 files acknowledged", step=0.01)
    hang_file.touch()
    hung_at, hung_index = time.time(), len(loop.close_seconds)
    try:
        st = pool.wait_state(hung_path, lambda s: s == "stalled", "the hung store is marked stalled", live=True)
        sid = next(s["store_id"] for s in st["stores"] if s["path"] == str(hung_path))
        since = control_client.request(pool.cfg, "health")["stores"][sid]["since"]
        # Bound: a probe gives up after probe_deadline (1 s) and probes start every probe_interval
        # (0.5 s), so the change is expected within 1.5 s; the store deadline plus the probe
        # interval (2.5 s) is the promise.
        assert since - hung_at <= STORE_DEADLINE + PROBE_INTERVAL, f"stalled {since - hung_at:.2f} s after the hang"
        loop.finish()  # w = 5 of n = 6: every copy is acknowledged with the store hung
        while_hung = loop.close_seconds[hung_index:]
        assert len(while_hung) >= 20, "too few copies while the store hung to judge their latency"
        # Bound: a close needs w = 5 durable shards, which the five healthy stores give; a close
        # that waited for the hung store would wait at least until the store deadline (2 s) let its
        # shard go. So p99 below the store deadline says no close waited for the hung store.
        assert p99(while_hung) < STORE_DEADLINE, f"p99 close latency {p99(while_hung):.3f} s while a store hung"

        # Regression: a store command naming the hung store resolved its path on the daemon's
        # event loop, which froze the whole mount until the store answered. Now the daemon answers
        # (here: retiring it is refused, it would leave 5 stores for n = 6) and keeps serving.
        reply: dict = {}

        def retire() -> None:
            try:
                control_client.request(pool.cfg, "store_retire", path=str(hung_path), timeout=30)
            except Exception as e:  # noqa: BLE001 - the refusal is what we wait for
                reply["error"] = str(e)

        asking = threading.Thread(target=retire, daemon=True)
        asking.start()
        time.sleep(0.2)  # the request is in the daemon
        probe = tmp_path / "src" / "run-0010.spectrum"
        run("cmp", probe, pool.mountpoint / probe.name, timeout=20)  # the mount serves meanwhile
        asking.join(30)
        assert not asking.is_alive() and "would leave 5 active stores" in reply.get("error", ""), reply
        assert mounting.is_mounted(hung_path) and hangfs.alive
    finally:
        hang_file.unlink()  # the mount answers again
    loop.finish()
    pool.wait_state(hung_path, lambda s: s == "online", "the store is back online")
    assert "the queue is empty" in pool.repair_wait()
    pool.assert_all_intact()
    cmp_all(sources, pool.mountpoint)
    assert pool.proc.stop() == 0 and "unmounted cleanly" in pool.proc.log_text()
    assert hangfs.stop() == 0
    print(f"stalled {since - hung_at:.2f} s after the hang; close latency while hung: "
          f"p99 {p99(while_hung) * 1000:.1f} ms, max {max(while_hung) * 1000:.1f} ms over {len(while_hung)} closes")


def test_shoal_commands_answer_while_a_store_hangs(make_pool, store_dirs, mount_process, tmp_path):
    (backing,) = store_dirs(1)
    hang_file = tmp_path / "hang-now"
    hung_path = tmp_path / "stores" / "hung"
    mount_process([sys.executable, HANGFS, backing, hung_path, "--hang-file", hang_file], hung_path)
    pool = make_pool(4, 6, 5, stores=[*store_dirs(5), hung_path])
    hang_file.touch()
    try:
        pool.wait_state(hung_path, lambda s: s == "stalled", "the daemon marks the hung store stalled", live=True)
        # With a daemon running, `shoal status` only asks it over the control socket: nothing in
        # it needs the hung store. (Offline, a command that looks at the stores cannot even exit
        # while one of its threads waits on the hung mount: the kernel keeps the process.)
        proc = subprocess.Popen(shoal_argv("status", pool.config, "--json"), stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE, text=True, cwd=mounting.REPO)
        try:
            proc.wait(5)  # it answers in well under a second once config.load does not wait
            answered = True
        except subprocess.TimeoutExpired:
            answered = False
    finally:
        hang_file.unlink()  # whatever happened, the mount answers again and the command can end
    out, err = proc.communicate(timeout=60)
    assert answered, "shoal status did not answer while a store hung"
    assert pool.state_of(json.loads(out), hung_path) == "stalled", err


# -- retiring a store -------------------------------------------------------------------------------


def test_retired_store_drains_through_the_daemon_and_nothing_is_lost(make_pool, tmp_path):
    pool = make_pool(4, 6, 5, count=7)  # one store more than n: the other six can hold every stripe
    sources = write_runs(tmp_path / "src", 30, seed=8)
    for src in sources.values():
        run("cp", src, pool.mountpoint / src.name)
    leaving = pool.paths[3]
    assert shard_files(leaving)
    out = shoal("store", "retire", pool.config, leaving).stdout
    assert "is retiring" in out, out
    assert "retiring" in pool.proc.log_text()  # the daemon did it, not this process
    # Regression: `retire --wait` asked the daemon twice, and when the first request found the
    # drain done (it had finished meanwhile) the second was refused as 'already retired', exit 1.
    out = shoal("store", "retire", pool.config, leaving, "--wait").stdout
    assert "drained and retired" in out, out
    st = pool.assert_all_intact()
    assert pool.state_of(st, leaving) == "retiring"  # still read until it leaves the config; never written
    # The moved shards' old copies are garbage and are deleted (reference: the kernel's listing).
    wait_for(lambda: shard_files(leaving) == {}, "no shard file left on the retired store")
    for p in pool.paths:
        if p != leaving:
            assert shard_files(p), p
    total = sum(len(shard_files(p)) for p in pool.paths)
    assert total == 6 * st["stripes"]["intact"]  # n shards per stripe, all on the six that stay
    cmp_all(sources, pool.mountpoint)
    # Writes go on without it.
    more = write_runs(tmp_path / "more", 5, seed=9, prefix="after-retire")
    for src in more.values():
        run("cp", src, pool.mountpoint / src.name)
    assert shard_files(leaving) == {}
    cmp_all(more, pool.mountpoint)


# -- a daemon killed mid-repair ---------------------------------------------------------------------


@pytest.mark.slow
def test_daemon_killed_mid_repair_finishes_the_repair_after_a_restart(make_pool, tmp_path):
    # 1 MiB/s of regenerated shards: the rebuild of one store takes a few seconds, time to kill it.
    pool = make_pool(4, 6, 5, extra={"repair": {"rate": "1MiB"}})
    sources = write_runs(tmp_path / "src", 60, seed=10)
    for src in sources.values():
        run("cp", src, pool.mountpoint / src.name)
    stripes = pool.status()["stripes"]["intact"]
    wiped = pool.paths[0]
    on_it = len(shard_files(wiped))
    mounting.umount(wiped, lazy=True)
    mounting.mount_tmpfs(wiped, "64m")
    shoal("store", "replace", pool.config, wiped)
    wait_for(lambda: 0 < len(shard_files(wiped)) < on_it // 2, "the rebuild under way", step=0.02)
    assert pool.proc.kill() == -signal.SIGKILL
    part = len(shard_files(wiped))
    assert mounting.access_errno(pool.mountpoint) == errno.ENOTCONN  # the dead mount
    # With no daemon (a stale control socket is left behind) the commands work offline.
    assert pool.cfg.control_socket.exists()
    st = pool.status()
    assert st["pool"]["mounted"] is False and st["repair"]["queued_stripes"] > 0
    assert mounting.clear_stale_mount(pool.mountpoint)
    pool.mount()
    assert "the queue is empty" in pool.repair_wait()
    st = pool.assert_all_intact()
    assert st["stripes"]["intact"] == stripes
    assert len(shard_files(wiped)) == on_it
    cmp_all(sources, pool.mountpoint)
    print(f"killed with {part} of {on_it} shards rebuilt; the restarted daemon finished the rest")


# -- bad input through the CLI ------------------------------------------------------------------------


def refused(*args: object) -> str:
    """A shoal command that must be refused: exit 1 and a message, not a traceback. Its stderr."""
    r = shoal(*args, ok=(1,))
    assert r.stderr.startswith("shoal: ") and "Traceback" not in r.stderr, r.stderr
    return r.stderr


def test_cli_refuses_bad_store_commands_and_works_offline_without_a_daemon(
        make_pool, pool_config, store_dirs, tmp_path):
    pool = make_pool(4, 6, 5)
    sources = write_runs(tmp_path / "src", 12, seed=11)
    for src in sources.values():
        run("cp", src, pool.mountpoint / src.name)
    target = pool.paths[5]
    before = {s["path"]: s["store_id"] for s in pool.status()["stores"]}

    # A store that is still there with its label: nothing to replace.
    assert "nothing to replace" in refused("store", "replace", pool.config, pool.paths[2])
    # Adding a store the pool has already.
    assert "is already store" in refused("store", "add", pool.config, pool.paths[1])
    # Retiring one of six stores when n = 6: the other five cannot hold a stripe.
    assert "would leave 5 active stores" in refused("store", "retire", pool.config, pool.paths[3])

    mounting.umount(target, lazy=True)  # the disk is pulled ...
    pool.wait_state(target, lambda s: s == "offline", "the pulled store is offline")
    mounting.mount_tmpfs(target, "64m")  # ... and a disk that is not empty goes in
    (target / "notes.txt").write_text("microscope calibration, do not erase")
    assert "is not empty" in refused("store", "replace", pool.config, target)
    assert (target / "notes.txt").read_text() == "microscope calibration, do not erase"  # untouched
    mounting.umount(target)

    # Another pool's disk mounted there by mistake.
    other = pool_config(2, 3, stores=store_dirs(3), name="other-lab")
    shoal("init", other)
    mounting.bind_store(gconfig.load(other).stores[0].path, target)
    assert "labelled for another pool" in refused("store", "replace", pool.config, target)
    assert json.loads((target / "shoal-store.json").read_text())["pool_name"] == "other-lab"  # untouched
    mounting.umount(target)
    # A directory that is not a store of this pool at all.
    with mounting.tmpfs(tmp_path / "stray", "1m") as stray:
        assert "is not a store of pool" in refused("store", "replace", pool.config, stray)
        assert "is not a store of pool" in refused("store", "retire", pool.config, stray)
    assert {s["path"]: s["store_id"] for s in pool.status()["stores"]} == before  # nothing changed

    # No daemon: the commands do the work themselves.
    assert pool.proc.stop() == 0
    assert not pool.cfg.control_socket.exists()
    mounting.mount_tmpfs(target, "64m")  # the right disk: empty
    out = shoal("store", "replace", pool.config, target).stdout
    assert "shards to rebuild onto it" in out and "shoal repair --wait" in out, out
    assert "is already store" in refused("store", "add", pool.config, target)
    assert "the queue is empty" in pool.repair_wait()
    st = pool.assert_all_intact()
    assert st["pool"]["mounted"] is False and pool.state_of(st, target) == "online"
    assert "no problems" in shoal("scrub", pool.config).stdout
    pool.mount()
    cmp_all(sources, pool.mountpoint)

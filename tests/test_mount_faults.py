"""Faults seen through a real mount: pulled stores, a corrupt shard, a killed
daemon, refused mount points, clean exits; plus the fs edge's catch-all.

Stores are tmpfs mounts (one per store), so pulling a store is a real
unmount. Every check names its reference in a comment: the bytes written
(kept on the kernel's own filesystem or in memory), an ordinary tool
(cmp, sha256sum), or the kernel's mount table.
"""
from __future__ import annotations

import errno
import hashlib
import os
import random
import signal
import stat
import subprocess
import sys
import threading
from pathlib import Path

import pyfuse3
import pytest

from gateway import errors as E
from gateway.fs import ShoalFS
from mounting import (
    access_errno, clear_stale_mount, drop_kernel_caches, is_mounted, mount_tmpfs, requires_fuse, requires_root, sha256sum,
    shoal_argv, umount, wait_for,
)
from test_mount import (  # noqa: F401  (make_pool is a fixture)
    MiB, STRIPE, instrument_bytes, make_pool, run, shard_files,
)



def mount_test(fn):
    """Marks for a test that mounts: real FUSE and tmpfs, so root and /dev/fuse."""
    for mark in (pytest.mark.fuse, requires_fuse, requires_root):
        fn = mark(fn)
    return fn


# Health probes often and trusts one good probe, so a store that is put back serves again quickly.
QUICK_HEALTH = {"store_io": {"probe_interval": 0.5, "good_probes_to_return": 1}}
# Health never probes again after the first look: the pool keeps writing to a pulled store and meets the failure.
NO_HEALTH_PROBES = {"store_io": {"probe_interval": 3600.0}}


def write_sources(dir: Path, names_sizes: dict[str, int], seed: int) -> dict[str, Path]:
    """Instrument runs on the kernel's own filesystem: the references for what the pool must give back."""
    rng = random.Random(seed)
    dir.mkdir(parents=True, exist_ok=True)
    out = {}
    for name, size in names_sizes.items():
        p = dir / name
        p.write_bytes(instrument_bytes(rng, size))
        out[name] = p
    return out


def pull(store: Path) -> None:
    """Pull a store's disk: unmount its tmpfs, lazily, since the daemon may be using it this instant."""
    umount(store, lazy=True)


def read_errno(path: Path) -> int:
    """0 if the whole file reads, else the errno of the failure."""
    try:
        with open(path, "rb") as f:
            while f.read(1 << 20):
                pass
    except OSError as e:
        return e.errno
    return 0


def states(status: dict) -> list[str]:
    return [s["state"] for s in status["stores"]]


def status_when(pool, pred, what: str) -> dict:
    """Poll `shoal status --json` until pred(status) holds; that status."""
    def check():
        st = pool.status()
        return st if pred(st) else None
    return wait_for(check, what)


# -- the fs edge: unexpected exceptions ----------------------------------------------------


class BrokenPool:
    """Stands in for a Pool whose every call hits a bug: an exception that is not a ShoalError."""

    def __init__(self, exc: BaseException | None = None):
        self.exc = exc or RuntimeError("a bug below the fs edge")

    def statfs(self):
        raise self.exc

    def __getattr__(self, name):
        async def call(*args, **kwargs):
            raise self.exc
        return call


def handler_calls(fs: ShoalFS) -> dict[str, object]:
    ctx = pyfuse3.RequestContext()
    fs._dirs[7] = pyfuse3.ROOT_INODE
    return {
        "lookup": lambda: fs.lookup(1, b"run.raw", ctx),
        "getattr": lambda: fs.getattr(1, ctx),
        "setattr": lambda: fs.setattr(1, pyfuse3.EntryAttributes(), pyfuse3.SetattrFields(), None, ctx),
        "mknod": lambda: fs.mknod(1, b"fifo", stat.S_IFIFO | 0o644, 0, ctx),
        "mkdir": lambda: fs.mkdir(1, b"d", 0o755, ctx),
        "symlink": lambda: fs.symlink(1, b"l", b"target", ctx),
        "readlink": lambda: fs.readlink(2, ctx),
        "link": lambda: fs.link(2, 1, b"h", ctx),
        "unlink": lambda: fs.unlink(1, b"run.raw", ctx),
        "rmdir": lambda: fs.rmdir(1, b"d", ctx),
        "rename": lambda: fs.rename(1, b"a", 1, b"b", 0, ctx),
        "opendir": lambda: fs.opendir(1, ctx),
        "readdir": lambda: fs.readdir(7, 0, pyfuse3.ReaddirToken()),
        "fsyncdir": lambda: fs.fsyncdir(7, False),
        "statfs": lambda: fs.statfs(ctx),
        "getxattr": lambda: fs.getxattr(1, b"user.instrument", ctx),
        "setxattr": lambda: fs.setxattr(1, b"user.instrument", b"v", ctx),
        "listxattr": lambda: fs.listxattr(1, ctx),
        "removexattr": lambda: fs.removexattr(1, b"user.instrument", ctx),
        "open": lambda: fs.open(2, os.O_RDONLY, ctx),
        "create": lambda: fs.create(1, b"new.raw", 0o644, os.O_WRONLY | os.O_CREAT, ctx),
        "read": lambda: fs.read(1, 0, 4096),
        "write": lambda: fs.write(1, 0, b"spectrum"),
        "flush": lambda: fs.flush(1),
        "fsync": lambda: fs.fsync(1, False),
        "release": lambda: fs.release(1),
        "access": lambda: fs.access(1, os.R_OK, ctx),
    }


HANDLERS = sorted(handler_calls(ShoalFS(BrokenPool())))


@pytest.mark.allow_errors(r"unexpected error in")
@pytest.mark.parametrize("name", HANDLERS)
async def test_unexpected_exception_in_a_handler_is_logged_and_answered_eio(name, caplog):
    fs = ShoalFS(BrokenPool())
    with pytest.raises(pyfuse3.FUSEError) as info:
        await handler_calls(fs)[name]()
    assert info.value.errno == errno.EIO  # reference: the errno a FUSE reply carries to the caller
    logged = [r for r in caplog.records if r.levelname == "ERROR" and f"unexpected error in {name}" in r.getMessage()]
    assert logged and logged[0].exc_info is not None  # the traceback is in the log


def test_every_operation_shoalfs_overrides_has_the_catch_all():
    # reference: pyfuse3.Operations, whose methods are the handlers the kernel can reach
    overridden = [n for n, v in vars(ShoalFS).items()
                  if callable(v) and not n.startswith("_") and hasattr(pyfuse3.Operations, n)]
    # A new handler needs an entry in handler_calls, so the test above covers it too.
    assert set(overridden) - {"forget", "releasedir"} <= set(HANDLERS)
    unwrapped = [n for n in overridden if n != "forget" and not hasattr(vars(ShoalFS)[n], "__wrapped__")]
    assert unwrapped == []


@pytest.mark.allow_errors(r"flush: ")
@pytest.mark.parametrize(("exc", "code"), [
    (E.NotFound("x"), errno.ENOENT), (E.Exists("x"), errno.EEXIST), (E.NotEmpty("x"), errno.ENOTEMPTY),
    (E.NameTooLong("x"), errno.ENAMETOOLONG), (E.ReadOnly("x"), errno.EROFS), (E.NoAttribute("x"), errno.ENODATA),
    (E.QuorumError("x"), errno.EIO), (E.StripeLost("x"), errno.EIO),
])
async def test_pool_errors_map_to_their_errno(exc, code):
    fs = ShoalFS(BrokenPool(exc))
    with pytest.raises(pyfuse3.FUSEError) as info:
        await fs.flush(1)
    assert info.value.errno == code  # reference: errno(3)'s meaning for each error


# -- pulled stores -----------------------------------------------------------------------------


@mount_test
@pytest.mark.slow
@pytest.mark.allow_errors(r"read: |stripe \d+ of file|fewer than w|not written|only \d+ of \d+ stores")
def test_pulled_stores_reads_exact_then_eio_then_read_only_then_refused(make_pool, tmp_path):
    pool = make_pool(4, 6, 5, bound=True, extra=QUICK_HEALTH)
    mnt = pool.mountpoint
    sizes = [0, 1, STRIPE - 1, STRIPE, STRIPE + 1, 3 * STRIPE, 5 * STRIPE + 77]
    early = write_sources(tmp_path / "early", {f"early-{i}.raw": s for i, s in enumerate(sizes)}, 1)
    late = write_sources(tmp_path / "late", {f"late-{i}.raw": s for i, s in enumerate(sizes[1:])}, 2)
    for src in [*early.values(), *late.values()]:
        run("cp", src, mnt / src.name)
    one, two, three = pool.stores[0], pool.stores[3], pool.stores[5]

    # One store away: still w = 5 stores, so new files are acknowledged.
    one.pull(lazy=True)
    status_when(pool, lambda s: states(s).count("offline") == 1, "one store seen offline")
    extra = write_sources(tmp_path / "extra", {"with-five-stores.raw": 4 * STRIPE + 9}, 3)["with-five-stores.raw"]
    run("cp", extra, mnt / extra.name)

    # n - k = 2 stores away: reads stay bit-exact; writes are refused.
    two.pull(lazy=True)
    drop_kernel_caches()
    for src in early.values():
        run("cmp", src, mnt / src.name)  # reference: the source on the kernel's filesystem
    st = status_when(pool, lambda s: states(s).count("offline") == 2, "two stores seen offline")
    assert st["pool"]["writable"] is False and st["pool"]["readable"] is True
    with pytest.raises(OSError) as info:
        (mnt / "refused.raw").write_bytes(b"x")
    assert info.value.errno == errno.EROFS  # reference: errno(3)
    with pytest.raises(OSError) as info:
        with open(mnt / "early-3.raw", "r+b") as f:
            f.write(b"overwrite")
    assert info.value.errno == errno.EROFS
    run("cmp", early["early-3.raw"], mnt / "early-3.raw")  # reference: the source; the old content remains

    # One more: fewer than k shards of each stripe. Reads fail, never with wrong bytes.
    three.pull(lazy=True)
    drop_kernel_caches()
    for src in late.values():
        assert read_errno(mnt / src.name) == errno.EIO, src.name  # reference: errno(3); no bytes at all
    r = subprocess.run(["sha256sum", str(mnt / "late-3.raw")], capture_output=True, text=True)
    assert r.returncode != 0 and "Input/output error" in r.stderr  # reference: sha256sum reports the error
    assert pool.proc.alive

    # The third comes back: the files that failed read bit-exact again.
    three.put_back()
    status_when(pool, lambda s: states(s).count("offline") == 2, "the third store back online")
    for src in late.values():
        run("cmp", src, mnt / src.name)  # reference: the source on the kernel's filesystem

    # Remount with 4 stores (< w): read-only, with a warning, and everything reads.
    assert pool.proc.stop(signal.SIGTERM) == 0
    mp = pool.mount()
    assert "mounting read-only" in mp.log_text()
    for src in [*early.values(), *late.values(), extra]:
        run("cmp", src, mnt / src.name)  # reference: the source on the kernel's filesystem
    for attempt in (lambda: (mnt / "new.raw").write_bytes(b"x"), lambda: os.mkdir(mnt / "dir"),
                    lambda: os.unlink(mnt / "early-1.raw"), lambda: os.truncate(mnt / "early-1.raw", 0)):
        with pytest.raises(OSError) as info:
            attempt()
        assert info.value.errno == errno.EROFS  # reference: errno(3)
    assert pool.status()["pool"]["writable"] is False
    assert mp.stop(signal.SIGTERM) == 0

    # With 3 stores (< k) the mount is refused, with a message that says why.
    three.pull(lazy=True)
    mp = pool.mount(wait=False)
    assert mp.wait(60) != 0
    assert "only 3 of 6 stores are usable, k = 4" in mp.log_text()
    assert not is_mounted(mnt)  # reference: the kernel's mount table


@mount_test
@pytest.mark.allow_errors(r"flush: |fsync: |stripe \d+ of file|fewer than w|not written|changes after")
def test_close_and_fsync_fail_with_eio_below_the_write_quorum(make_pool, tmp_path):
    pool = make_pool(4, 6, 5, extra=NO_HEALTH_PROBES)
    mnt = pool.mountpoint
    old = instrument_bytes(random.Random(4), 3 * STRIPE + 10)
    (mnt / "run.raw").write_bytes(old)
    # The daemon does not probe again, so it still sends shards to the pulled stores and meets the failure.
    pull(pool.store_paths[1])
    (mnt / "five.raw").write_bytes(b"acknowledged by five stores" * 5000)  # w = 5 stores still take it
    pull(pool.store_paths[2])
    f = open(mnt / "run.raw", "r+b")
    f.write(instrument_bytes(random.Random(5), 2 * STRIPE))
    f.flush()
    with pytest.raises(OSError) as info:
        os.fsync(f.fileno())
    assert info.value.errno == errno.EIO  # reference: errno(3)
    with pytest.raises(OSError) as info:
        f.write(b"more")
        f.close()
    assert info.value.errno == errno.EIO
    assert (mnt / "run.raw").read_bytes() == old  # reference: the bytes last acknowledged
    with pytest.raises(OSError) as info:
        with open(mnt / "new.raw", "wb") as g:
            g.write(b"never acknowledged")
    assert info.value.errno == errno.EIO
    assert (mnt / "new.raw").read_bytes() == b""  # the file exists, its content was never committed
    assert (mnt / "five.raw").read_bytes() == b"acknowledged by five stores" * 5000
    assert pool.proc.alive


HALF_WRITER = """\
import os, sys
path, src, flags = sys.argv[1], sys.argv[2], int(sys.argv[3])
data = open(src, 'rb').read()
half = len(data) // 2
try:
    fd = os.open(path, flags, 0o644)
    for at in range(0, half, 1 << 16):
        os.write(fd, data[at:min(at + (1 << 16), half)])
    print('half', flush=True)
    sys.stdin.readline()
    for at in range(half, len(data), 1 << 16):
        os.write(fd, data[at:at + (1 << 16)])
    os.close(fd)
    print('closed', flush=True)
except OSError as e:
    print('error', e.errno, flush=True)
"""


def copy_with_a_pause(mnt_file: Path, src: Path, flags: int, during) -> str:
    """Write src to mnt_file from another process, run during() half-way, and
    return how it ended: 'closed' or 'error <errno>'. The writer is its own
    process so that the test's own forks (umount) hold no copy of its descriptor:
    each closing copy would flush and commit."""
    with subprocess.Popen([sys.executable, "-c", HALF_WRITER, str(mnt_file), str(src), str(flags)],
                          stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True) as p:
        try:
            assert p.stdout.readline().strip() == "half"
            during()
            p.stdin.write("go\n")
            p.stdin.flush()
            out = p.stdout.readline().strip()
            assert p.wait(60) == 0
        finally:
            if p.poll() is None:
                p.kill()
    return out


@mount_test
@pytest.mark.allow_errors(r"flush: |stripe \d+ of file|fewer than w|not written")
def test_stores_pulled_in_the_middle_of_a_copy(make_pool, tmp_path):
    pool = make_pool(4, 6, 5, store_size="96m")
    mnt = pool.mountpoint
    srcs = write_sources(tmp_path / "src", {"first.raw": 200 * STRIPE + 5, "second.raw": 150 * STRIPE + 3}, 10)
    new_file = os.O_CREAT | os.O_WRONLY | os.O_TRUNC
    # One store pulled mid-copy: five (= w) stores remain, the copy is acknowledged and exact.
    assert copy_with_a_pause(mnt / "first.raw", srcs["first.raw"], new_file,
                             lambda: pull(pool.store_paths[1])) == "closed"
    drop_kernel_caches()
    run("cmp", srcs["first.raw"], mnt / "first.raw")  # reference: the source on the kernel's filesystem
    # A second one pulled while the file is being overwritten: the copy fails
    # (a write refused, or the close) and the file keeps its committed content.
    end = copy_with_a_pause(mnt / "first.raw", srcs["second.raw"], new_file, lambda: pull(pool.store_paths[4]))
    assert end in (f"error {errno.EIO}", f"error {errno.EROFS}"), end
    drop_kernel_caches()
    run("cmp", srcs["first.raw"], mnt / "first.raw")  # reference: the first source, the last acknowledged content
    assert pool.proc.alive


# -- a corrupt shard -----------------------------------------------------------------------------


@mount_test
@pytest.mark.allow_errors(r"checksum|corrupt")
def test_corrupt_shard_is_read_around_and_queued_for_repair(make_pool, tmp_path):
    pool = make_pool(4, 6, 5)
    src = write_sources(tmp_path / "src", {"spectrum.raw": 3 * STRIPE + 100}, 6)["spectrum.raw"]
    run("cp", src, pool.mountpoint / "spectrum.raw")
    before = pool.status()
    assert before["repair"]["queued_stripes"] == 0
    # A data shard (index < k) of the middle stripe: the reader fetches data shards first.
    # Shard files are named <file id>.<stripe>.<version>.<shard>.shd.
    (victim,) = [p for p in shard_files(pool.store_paths) if p.name.split(".")[1::2] == ["1", "0"]]
    blob = bytearray(victim.read_bytes())
    blob[-100] ^= 0x40
    victim.write_bytes(bytes(blob))
    drop_kernel_caches()
    run("cmp", src, pool.mountpoint / "spectrum.raw")  # reference: the source on the kernel's filesystem
    assert sha256sum(pool.mountpoint / "spectrum.raw") == sha256sum(src)  # reference: sha256sum of the source
    # The repair worker may take the stripe off the queue quickly: a repaired shard counts too.
    st = status_when(pool, lambda s: s["repair"]["queued_stripes"] > 0 or s["repair"].get("repaired_shards", 0) > 0,
                     "the stripe with the corrupt shard queued for repair")
    assert st["pool"]["checksum_failures"] >= 1
    assert st["pool"]["degraded_reads"] >= 1


@mount_test
@pytest.mark.allow_errors(r"flush: |read: |shards readable|checksum")
def test_a_pushed_out_stripe_that_cannot_be_merged_fails_its_own_file(make_pool, tmp_path):
    # Regression: with memory short, another file's writer pushed out a half-
    # written stripe whose previous content could not be read. That writer got
    # the EIO, while the stripe's own file forgot the write and its close()
    # returned success.
    pool = make_pool(4, 6, 5, extra={"pool": {"memory_cap": 2 * STRIPE}})
    mnt = pool.mountpoint
    (mnt / "damaged.raw").write_bytes(instrument_bytes(random.Random(13), STRIPE))
    for victim in shard_files(pool.store_paths)[:3]:  # 3 of 6 shards bad: fewer than k = 4 readable
        blob = bytearray(victim.read_bytes())
        blob[-7] ^= 0x01
        victim.write_bytes(bytes(blob))
    src = write_sources(tmp_path / "src", {"other.raw": 3 * STRIPE}, 14)["other.raw"]
    # No fork while fd is open: a child's close-on-exec would flush it and take the error.
    fd = os.open(mnt / "damaged.raw", os.O_RDWR)
    try:
        os.pwrite(fd, b"calibration", 100)  # a partial stripe: committing it needs the old bytes
        (mnt / "other.raw").write_bytes(src.read_bytes())  # its second stripe pushes damaged.raw's out
    finally:
        with pytest.raises(OSError) as info:
            os.close(fd)
    assert info.value.errno == errno.EIO  # reference: errno(3); the lost write is reported, not acknowledged
    run("cmp", src, mnt / "other.raw")  # reference: the source; the other file is unharmed
    assert read_errno(mnt / "damaged.raw") == errno.EIO  # and the damaged stripe never reads as wrong bytes
    assert pool.proc.alive


# -- a killed daemon ---------------------------------------------------------------------------


@mount_test
@pytest.mark.slow
@pytest.mark.allow_errors(r"start-up clean-up")
def test_sigkill_during_a_copy_loop_keeps_every_acknowledged_file(make_pool, tmp_path):
    pool = make_pool(4, 6, 5)
    mnt = pool.mountpoint
    rng = random.Random(99)
    runs = [instrument_bytes(rng, rng.choice([0, 100, STRIPE - 1, STRIPE, 2 * STRIPE + 5, 4 * STRIPE]))
            for _ in range(400)]
    closed: list[int] = []  # files whose close() returned
    started: list[int] = []
    stop = threading.Event()
    failure: list[OSError] = []

    def copy_loop() -> None:
        for i, data in enumerate(runs):
            if stop.is_set():
                return
            started.append(i)
            try:
                with open(mnt / f"run-{i:04d}.raw", "wb") as f:
                    f.write(data)
            except OSError as e:
                failure.append(e)
                return
            closed.append(i)

    t = threading.Thread(target=copy_loop)
    t.start()
    try:
        wait_for(lambda: len(closed) >= 25, "25 files copied")
        assert pool.proc.kill() == -signal.SIGKILL
    finally:
        stop.set()
        t.join(60)
    assert not t.is_alive()
    assert failure and failure[0].errno in (errno.ENOTCONN, errno.ECONNABORTED, errno.EIO), failure
    assert access_errno(mnt) == errno.ENOTCONN  # reference: the kernel's answer for a mount whose daemon died
    assert clear_stale_mount(mnt)  # fusermount3 -uz of the dead mount
    pool.mount()
    for i in closed:
        # reference: the bytes written, checked with sha256sum
        assert sha256sum(mnt / f"run-{i:04d}.raw") == hashlib.sha256(runs[i]).hexdigest(), i
    unsure = started[-1]
    if unsure not in closed and (mnt / f"run-{unsure:04d}.raw").exists():
        # A commit is all or nothing: the file is empty or whole, never torn.
        assert (mnt / f"run-{unsure:04d}.raw").read_bytes() in (b"", runs[unsure])
    st = pool.status()
    assert st["stripes"]["lost"] == 0
    assert st["pool"]["files"] >= len(closed)


# -- exits and mount points ---------------------------------------------------------------------


@mount_test
@pytest.mark.parametrize("how", ["SIGTERM", "fusermount3 -u"])
def test_sigterm_and_fusermount_exit_zero_and_leave_no_mount(make_pool, tmp_path, how):
    pool = make_pool(2, 3)
    src = write_sources(tmp_path / "src", {"run.raw": 2 * STRIPE + 1}, 8)["run.raw"]
    run("cp", src, pool.mountpoint / "run.raw")
    rc = pool.proc.stop(signal.SIGTERM) if how == "SIGTERM" else pool.proc.unmount()
    assert rc == 0
    assert not is_mounted(pool.mountpoint)  # reference: the kernel's mount table
    assert os.listdir(pool.mountpoint) == []  # a plain empty directory again
    assert "unmounted cleanly" in pool.proc.log_text()
    pool.mount()
    run("cmp", src, pool.mountpoint / "run.raw")  # reference: the source on the kernel's filesystem


@mount_test
@pytest.mark.parametrize("case", ["missing", "not empty", "a file", "already a mount point", "served already"])
def test_mount_refuses_a_bad_mount_point(make_pool, tmp_path, case):
    pool = make_pool(2, 3, mount=case == "served already")
    target = tmp_path / "target"
    expect = {"missing": "does not exist", "not empty": "not empty", "a file": "not a directory",
              "already a mount point": "already a mount point", "served already": "already"}[case]
    if case == "not empty":
        target.mkdir()
        (target / "notes.txt").write_text("spectrometer log")
    elif case == "a file":
        target.write_text("not a directory")
    elif case == "already a mount point":
        mount_tmpfs(target, "1m")
    elif case == "served already":
        target = pool.mountpoint
    try:
        r = subprocess.run(shoal_argv("mount", pool.config, target), capture_output=True, text=True, timeout=30,
                           cwd=Path(__file__).resolve().parent.parent)
    finally:
        if case == "already a mount point":
            umount(target)
    assert r.returncode != 0
    assert expect in r.stderr, r.stderr
    assert "Traceback" not in r.stderr  # a clear message, not a crash
    if case in ("missing", "not empty", "a file"):
        assert not is_mounted(target)  # reference: the kernel's mount table
    if case == "served already":
        assert pool.proc.alive and (target / ".").is_dir()


@mount_test
def test_daemon_starts_every_component_present(make_pool):
    # Regression: the catalog mirror was built with the (pool, cfg) arguments the
    # other components take, failed with a TypeError and never ran.
    pool = make_pool(2, 3)
    log = pool.proc.log_text()
    assert "could not start" not in log
    st = pool.status()
    assert "generation" in st["catalog"], st["catalog"]


# -- the acceptance check ------------------------------------------------------------------------


@mount_test
@pytest.mark.slow
@pytest.mark.allow_errors(r"read: |stripe \d+ of file|StripeLost")
def test_acceptance_six_stores_two_pulled_read_exact_third_pulled_eio_and_lost(make_pool, tmp_path):
    # The decoded-stripe cache is a slice of memory_cap: 64 MiB keeps it far smaller
    # than the file, so the last read must reach the stores.
    pool = make_pool(4, 6, 5, stripe_size="4MiB", store_size="64m", extra={"pool": {"memory_cap": "64MiB"}})
    mnt = pool.mountpoint
    st = pool.status()
    assert st["pool"]["writable"] and states(st) == ["online"] * 6
    src = tmp_path / "spectra.raw"
    with open(src, "wb") as f:
        f.write(os.urandom(64 * MiB))
    run("cp", src, mnt / "spectra.raw")
    digest = sha256sum(src)
    assert sha256sum(mnt / "spectra.raw") == digest  # reference: sha256sum of the source
    stripes = 64 * MiB // (4 * MiB)
    assert pool.status()["stripes"]["intact"] == stripes

    assert pool.proc.stop(signal.SIGTERM) == 0
    pull(pool.store_paths[1])
    pull(pool.store_paths[4])
    pool.mount()
    drop_kernel_caches()
    run("cmp", src, mnt / "spectra.raw")  # reference: cmp against the source on the kernel's filesystem
    assert sha256sum(mnt / "spectra.raw") == digest  # reference: sha256sum of the source
    st = pool.status()
    assert st["stripes"]["critical"] == stripes and st["stripes"]["lost"] == 0

    pull(pool.store_paths[2])
    drop_kernel_caches()
    assert read_errno(mnt / "spectra.raw") == errno.EIO  # reference: errno(3): an error, never wrong bytes
    r = subprocess.run(["cmp", str(src), str(mnt / "spectra.raw")], capture_output=True, text=True)
    assert r.returncode == 2 and "Input/output error" in r.stderr  # reference: cmp reports the read error
    st = status_when(pool, lambda s: s["stripes"]["lost"] == stripes, "shoal status counts the file's stripes as lost")
    assert st["stripes"]["intact"] == st["stripes"]["degraded"] == st["stripes"]["critical"] == 0
    assert pool.proc.alive

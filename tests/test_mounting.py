"""The mount helpers, the test filesystems and the conftest policies, on real mounts."""
from __future__ import annotations

import errno
import os
import signal
import subprocess
import sys
import threading
import tomllib
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import mounting
from gateway import config
from mounting import (
    MountError,
    MountProcess,
    bind_store,
    clear_stale_mount,
    is_mounted,
    requires_fuse,
    requires_root,
    access_errno,
    tmpfs,
    toml_value,
    umount,
    unbind,
    write_pool_config,
)

TESTS = Path(__file__).resolve().parent
NULLFS = TESTS / "bench" / "nullfs.py"
HANGFS = TESTS / "hangfs.py"
MiB = 1 << 20

def nullfs_argv(mnt: Path, *flags: str) -> list[str]:
    return [sys.executable, str(NULLFS), str(mnt), *flags]


def run(*argv: str | Path) -> subprocess.CompletedProcess:
    r = subprocess.run([str(a) for a in argv], capture_output=True, text=True)
    assert r.returncode == 0, f"{argv} exited {r.returncode}: {r.stderr}"
    return r


def assert_plain_dir(p: Path) -> None:
    """Nothing mounted, stat works (no ENOTCONN left behind)."""
    assert not is_mounted(p)
    assert access_errno(p) == 0
    assert p.stat().st_dev == p.parent.stat().st_dev


# -- nullfs through MountProcess ------------------------------------------------------


@pytest.mark.fuse
@requires_fuse
@requires_root
@pytest.mark.parametrize("flags", [[], ["--writeback-cache"]], ids=["write-through", "writeback"])
@pytest.mark.parametrize("stop", ["SIGTERM", "SIGINT"])
def test_nullfs_dd_roundtrip_then_signal(tmp_path, mount_process, flags, stop):
    mnt = tmp_path / "mnt"
    mp = mount_process(nullfs_argv(mnt, *flags), mnt)
    f = mnt / "zeros"
    run("dd", "if=/dev/urandom", f"of={f}", "bs=1M", "count=64", "status=none")
    assert f.stat().st_size == 64 * MiB
    # Whatever went in, zeros come out, as many as were written. O_DIRECT
    # reads reach the filesystem even when the writeback cache holds the
    # written pages.
    zeros = tmp_path / "read-back"
    run("dd", f"if={f}", f"of={zeros}", "bs=1M", "iflag=direct", "status=none")
    assert zeros.stat().st_size == 64 * MiB
    run("cmp", zeros, "/dev/zero", "-n", str(64 * MiB))
    r = subprocess.run(["cmp", str(zeros), "/dev/zero"], capture_output=True, text=True)
    assert r.returncode == 1 and "EOF" in r.stderr
    assert mp.stop(getattr(signal, stop)) == 0
    assert_plain_dir(mnt)
    assert "served" in mp.log_text()



@pytest.mark.fuse
@requires_fuse
@requires_root
def test_nullfs_namespace_operations(tmp_path, mount_process):
    mnt = tmp_path / "mnt"
    mount_process(nullfs_argv(mnt), mnt)
    a, b = mnt / "a", mnt / "b"
    a.write_bytes(b"x" * 1000)
    with open(b, "wb") as fh:
        fh.write(b"y" * 10)
        fh.flush()
        os.fsync(fh.fileno())
    assert sorted(os.listdir(mnt)) == ["a", "b"]
    assert a.read_bytes() == bytes(1000)
    os.truncate(a, 10)
    assert a.stat().st_size == 10
    os.truncate(a, 5000)
    assert a.read_bytes() == bytes(5000)
    os.chmod(a, 0o600)
    assert a.stat().st_mode & 0o777 == 0o600
    a.unlink()
    assert os.listdir(mnt) == ["b"]
    with pytest.raises(FileNotFoundError):
        a.stat()
    with pytest.raises(FileExistsError):
        os.open(b, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
    v = os.statvfs(mnt)
    assert v.f_bavail * v.f_frsize >= 1 << 40
    with open(b, "w") as fh:  # O_TRUNC
        pass
    assert b.stat().st_size == 0


@pytest.mark.fuse
@requires_fuse
@requires_root
def test_nullfs_survives_o_direct(tmp_path, mount_process):
    mnt = tmp_path / "mnt"
    mp = mount_process(nullfs_argv(mnt), mnt)
    run("dd", "if=/dev/zero", f"of={mnt / 'd'}", "bs=1M", "count=8", "oflag=direct", "status=none")
    run("dd", f"if={mnt / 'd'}", "of=/dev/null", "bs=1M", "iflag=direct", "status=none")
    assert (mnt / "d").stat().st_size == 8 * MiB
    assert mp.alive and access_errno(mnt) == 0


@pytest.mark.fuse
@requires_fuse
@requires_root
def test_fusermount_unmount_exits_zero(tmp_path, mount_process):
    mnt = tmp_path / "mnt"
    mp = mount_process(nullfs_argv(mnt), mnt)
    (mnt / "f").write_bytes(b"abc")
    assert mp.unmount() == 0
    assert_plain_dir(mnt)


@pytest.mark.fuse
@requires_fuse
@requires_root
def test_kill_leaves_dead_mount_that_clear_stale_mount_removes(tmp_path, mount_process):
    mnt = tmp_path / "mnt"
    mp = mount_process(nullfs_argv(mnt), mnt)
    assert mp.kill() == -signal.SIGKILL
    assert is_mounted(mnt)
    assert access_errno(mnt) == errno.ENOTCONN
    assert clear_stale_mount(mnt) is True
    assert_plain_dir(mnt)
    assert clear_stale_mount(mnt) is False


@pytest.mark.fuse
@requires_fuse
@requires_root
def test_cleanup_after_kill_and_while_alive(tmp_path):
    killed = MountProcess(nullfs_argv(tmp_path / "m1"), tmp_path / "m1", log_dir=tmp_path / "logs")
    with killed:
        killed.wait_mounted()
        killed.kill()
        assert access_errno(killed.mountpoint) == errno.ENOTCONN
    assert_plain_dir(killed.mountpoint)

    alive = MountProcess(nullfs_argv(tmp_path / "m2"), tmp_path / "m2", log_dir=tmp_path / "logs")
    with alive:
        alive.wait_mounted()
        busy = open(alive.mountpoint / "open-file", "wb")  # keeps the mount busy
    try:
        assert_plain_dir(alive.mountpoint)
        assert alive.returncode is not None
    finally:
        try:
            busy.close()
        except OSError:
            pass  # the connection is gone; close may report it
    assert mounting.leftover_mounts() == []


def test_wait_mounted_reports_early_exit(tmp_path):
    argv = [sys.executable, "-c", "import sys; print('no mount for you'); sys.exit(3)"]
    with MountProcess(argv, tmp_path / "mnt", log_dir=tmp_path / "logs") as mp:
        with pytest.raises(MountError, match=r"exited with 3(.|\n)*no mount for you"):
            mp.wait_mounted(timeout=30)
    assert not is_mounted(tmp_path / "mnt")


# -- tmpfs and bind mounts ---------------------------------------------------------------


@requires_root
def test_tmpfs_pull_leaves_empty_mount_point(tmp_path):
    disk = tmp_path / "disk"
    with tmpfs(disk, size="8m") as p:
        assert p == disk.resolve() and is_mounted(p)
        assert p.stat().st_dev != p.parent.stat().st_dev
        (p / "shard").write_bytes(b"data")
        umount(p)  # pull the disk
        assert_plain_dir(p)
        assert os.listdir(p) == []
        with pytest.raises(MountError, match="nothing is mounted"):
            umount(p)
        # A new tmpfs at the same place is a new, empty disk.
        with tmpfs(p, size="8m"):
            assert os.listdir(p) == []
    assert_plain_dir(disk)


@requires_root
def test_tmpfs_size_and_lazy_unmount_when_busy(tmp_path):
    with tmpfs(tmp_path / "disk", size="4m") as p:
        v = os.statvfs(p)
        assert v.f_blocks * v.f_frsize == 4 * MiB
        with pytest.raises(OSError) as e:
            (p / "big").write_bytes(bytes(5 * MiB))
        assert e.value.errno == errno.ENOSPC
        busy = open(p / "held", "wb")
    try:
        assert_plain_dir(tmp_path / "disk")
    finally:
        busy.close()


@requires_root
def test_bind_store_put_back_brings_data_back(tmp_path):
    with tmpfs(tmp_path / "disk", size="8m") as disk:
        store = bind_store(disk / "shoal", tmp_path / "store")
        (store / "label").write_text("pool-1")
        assert store.stat().st_dev == disk.stat().st_dev
        unbind(store)
        assert_plain_dir(store)
        assert os.listdir(store) == []
        assert (disk / "shoal" / "label").read_text() == "pool-1"
        bind_store(disk / "shoal", store)
        assert (store / "label").read_text() == "pool-1"
        unbind(store)
    assert_plain_dir(tmp_path / "store")


@requires_root
def test_bound_stores_fixture(bound_stores):
    a, b = bound_stores(2, size="4m")
    assert a.path.stat().st_dev != b.path.stat().st_dev  # each its own disk
    (a.path / "shard").write_bytes(b"1")
    a.pull()
    assert not a.attached and os.listdir(a.path) == []
    a.put_back()
    assert a.attached and (a.path / "shard").read_bytes() == b"1"
    b.pull()  # teardown copes with a pulled store


@requires_root
def test_store_dirs_fixture(store_dirs):
    dirs = store_dirs(3, size="2m")
    assert len({d.stat().st_dev for d in dirs}) == 3
    assert all(is_mounted(d) for d in dirs)
    umount(dirs[1])  # teardown copes with a pulled store
    assert store_dirs(1)[0].name == "store3"


# -- pool configs ------------------------------------------------------------------------


@requires_root
def test_pool_config_loads(pool_config, tmp_path):
    path = pool_config(4, 6, 5, domains=["a", "a", "b", "b", "c", "c"], stripe_size=MiB,
                       extra={"store_io": {"deadline": "2s", "concurrency": 2}, "pool": {"memory_cap": "64MiB"}})
    cfg = config.load(path)
    assert (cfg.k, cfg.n, cfg.w, cfg.stripe_size) == (4, 6, 5, MiB)
    assert cfg.domains == {"a": 2, "b": 2, "c": 2}
    assert cfg.metrics.listen is None
    assert cfg.store_io.deadline == 2.0 and cfg.store_io.concurrency == 2
    assert cfg.memory_cap == 64 * MiB
    assert all(is_mounted(s.path) for s in cfg.stores)
    assert cfg.state_dir == (tmp_path / "state").resolve()
    second = config.load(pool_config(2, 3, store_count=4))
    assert len(second.stores) == 4 and second.w == 3  # config default min(k + 1, n)
    assert second.state_dir != cfg.state_dir


def test_write_pool_config_quotes_and_overrides(tmp_path):
    odd = tmp_path / 'we"ird \\ dir\tname'
    stores = [odd / f"s{i}" for i in range(3)]
    path = write_pool_config(tmp_path, k=2, n=3, w=2, stores=stores, domains=["rack \"1\"", "r2", "r3"],
                             state_dir=odd / "state", stripe_size="64KiB",
                             extra={"metrics": {"listen": "127.0.0.1:9999"}, "repair": {"rate": 0}})
    cfg = config.load(path)
    assert [s.path for s in cfg.stores] == [p.resolve() for p in stores]
    assert cfg.stores[0].domain == 'rack "1"'
    assert cfg.state_dir == (odd / "state").resolve()
    assert cfg.metrics.listen == "127.0.0.1:9999"
    assert cfg.repair.rate == 0 and cfg.stripe_size == 64 * 1024
    with pytest.raises(ValueError):
        write_pool_config(tmp_path, k=1, n=1, stores=stores, domains=["x"], state_dir=tmp_path / "s")


@settings(max_examples=200)
@given(st.recursive(st.text() | st.integers(-2**63, 2**63 - 1) | st.booleans()
                    | st.floats(allow_nan=False),
                    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(), inner, max_size=3),
                    max_leaves=8))
def test_toml_value_round_trips(value):
    assert tomllib.loads(f"x = {toml_value(value)}")["x"] == value


# -- hangfs --------------------------------------------------------------------------


def hangfs_argv(backing: Path, mnt: Path, hang_file: Path) -> list[str]:
    return [sys.executable, str(HANGFS), str(backing), str(mnt), "--hang-file", str(hang_file)]


@pytest.mark.fuse
@requires_fuse
@requires_root
def test_hangfs_passthrough(tmp_path, mount_process):
    backing, mnt = tmp_path / "backing", tmp_path / "mnt"
    backing.mkdir()
    (backing / "old").write_bytes(b"from before")
    mount_process(hangfs_argv(backing, mnt, tmp_path / "hang"), mnt)
    src = tmp_path / "random"
    run("dd", "if=/dev/urandom", f"of={src}", "bs=1M", "count=9", "status=none")
    run("cp", src, mnt / "copy")
    run("cmp", src, mnt / "copy")
    run("cmp", src, backing / "copy")
    assert (mnt / "old").read_bytes() == b"from before"
    # The steps of a store's put: directory, temporary file, fsync, rename, directory fsync.
    (mnt / "shards" / "ab").mkdir(parents=True)
    tmp = mnt / "shards" / "ab" / "x.tmp"
    fd = os.open(tmp, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o640)
    try:
        os.write(fd, b"shard bytes")
        os.fsync(fd)
    finally:
        os.close(fd)
    os.rename(tmp, mnt / "shards" / "ab" / "x.shd")
    dfd = os.open(mnt / "shards" / "ab", os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(dfd)
    finally:
        os.close(dfd)
    assert (backing / "shards" / "ab" / "x.shd").read_bytes() == b"shard bytes"
    assert (mnt / "shards" / "ab" / "x.shd").stat().st_mode & 0o777 == 0o640
    assert sorted(os.listdir(mnt)) == ["copy", "old", "shards"]
    os.rename(mnt / "shards", mnt / "moved")  # a directory: paths below it follow
    assert (mnt / "moved" / "ab" / "x.shd").read_bytes() == b"shard bytes"
    os.truncate(mnt / "copy", 100)
    assert (backing / "copy").stat().st_size == 100
    os.utime(mnt / "old", ns=(1_000_000_000, 2_000_000_000))
    assert (backing / "old").stat().st_mtime_ns == 2_000_000_000
    (mnt / "moved" / "ab" / "x.shd").unlink()
    os.rmdir(mnt / "moved" / "ab")
    with pytest.raises(OSError) as e:
        os.rmdir(mnt / "nothing")
    assert e.value.errno == errno.ENOENT
    assert os.statvfs(mnt).f_blocks == os.statvfs(backing).f_blocks
    assert sorted(os.listdir(backing / "moved")) == []


def _in_thread(fn):
    """Run fn in a daemon thread; returns (done event, result box)."""
    done, box = threading.Event(), {}

    def target():
        try:
            box["value"] = fn()
        except BaseException as e:  # noqa: BLE001 - reported to the test
            box["error"] = e
        finally:
            done.set()

    threading.Thread(target=target, daemon=True).start()
    return done, box


@pytest.mark.fuse
@requires_fuse
@requires_root
def test_hangfs_hangs_and_recovers(tmp_path, mount_process):
    backing, mnt, hang = tmp_path / "backing", tmp_path / "mnt", tmp_path / "hang"
    backing.mkdir()
    mp = mount_process(hangfs_argv(backing, mnt, hang), mnt)
    (mnt / "f").write_bytes(b"before")
    hang.touch()

    def work():
        (mnt / "g").write_bytes(b"during")
        return sorted(os.listdir(mnt))

    done, box = _in_thread(work)
    assert not done.wait(1.0), "an operation on a hung mount returned"
    statfs_done, _ = _in_thread(lambda: os.statvfs(mnt))
    assert not statfs_done.wait(0.2)
    hang.unlink()
    assert done.wait(30) and statfs_done.wait(30)
    assert box == {"value": ["f", "g"]}
    assert (backing / "g").read_bytes() == b"during"
    assert mp.stop() == 0
    assert_plain_dir(mnt)


@pytest.mark.fuse
@requires_fuse
@requires_root
def test_hangfs_stops_while_hung(tmp_path, mount_process):
    backing, mnt, hang = tmp_path / "backing", tmp_path / "mnt", tmp_path / "hang"
    backing.mkdir()
    mp = mount_process(hangfs_argv(backing, mnt, hang), mnt)
    hang.touch()
    done, box = _in_thread(lambda: (mnt / "x").write_bytes(b"never"))
    assert not done.wait(0.5)
    assert mp.stop(timeout=30) == 0  # SIGTERM answers the waiting request and unmounts
    assert done.wait(30)
    assert isinstance(box.get("error"), OSError)
    assert_plain_dir(mnt)
    assert not (backing / "x").exists()


# -- conftest policies ----------------------------------------------------------------------

def _inner_pytester(pytester, monkeypatch):
    pytester.makeconftest((TESTS / "conftest.py").read_text())
    monkeypatch.setenv("PYTHONPATH", os.pathsep.join([str(TESTS), str(TESTS.parent)]))
    pytester.makeini("[pytest]\naddopts = -p no:cacheprovider --strict-markers\n")


def test_logged_errors_fail_unless_allowed(pytester, monkeypatch):
    _inner_pytester(pytester, monkeypatch)
    pytester.makepyfile("""
        import logging, pytest
        log = logging.getLogger("inner")
        def test_error_fails():
            log.error("boom")
        def test_critical_fails():
            log.critical("bang")
        def test_exception_in_thread_fails():
            import threading
            t = threading.Thread(target=lambda: log.exception("in thread"))
            t.start(); t.join()
        def test_warning_passes():
            log.warning("only a warning")
        @pytest.mark.allow_errors
        def test_allowed_passes():
            log.error("expected")
        @pytest.mark.allow_errors("store .* stalled")
        def test_matching_pattern_passes():
            log.error("store s1 stalled")
        @pytest.mark.allow_errors("store .* stalled")
        def test_other_error_fails():
            log.error("catalog corrupt")
        @pytest.fixture
        def noisy():
            yield
            log.error("in teardown")
        def test_teardown_error_is_reported(noisy):
            pass
    """)
    r = pytester.runpytest_subprocess()
    r.assert_outcomes(passed=4, failed=4, errors=1)
    r.stdout.fnmatch_lines(["*logged unexpected error records during call*", "  ERROR inner: boom"])


def test_missing_requirement_skips_or_fails_under_ci(pytester, monkeypatch):
    _inner_pytester(pytester, monkeypatch)
    pytester.makepyfile("""
        import mounting
        missing = mounting.requirement("the widget is not installed")
        present = mounting.requirement(None)
        @missing
        def test_needs_widget():
            pass
        @present
        def test_needs_nothing():
            pass
    """)
    monkeypatch.delenv("CI", raising=False)
    pytester.runpytest_subprocess().assert_outcomes(passed=1, skipped=1)
    monkeypatch.setenv("CI", "1")
    r = pytester.runpytest_subprocess()
    r.assert_outcomes(passed=1, errors=1)  # failed in setup: pytest reports an error
    r.stdout.fnmatch_lines(["*requirement missing under CI: the widget is not installed*"])


@requires_root
def test_leftover_mount_fails_the_test_and_is_cleared(pytester, monkeypatch):
    _inner_pytester(pytester, monkeypatch)
    pytester.makepyfile("""
        import mounting
        def test_leaks(tmp_path):
            mounting.mount_tmpfs(tmp_path / "leak", "1m")
    """)
    r = pytester.runpytest_subprocess()
    r.assert_outcomes(passed=1, errors=1)
    r.stdout.fnmatch_lines(["*test left mounts behind (now cleared)*leak*"])
    assert not any("leak" in str(m.mountpoint) for m in mounting.mount_table())


@pytest.mark.fuse
@requires_fuse
@requires_root
def test_mount_process_fixture_reports_filesystem_errors(pytester, monkeypatch):
    _inner_pytester(pytester, monkeypatch)
    pytester.makepyfile(f"""
        import sys, pytest
        def noisy_argv(mnt, line):
            return ["sh", "-c", f"echo '{{line}}'; exec {sys.executable} {NULLFS} {{mnt}}"]
        def test_traceback_in_log_fails(tmp_path, mount_process):
            mount_process(noisy_argv(tmp_path / "mnt", "Traceback (most recent call last):"))
        @pytest.mark.allow_errors("store .* stalled")
        def test_allowed_line_passes(tmp_path, mount_process):
            mount_process(noisy_argv(tmp_path / "mnt", "shoal ERROR store s1 stalled"))
        def test_clean_log_passes(tmp_path, mount_process):
            mount_process([sys.executable, "{NULLFS}", str(tmp_path / "mnt")])
    """)
    r = pytester.runpytest_subprocess()
    r.assert_outcomes(passed=3, errors=1)
    r.stdout.fnmatch_lines(["*filesystem process logged errors*", "*Traceback (most recent call last):*"])


@pytest.mark.fuse
@requires_fuse
@requires_root
def test_mount_process_refuses_a_mounted_mountpoint_and_cleans_up_while_hung(tmp_path, mount_process):
    backing, mnt, hang = tmp_path / "backing", tmp_path / "mnt", tmp_path / "hang"
    backing.mkdir()
    mp = mount_process(hangfs_argv(backing, mnt, hang), mnt)
    with pytest.raises(MountError, match="mounted already"):
        MountProcess(nullfs_argv(mnt), mnt, log_dir=tmp_path / "logs")
    hang.touch()
    done, _ = _in_thread(lambda: os.listdir(mnt))
    assert not done.wait(0.3)
    mp.cleanup()
    assert done.wait(30)
    assert_plain_dir(mnt)
    assert mp.returncode == 0

"""Tests for gateway.store and the FaultyStore in tests/faults.py.

Where it can, a test checks against the kernel rather than the code under
test: a real tmpfs that runs out of space (ENOSPC), a real read-only remount
(EROFS), a real FIFO whose open(2) blocks, statvfs(2) for free space, and
st_dev of a real mount point.
"""
from __future__ import annotations

import contextlib
import errno
import os
import subprocess
import time
import uuid
from pathlib import Path

import pytest
import trio
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from faults import ACTIONS, OPS, FaultPlan, FaultyStore
from gateway.errors import (
    ShardCorrupt, ShardMissing, ShoalError, StoreForeign, StoreFull, StoreStalled,
    StoreUnavailable, StoreUnlabelled,
)
from gateway.store import (
    LABEL_NAME, Label, ShardName, Store, check_label, is_empty_dir, read_label,
    same_device_as_parent, write_label,
)

POOL = uuid.uuid4().hex
OTHER_POOL = uuid.uuid4().hex


def new_store(path: Path, *, pool_id: str = POOL, **kw) -> Store:
    path.mkdir(parents=True, exist_ok=True)
    write_label(path, Label.new(pool_id=pool_id, pool_name="lab"))
    return Store(path=path, pool_id=pool_id, **kw)


def shard(i: int = 0, *, stripe: int = 0, version: int = 1, fid: str | None = None) -> ShardName:
    return ShardName(fid or "ab" + "0" * 29 + "1", stripe, version, i)


def tree(root: Path) -> dict[str, tuple[int, float]]:
    """Every path under root with its size and mtime, to show nothing was written."""
    out = {}
    for dirpath, dirs, files in os.walk(root):
        for n in dirs + files:
            p = os.path.join(dirpath, n)
            s = os.lstat(p)
            out[os.path.relpath(p, root)] = (s.st_size, s.st_mtime_ns)
    return out


def temp_files(root: Path) -> list[str]:
    return [p for p in tree(root) if os.path.basename(p).startswith((".tmp-", ".probe-"))]


# ---------------------------------------------------------------- real mounts

def need_root() -> None:
    if os.geteuid() != 0:
        if os.environ.get("CI"):
            pytest.fail("mounting tmpfs needs root, and CI is set: run the tests as root there")
        pytest.skip("mounting tmpfs needs root")


@contextlib.contextmanager
def tmpfs(where: Path, size: str = "1m"):
    need_root()
    where.mkdir(parents=True, exist_ok=True)
    subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(where)], check=True)
    try:
        yield where
    finally:
        if subprocess.run(["umount", str(where)]).returncode:
            subprocess.run(["umount", "-l", str(where)])


@pytest.fixture
def small_fs(tmp_path):
    with tmpfs(tmp_path / "small", "1m") as p:
        yield p


# ---------------------------------------------------------------- conformance: Store and FaultyStore

@pytest.fixture(params=["store", "faulty"])
def any_store(request, tmp_path):
    real = new_store(tmp_path / "s")
    if request.param == "store":
        yield real
    else:
        f = FaultyStore(real, FaultPlan())
        yield f
        f.release()


class TestConformance:
    """The same contract, checked on the real store and on the fake with an empty plan."""

    async def test_put_get_roundtrip(self, any_store):
        name = shard(3)
        await any_store.put(name, [b"head", memoryview(b"-payload-"), b"", bytearray(b"tail")])
        assert await any_store.get(name) == b"head-payload-tail"
        assert await any_store.exists(name)
        on_disk = any_store.path / name.relpath()
        assert on_disk.read_bytes() == b"head-payload-tail"
        s = any_store.statistics()
        assert (s.puts, s.gets, s.bytes_written, s.bytes_read) == (1, 1, 17, 17)
        assert s.write_latency.count == 1 and s.read_latency.count == 1

    async def test_batches_report_each_shard_in_place(self, any_store):
        # get_many_checked / put_many: one call, one result per shard, in order.
        names = [shard(i) for i in range(4)]
        errors = await any_store.put_many([(n, [b"shard-", str(i).encode()]) for i, n in enumerate(names[:3])])
        assert errors == [None, None, None]
        (any_store.path / names[2].relpath()).write_bytes(b"BAD")  # damaged behind the store's back

        def check(pos, blob):
            if blob == b"BAD":
                raise ShardCorrupt("bad checksum")
            return (pos, blob)

        got = await any_store.get_many_checked(names, check=check)
        assert got[:2] == [(0, b"shard-0"), (1, b"shard-1")]
        assert isinstance(got[2], ShardCorrupt) and isinstance(got[3], ShardMissing)
        s = any_store.statistics()
        assert (s.puts, s.gets, s.bytes_written, s.get_missing) == (3, 3, 21, 1)  # gets: reads that returned bytes
        assert s.write_latency.count == 3 and s.read_latency.count == 3

    async def test_put_replaces(self, any_store):
        await any_store.put(shard(), [b"old"])
        await any_store.put(shard(), [b"new content"])
        assert await any_store.get(shard()) == b"new content"

    async def test_large_put_many_buffers(self, any_store):
        bufs = [bytes([i % 251]) * 1000 for i in range(3000)]  # more buffers than IOV_MAX
        await any_store.put(shard(), bufs)
        assert await any_store.get(shard()) == b"".join(bufs)

    async def test_missing(self, any_store):
        with pytest.raises(ShardMissing, match=shard(9).basename()):
            await any_store.get(shard(9))
        assert not await any_store.exists(shard(9))
        assert any_store.statistics().get_missing == 1
        assert any_store.statistics().get_errors == 0  # a missing shard is not the store's fault

    async def test_max_bytes(self, any_store):
        await any_store.put(shard(), [b"x" * 100])
        assert await any_store.get(shard(), max_bytes=100) == b"x" * 100
        with pytest.raises(ShardCorrupt, match="too large"):
            await any_store.get(shard(), max_bytes=99)

    async def test_get_prefix(self, any_store):
        await any_store.put(shard(), [b"0123456789"])
        assert await any_store.get_prefix(shard(), 4) == b"0123"
        assert await any_store.get_prefix(shard(), 50) == b"0123456789"

    async def test_not_a_regular_file(self, any_store):
        name = shard()
        p = any_store.path / name.relpath()
        p.parent.mkdir(parents=True)
        os.mkfifo(p)  # open(2) of a FIFO would block without O_NONBLOCK
        with pytest.raises(ShardCorrupt, match="not a regular file"):
            await any_store.get(name)
        p.unlink()
        p.symlink_to("/etc/hostname")
        with pytest.raises(ShardCorrupt, match="symbolic link"):
            await any_store.get(name)

    async def test_delete(self, any_store):
        await any_store.put(shard(), [b"x"])
        assert await any_store.delete(shard()) is True
        assert await any_store.delete(shard()) is False
        with pytest.raises(ShardMissing):
            await any_store.get(shard())

    async def test_list_shards(self, any_store):
        names = {shard(i, stripe=s) for i in range(3) for s in range(2)}
        other = ShardName("cd" + "e" * 30, 7, 12, 200)
        for n in names | {other}:
            await any_store.put(n, [b"s"])
        root = any_store.path
        (root / "shards/ab/not-a-shard").write_bytes(b"")
        (root / "shards/ab/.tmp-0123456789abcdef").write_bytes(b"")  # a write in progress: ignored
        (root / "shards/zz").mkdir()
        # A valid name filed under the wrong fan-out directory is not ours either.
        (root / "shards/cd" / shard().basename()).write_bytes(b"")
        listed = await any_store.list_shards()
        assert {n for n, _ in listed} == names | {other}
        for n, mtime in listed:
            assert mtime == os.stat(root / n.relpath()).st_mtime
        assert any_store.statistics().unparsed_names == 3

    async def test_list_and_remove_temp(self, any_store):
        root = any_store.path
        await any_store.put(shard(), [b"x"])
        left = ["shards/ab/.tmp-00000000000000aa", "catalog/.tmp-00000000000000bb", ".probe-00000000000000cc"]
        for rel in left:
            (root / rel).write_bytes(b"partial")
        assert await any_store.list_temp(0) == sorted(left)
        assert await any_store.list_temp(3600) == []  # all just written
        for rel in left:
            assert await any_store.remove_temp(rel) is True
        assert await any_store.remove_temp(left[0]) is False
        assert temp_files(root) == []
        for bad in (shard().relpath(), LABEL_NAME, "../.tmp-00000000000000aa", "/tmp/.tmp-00000000000000aa"):
            with pytest.raises(ValueError):
                await any_store.remove_temp(bad)
        assert await any_store.exists(shard())

    async def test_space_matches_statvfs(self, any_store):
        info = await any_store.space()
        v = os.statvfs(any_store.path)  # statvfs(3): f_bavail blocks of f_frsize bytes
        assert info.total_bytes == v.f_blocks * v.f_frsize
        assert abs(info.free_bytes - v.f_bavail * v.f_frsize) < 64 * 1024 * 1024

    async def test_probe(self, any_store):
        before = tree(any_store.path)
        result = await any_store.probe()
        assert result.latency >= 0 and result.space.total_bytes > 0
        assert tree(any_store.path) == before  # the probe file is gone
        assert any_store.store_id == read_label(any_store.path).store_id

    async def test_catalog_files(self, any_store, tmp_path):
        await any_store.put_file("catalog-1.sqlite", [b"abc", b"def"])
        assert await any_store.get_file("catalog-1.sqlite") == b"abcdef"
        src = tmp_path / "local.db"
        src.write_bytes(os.urandom(3 * 1024 * 1024 + 5))
        await any_store.copy_file_in("catalog-2.sqlite", src)
        files = await any_store.list_files()
        assert [(n, size) for n, size, _ in files] == [("catalog-1.sqlite", 6), ("catalog-2.sqlite", src.stat().st_size)]
        out = tmp_path / "restored.db"
        assert await any_store.fetch_file_to("catalog-2.sqlite", out) == src.stat().st_size
        assert out.read_bytes() == src.read_bytes()
        assert await any_store.delete_file("catalog-1.sqlite") is True
        assert await any_store.delete_file("catalog-1.sqlite") is False
        with pytest.raises(ShardMissing):
            await any_store.get_file("catalog-1.sqlite")
        with pytest.raises(ShardMissing):
            await any_store.fetch_file_to("nothing", tmp_path / "x")
        assert temp_files(any_store.path) == [] and temp_files(tmp_path / "s") == []

    @pytest.mark.parametrize("bad", ["", ".hidden", "../up", "a/b", "a..b", "x" * 200, "naïve", "a\n"])
    async def test_catalog_names_rejected(self, any_store, bad):
        with pytest.raises(ValueError):
            await any_store.put_file(bad, [b"x"])
        with pytest.raises(ValueError):
            await any_store.get_file(bad)
        assert os.listdir(any_store.path / "catalog") == []

    async def test_local_side_errors_are_not_store_errors(self, any_store, tmp_path):
        with pytest.raises(ShoalError, match="local file") as info:
            await any_store.copy_file_in("c", tmp_path / "does-not-exist")
        assert not isinstance(info.value, StoreUnavailable)
        await any_store.put_file("c", [b"x"])
        with pytest.raises(ShoalError, match="local file") as info:
            await any_store.fetch_file_to("c", tmp_path / "no-such-dir" / "c")
        assert not isinstance(info.value, StoreUnavailable)
        assert any_store.statistics().put_errors == 0 and any_store.statistics().get_errors == 0

    async def test_uninitialised_directory_is_not_written(self, any_store, tmp_path):
        # An unmounted disk leaves an empty mount point: put must not fill it.
        bare = tmp_path / "bare"
        bare.mkdir()
        s = Store(path=bare, pool_id=POOL)
        if isinstance(any_store, FaultyStore):
            s = FaultyStore(s, FaultPlan())
        with pytest.raises(StoreUnavailable, match="shards/"):
            await s.put(shard(), [b"x"])
        with pytest.raises(StoreUnavailable, match="catalog/"):
            await s.put_file("c", [b"x"])
        with pytest.raises(StoreUnlabelled):
            await s.probe()
        assert os.listdir(bare) == []


# ---------------------------------------------------------------- labels

class TestLabels:
    def test_roundtrip(self, tmp_path):
        label = Label.new(pool_id=POOL, pool_name="lab", replaces=uuid.uuid4().hex)
        write_label(tmp_path, label)
        assert read_label(tmp_path) == label
        assert check_label(tmp_path, POOL) == label
        assert check_label(tmp_path, POOL, label.store_id) == label
        assert (tmp_path / "shards").is_dir() and (tmp_path / "catalog").is_dir()
        assert temp_files(tmp_path) == []

    def test_absent(self, tmp_path):
        assert read_label(tmp_path) is None
        with pytest.raises(StoreUnlabelled, match="probably not mounted.*shoal init") as info:
            check_label(tmp_path, POOL)
        assert "same filesystem as its parent" in str(info.value)  # tmp_path is no mount point

    def test_foreign_never_written(self, tmp_path):
        label = Label.new(pool_id=OTHER_POOL, pool_name="elsewhere")
        write_label(tmp_path, label)
        before = tree(tmp_path)
        with pytest.raises(StoreForeign, match="'elsewhere'") as info:
            check_label(tmp_path, POOL)
        assert OTHER_POOL in str(info.value)
        assert tree(tmp_path) == before

    async def test_probe_refuses_foreign_and_unlabelled_before_writing(self, tmp_path):
        foreign = tmp_path / "foreign"
        foreign.mkdir()
        write_label(foreign, Label.new(pool_id=OTHER_POOL, pool_name="elsewhere"))
        bare = tmp_path / "bare"
        bare.mkdir()
        for path, error in ((foreign, StoreForeign), (bare, StoreUnlabelled)):
            before = tree(path)
            with pytest.raises(error):
                await Store(path=path, pool_id=POOL).probe()
            with pytest.raises(error):
                await Store(path=path, pool_id=POOL).check_label()
            assert tree(path) == before

    @pytest.mark.parametrize("faulty", [False, True])
    async def test_async_label_methods(self, tmp_path, faulty):
        s = Store(path=tmp_path, pool_id=POOL)
        s = FaultyStore(s, FaultPlan()) if faulty else s
        assert await s.read_label() is None
        label = Label.new(pool_id=POOL, pool_name="lab")
        await s.write_label(label)
        assert await s.read_label() == label
        assert await s.check_label() == label and s.store_id == label.store_id
        await s.put(shard(), [b"x"])  # write_label laid out shards/

    async def test_probe_notices_a_swapped_store(self, tmp_path):
        s = new_store(tmp_path / "a")
        await s.probe()
        write_label(s.path, Label.new(pool_id=POOL, pool_name="lab"))  # another store of the same pool
        with pytest.raises(StoreUnavailable, match="expected"):
            await s.probe()

    @pytest.mark.parametrize("raw", [b"", b"{", b"[]", b'{"format": 1}', b"\xff\xfe",
                                     b'{"format": 2, "pool_id": "%s", "pool_name": "a", "store_id": "%s", "created": 1}'
                                     % (POOL.encode(), POOL.encode()),
                                     b'{"format": 1, "pool_id": "../x", "pool_name": "a", "store_id": "%s", "created": 1}'
                                     % POOL.encode(),
                                     b" " * 70000])
    def test_corrupt(self, tmp_path, raw):
        (tmp_path / LABEL_NAME).write_bytes(raw)
        with pytest.raises(StoreUnavailable, match="label"):
            read_label(tmp_path)
        with pytest.raises(StoreUnavailable):
            check_label(tmp_path, POOL)

    def test_directory_problems(self, tmp_path):
        with pytest.raises(StoreUnavailable, match="does not exist"):
            check_label(tmp_path / "missing", POOL)
        with pytest.raises(StoreUnavailable, match="does not exist"):
            read_label(tmp_path / "missing")
        (tmp_path / "file").write_bytes(b"")
        with pytest.raises(StoreUnavailable, match="not a directory"):
            check_label(tmp_path / "file", POOL)
        (tmp_path / "d").mkdir()
        (tmp_path / "d" / LABEL_NAME).mkdir()
        with pytest.raises(StoreUnavailable, match="not a regular file"):
            read_label(tmp_path / "d")

    def test_label_validation(self):
        with pytest.raises(ValueError):
            Label(pool_id="XYZ", pool_name="a", store_id=POOL, created=0.0)
        with pytest.raises(ValueError):
            Label(pool_id=POOL, pool_name="a b", store_id=POOL, created=0.0)
        with pytest.raises(ValueError):
            Label(pool_id=POOL, pool_name="a", store_id=POOL, created=float("nan"))

    def test_is_empty_dir(self, tmp_path):
        assert is_empty_dir(tmp_path)
        (tmp_path / "lost+found").mkdir()
        assert is_empty_dir(tmp_path)
        (tmp_path / "x").write_bytes(b"")
        assert not is_empty_dir(tmp_path)

    def test_same_device_as_parent(self, tmp_path):
        assert same_device_as_parent(tmp_path)
        with tmpfs(tmp_path / "mnt") as mnt:
            # The kernel gives every mounted filesystem its own st_dev.
            assert not same_device_as_parent(mnt)


# ---------------------------------------------------------------- hostile names

class TestShardNames:
    @pytest.mark.parametrize("rel", [
        "../shards/ab/" + "ab" * 16 + ".0.1.2.shd",
        "shards/ab/../../etc/passwd",
        "/etc/passwd",
        "/shards/ab/" + "ab" * 16 + ".0.1.2.shd",
        "shards/ab/" + "AB" * 16 + ".0.1.2.shd",  # upper case
        "shards/ab/" + "ab" * 15 + "zz.0.1.2.shd",  # not hex
        "shards/ab/" + "ab" * 17 + ".0.1.2.shd",  # too long an id
        "shards/cd/" + "ab" * 16 + ".0.1.2.shd",  # wrong fan-out directory
        "shards/ab/" + "ab" * 16 + ".00.1.2.shd",  # leading zero
        "shards/ab/" + "ab" * 16 + ".0.1.255.shd",  # shard index past 254
        "shards/ab/" + "ab" * 16 + ".0.1.-1.shd",
        "shards/ab/" + "ab" * 16 + ".99999999999999999999.1.2.shd",
        "shards/ab/" + "ab" * 16 + ".\u0661.1.2.shd",  # an Arabic-Indic digit
        "shards/ab/" + "ab" * 16 + ".0.1.2.shd\n",
        "shards/ab/" + "ab" * 16 + ".0.1.2.shd/",
        "shards//ab/" + "ab" * 16 + ".0.1.2.shd",
        "shards/ab/" + "ab" * 16 + ".0.1.2.shd" + "x" * 5000,
        "shards/ab/.tmp-0123456789abcdef",
        "",
    ])
    def test_rejected(self, rel):
        assert ShardName.from_relpath(rel) is None

    def test_constructor_validates(self):
        for args in (("ab" * 16, -1, 0, 0), ("ab" * 16, 0, 0, 255), ("../x", 0, 0, 0), ("ab" * 16, True, 0, 0)):
            with pytest.raises(ValueError):
                ShardName(*args)

    @given(fid=st.text("0123456789abcdef", min_size=32, max_size=32),
           stripe=st.integers(0, 2**63 - 1), version=st.integers(0, 2**63 - 1), idx=st.integers(0, 254))
    def test_roundtrip(self, fid, stripe, version, idx):
        n = ShardName(fid, stripe, version, idx)
        rel = n.relpath()
        assert ShardName.from_relpath(rel) == n
        assert os.path.normpath(rel) == rel and rel.startswith(f"shards/{fid[:2]}/")

    @given(st.text(max_size=140))
    def test_anything_that_parses_stays_inside(self, rel):
        n = ShardName.from_relpath(rel)
        if n is not None:
            assert n.relpath() == rel and ".." not in rel and not rel.startswith("/")


# ---------------------------------------------------------------- real faults: full, read-only, stalled

async def test_full_store_fails_only_its_own_shards(small_fs, tmp_path):
    """A 1 MiB tmpfs answers ENOSPC (after a short write, which put must not
    take for success); the other stores of the stripe are unaffected."""
    full = new_store(small_fs)
    others = [new_store(tmp_path / f"o{i}") for i in range(2)]
    data = os.urandom(1536 * 1024)
    results: dict[int, BaseException | None] = {}

    async def one(i, s):
        try:
            await s.put(shard(i), [data[:1000], data[1000:]])
            results[i] = None
        except ShoalError as e:
            results[i] = e

    async with trio.open_nursery() as nursery:
        for i, s in enumerate([full, *others]):
            nursery.start_soon(one, i, s)
    assert isinstance(results[0], StoreFull)
    assert isinstance(results[0].__cause__, OSError) and results[0].__cause__.errno == errno.ENOSPC
    assert results[1] is None and results[2] is None
    for i, s in enumerate(others, 1):
        assert await s.get(shard(i)) == data
    assert temp_files(small_fs) == [] and await full.list_temp(0) == []
    assert not await full.exists(shard(0))
    assert full.statistics().put_errors == 1
    await full.put(shard(5), [b"small"])  # the space of the failed write came back
    assert await full.get(shard(5)) == b"small"


async def test_put_many_on_a_full_store_fails_the_shards_that_do_not_fit(small_fs):
    s = new_store(small_fs)
    big = os.urandom(700 * 1024)
    errors = await s.put_many([(shard(0), [big]), (shard(1), [big]), (shard(2), [b"small"])])
    assert errors[0] is None and isinstance(errors[1], StoreFull) and errors[2] is None
    assert await s.get(shard(0)) == big and await s.get(shard(2)) == b"small"
    assert not await s.exists(shard(1)) and temp_files(small_fs) == []
    assert s.statistics().put_errors == 1


async def test_read_only_store(small_fs):
    s = new_store(small_fs)
    await s.put(shard(), [b"before"])
    await trio.run_process(["mount", "-o", "remount,ro", str(small_fs)])
    try:
        with pytest.raises(StoreUnavailable) as info:
            await s.put(shard(1), [b"x"])
        assert not isinstance(info.value, StoreStalled)
        assert info.value.__cause__.errno == errno.EROFS  # the kernel's answer for a read-only mount
        with pytest.raises(StoreUnavailable):
            await s.probe()
        with pytest.raises(StoreUnavailable):
            await s.put_file("c", [b"x"])
        with pytest.raises(StoreUnavailable):
            await s.delete(shard())
        assert await s.get(shard()) == b"before"  # reads still work
    finally:
        await trio.run_process(["mount", "-o", "remount,rw", str(small_fs)])
    assert temp_files(small_fs) == []


async def test_faulty_stall_hits_the_deadline_while_others_work(tmp_path):
    deadline = 0.3
    stalled = FaultyStore(new_store(tmp_path / "a", deadline=deadline), FaultPlan.from_spec([("put", 1, "stall")]))
    healthy = new_store(tmp_path / "b", deadline=deadline)
    try:
        took = []

        async def stall():
            start = time.monotonic()
            with pytest.raises(StoreStalled, match="deadline"):
                await stalled.put(shard(), [b"x"])
            took.append(time.monotonic() - start)

        async with trio.open_nursery() as nursery:
            nursery.start_soon(stall)
            for i in range(5):
                await healthy.put(shard(i), [b"y"])
                assert await healthy.get(shard(i)) == b"y"
        assert took[0] < 5 * deadline
        assert stalled.statistics().stalls == 1 and stalled.statistics().put_errors == 1
        assert not await stalled.exists(shard())  # a stalled operation never happened
        await stalled.put(shard(), [b"second call is fine"])
    finally:
        stalled.release()


async def test_kernel_blocked_call_is_abandoned_and_keeps_its_thread(tmp_path):
    """open(2) of a FIFO blocks in the kernel until a writer comes, like a hung
    mount. With concurrency=1 the abandoned thread keeps the store's only
    thread token until it really ends (trio.to_thread.run_sync's documented
    behaviour), so the next call stalls too, and another store is unaffected."""
    deadline = 0.3
    s = new_store(tmp_path / "a", deadline=deadline, concurrency=1)
    other = new_store(tmp_path / "b", deadline=deadline, concurrency=1)
    fifo = tmp_path / "a" / "hung"
    os.mkfifo(fifo)

    def hang():
        os.close(os.open(fifo, os.O_RDONLY))

    try:
        start = time.monotonic()
        with pytest.raises(StoreStalled):
            await s.run_blocking("get", hang)
        assert time.monotonic() - start < 5 * deadline
        with pytest.raises(StoreStalled):  # waits for the token the hung thread holds
            await s.get(shard())
        await other.put(shard(), [b"other store works"])
        assert await other.get(shard()) == b"other store works"
        assert s.statistics().stalls == 2
    finally:
        os.close(os.open(fifo, os.O_WRONLY | os.O_NONBLOCK))  # a writer: the blocked open returns
    with trio.fail_after(10):
        while True:  # the token comes back once the thread has finished
            try:
                await s.put(shard(), [b"back"])
                break
            except StoreStalled:
                pass
    assert await s.get(shard()) == b"back"


async def test_stall_with_virtual_clock(tmp_path, autojump_clock):
    # Only the stalled call runs: a real thread doing real I/O would also
    # look idle to the autojump clock and hit the deadline at once.
    s = FaultyStore(new_store(tmp_path / "a", deadline=30.0), FaultPlan.from_spec([("get", None, "stall")]))
    try:
        start = trio.current_time()
        with pytest.raises(StoreStalled):
            await s.get(shard())
        assert trio.current_time() - start == pytest.approx(30.0)
    finally:
        s.release()


# ---------------------------------------------------------------- FaultyStore faults and crashes

async def test_injected_errors_and_corruption(tmp_path):
    s = FaultyStore(new_store(tmp_path / "a"), FaultPlan.from_spec([
        ("put", 2, "full"), ("put", 3, "unavailable"), ("get", 1, "corrupt"), ("probe", None, "unavailable"),
    ]))
    await s.put(shard(0), [b"abcdef"])
    with pytest.raises(StoreFull):
        await s.put(shard(1), [b"x"])
    with pytest.raises(StoreUnavailable):
        await s.put(shard(2), [b"x"])
    await s.put(shard(3), [b"x"])
    assert await s.get(shard(0)) == b"abc" + bytes([ord("d") ^ 0xFF]) + b"ef"
    assert await s.get(shard(0)) == b"abcdef"
    for _ in range(2):
        with pytest.raises(StoreUnavailable):
            await s.probe()
    assert {n for n, _ in await s.list_shards()} == {shard(0), shard(3)}


def test_plan_validation():
    for spec in ([("putt", 1, "full")], [("put", 0, "full")], [("get", 1, "crash")], [("put", 1, "corrupt")],
                 [("put", 1, "explode")]):
        with pytest.raises(ValueError):
            FaultPlan.from_spec(spec)
    assert FaultPlan.from_spec([("get", None, "corrupt"), ("get", 2, "stall")]).action_for("get", 2) == "corrupt"


@pytest.mark.parametrize("action", ["crash", "crash_late"])
async def test_crash_mid_put_leaves_only_a_temp_file(tmp_path, action):
    s = FaultyStore(new_store(tmp_path / "a"), FaultPlan.from_spec([("put", 2, action)]))
    await s.put(shard(0), [b"durable"])
    with pytest.raises(StoreUnavailable, match="crash"):
        await s.put(shard(1), [b"in flight"])
    assert s.crashed
    with pytest.raises(StoreUnavailable, match="crashed"):
        await s.get(shard(0))
    s.restart()
    assert await s.get(shard(0)) == b"durable"
    assert not await s.exists(shard(1))  # no final file, not even a partial one
    temps = await s.list_temp(0)
    assert len(temps) == 1 and temps[0].startswith("shards/ab/.tmp-")
    assert (s.path / temps[0]).read_bytes() == b"in flight"
    assert await s.remove_temp(temps[0])
    assert {n for n, _ in await s.list_shards()} == {shard(0)}


async def test_crash_while_puts_are_in_flight(tmp_path):
    s = FaultyStore(new_store(tmp_path / "a"), FaultPlan.from_spec([("put_file", 1, "pause")]))
    try:
        await s.put(shard(0), [b"durable"])
        async with trio.open_nursery() as nursery:
            async def write():
                with pytest.raises(StoreUnavailable, match="crash"):
                    await s.put_file("catalog-7", [b"half"])
            nursery.start_soon(write)
            await s.paused()
            await s.crash()
        with pytest.raises(StoreUnavailable):
            await s.put(shard(1), [b"x"])
        s.restart()
        assert await s.list_files() == []
        assert await s.list_temp(0) != []
        assert await s.get(shard(0)) == b"durable"
    finally:
        s.release()


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(spec=st.lists(st.tuples(st.just("put"), st.integers(1, 6),
                               st.sampled_from(["unavailable", "full", "crash", "crash_late"])), max_size=4))
async def test_acknowledged_puts_survive_any_plan(tmp_path_factory, spec):
    """Whatever the plan: every put that returned is readable after a restart,
    and every put that raised left no final file."""
    s = FaultyStore(new_store(tmp_path_factory.mktemp("h")), FaultPlan.from_spec(spec))
    acked, failed = [], []
    for i in range(6):
        try:
            await s.put(shard(i), [b"payload-%d" % i])
            acked.append(i)
        except StoreUnavailable:
            failed.append(i)
            if s.crashed:
                s.restart()
        except StoreFull:
            failed.append(i)
    for i in acked:
        assert await s.get(shard(i)) == b"payload-%d" % i
    for i in failed:
        assert not await s.exists(shard(i))


def test_known_ops_and_actions_are_listed():
    # The lists hypothesis strategies draw from cover every Store method a pool calls.
    for op in ("put", "get", "get_prefix", "delete", "list_shards", "probe", "space", "put_file", "get_file"):
        assert op in OPS and callable(getattr(Store, op))
    assert set(ACTIONS) >= {"unavailable", "full", "stall", "corrupt", "crash"}

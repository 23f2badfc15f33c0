"""`shoal mount` through a real FUSE mount: ordinary tools and POSIX semantics.

Every check compares the mount with something outside Shoal, named in a
comment beside it: the kernel's own filesystem (a plain directory under
tmp_path, ext4 or whatever /tmp is), or an ordinary tool (cp, dd, cmp,
sha256sum, tar, rsync, fio) acting as a general-purpose reference.

Most tests share one mount (module scope: a six-store k=4 n=6 w=5 pool on
tmpfs, 64 KiB stripes, so multi-stripe files stay small); each gets its own
directory in it, and after each test the daemon must still be alive and its
log free of new errors. Tests that need a pool of their own (space
accounting, exits, faults) use ``make_pool``. The helpers here are shared
with test_mount_faults.py and test_mount_stateful.py.
"""
from __future__ import annotations

import ctypes
import errno
import hashlib
import json
import mmap
import os
import random
import re
import stat
import subprocess
import sys
import threading
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import pytest

from mounting import (
    BoundStore, MountProcess, mount_tmpfs, requires_fuse, requires_root, sha256sum, shoal_argv, unmount_all, wait_for,
    write_pool_config,
)

pytestmark = [pytest.mark.fuse, requires_fuse, requires_root]

KiB, MiB = 1 << 10, 1 << 20
STRIPE = 64 * KiB
REPO = Path(__file__).resolve().parent.parent


# -- helpers shared by the mount tests -------------------------------------------------


def run(*argv: object, ok: tuple[int, ...] = (0,), timeout: float = 120, **kw) -> subprocess.CompletedProcess:
    """Run a command; its exit status must be in ok."""
    r = subprocess.run([os.fspath(a) if isinstance(a, os.PathLike) else str(a) for a in argv],
                       capture_output=True, text=True, timeout=timeout, cwd=kw.pop("cwd", REPO), **kw)
    assert r.returncode in ok, f"{argv} exited {r.returncode}:\n{r.stdout[-2000:]}\n{r.stderr[-2000:]}"
    return r


def instrument_bytes(rng: random.Random, size: int) -> bytes:
    """Bytes standing in for a spectrometer run: seeded, incompressible."""
    return rng.randbytes(size)


def make_run_tree(root: Path, seed: int = 7) -> Path:
    """A small tree of instrument runs: raw spectra of awkward sizes, metadata,
    an empty file, a nested calibration folder, a symlink and odd modes."""
    rng = random.Random(seed)
    root.mkdir(parents=True, exist_ok=True)
    sizes = [0, 1, 4095, STRIPE - 1, STRIPE, STRIPE + 1, 3 * STRIPE, 3 * STRIPE + 517, 700 * KiB]
    for i, size in enumerate(sizes):
        run_dir = root / f"spectrometer-{i % 3}" / f"run-{i:04d}"
        run_dir.mkdir(parents=True, exist_ok=True)
        (run_dir / "spectrum.raw").write_bytes(instrument_bytes(rng, size))
        meta = {"run": i, "detector": "CCD-3", "exposure_ms": rng.randint(1, 999)}
        (run_dir / "meta.json").write_text(json.dumps(meta))
    cal = root / "calibration" / "2024" / "lamp"
    cal.mkdir(parents=True)
    (cal / "neon lines.txt").write_text("\n".join(f"{rng.uniform(500, 700):.4f}" for _ in range(50)))
    (cal / "empty.log").write_bytes(b"")
    os.chmod(cal / "neon lines.txt", 0o640)
    os.chmod(root / "calibration" / "2024", 0o750)
    os.symlink("spectrometer-0/run-0000", root / "latest")
    return root


def outcome(fn: Callable[[], object]) -> tuple[str, object]:
    """('ok', value) or ('error', errno name): comparable across filesystems."""
    try:
        return ("ok", fn())
    except OSError as e:
        return ("error", errno.errorcode.get(e.errno, e.errno))


def on_both(op: Callable[[Path], object], mnt: Path, ref: Path) -> tuple[str, object]:
    """Apply op to the mount and to the reference directory; the outcomes must agree."""
    got = outcome(lambda: op(mnt))
    want = outcome(lambda: op(ref))
    assert got == want, f"shoal gave {got}, the kernel's own filesystem {want}"
    return got


def tree_view(root: Path) -> dict[bytes, dict]:
    """Every entry under root: type, mode, nlink, size, content digest, link
    target and user xattrs; the parts that must match between filesystems."""
    out: dict[bytes, dict] = {}
    broot = os.fsencode(root)
    for dirpath, dirnames, filenames in os.walk(broot):
        for name in sorted(dirnames + filenames):
            p = os.path.join(dirpath, name)
            st = os.lstat(p)
            e = {"mode": oct(st.st_mode), "nlink": st.st_nlink}
            if stat.S_ISREG(st.st_mode):
                with open(p, "rb") as f:
                    e["sha256"] = hashlib.sha256(f.read()).hexdigest()
                e["size"] = st.st_size
            elif stat.S_ISLNK(st.st_mode):
                e["target"] = os.readlink(p)
                e["size"] = st.st_size
            if stat.S_ISREG(st.st_mode) or stat.S_ISDIR(st.st_mode):
                e["xattrs"] = sorted((x, os.getxattr(p, x)) for x in os.listxattr(p) if x.startswith("user."))
            out[os.path.relpath(p, broot)] = e
    return out


def shoal_init(cfg: Path) -> None:
    run(*shoal_argv("init", cfg))


def shoal_status(cfg: Path) -> dict:
    """`shoal status CONFIG --json` (exit 3 means some stripes are lost)."""
    return json.loads(run(*shoal_argv("status", cfg, "--json"), ok=(0, 3)).stdout)


def shard_bytes(paths: list[Path]) -> int:
    """Bytes of shard files on the stores, as the stores' own filesystem (tmpfs)
    lists them. Catalog mirrors, which the daemon also writes there, are left out."""
    total = 0
    for p in shard_files(paths):
        try:
            total += p.stat().st_size
        except FileNotFoundError:
            pass  # deleted by the daemon's garbage collection meanwhile
    return total


def shard_files(stores: list[Path]) -> list[Path]:
    return sorted(p for s in stores for p in (s / "shards").rglob("*.shd"))


def renameat2(old: Path, new: Path, flags: int) -> None:
    """renameat2(2) through libc; raises OSError."""
    libc = ctypes.CDLL(None, use_errno=True)
    fn = libc.renameat2
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    AT_FDCWD = -100
    if fn(AT_FDCWD, os.fsencode(old), AT_FDCWD, os.fsencode(new), flags) != 0:
        e = ctypes.get_errno()
        raise OSError(e, os.strerror(e), os.fspath(old))


RENAME_NOREPLACE, RENAME_EXCHANGE = 1, 2


def allowed_error_patterns(node: pytest.Item) -> list[re.Pattern[str]] | None:
    """None: no allow_errors mark; []: anything goes; else the allowed patterns."""
    marks = list(node.iter_markers("allow_errors"))
    if not marks:
        return None
    if any(not m.args for m in marks):
        return []
    return [re.compile(p) for m in marks for p in m.args]


def unexpected_errors(node: pytest.Item, lines: list[str]) -> list[str]:
    pats = allowed_error_patterns(node)
    if pats == []:
        return []
    return [ln for ln in lines if not (pats and any(p.search(ln) for p in pats))]


@dataclass(kw_only=True)
class PoolUnderTest:
    """A pool made for one test: config, stores, and its mounts so far."""

    config: Path
    mountpoint: Path
    stores: list  # Path, or BoundStore when made with bound=True
    start: Callable[..., MountProcess]
    procs: list[MountProcess] = field(default_factory=list)

    @property
    def store_paths(self) -> list[Path]:
        return [s.path if isinstance(s, BoundStore) else s for s in self.stores]

    @property
    def proc(self) -> MountProcess:
        return self.procs[-1]

    def mount(self, wait: bool = True) -> MountProcess:
        mp = self.start(shoal_argv("mount", self.config, self.mountpoint), self.mountpoint, wait=wait)
        self.procs.append(mp)
        return mp

    def status(self) -> dict:
        return shoal_status(self.config)


@pytest.fixture
def make_pool(tmp_path, store_dirs, bound_stores, pool_config, mount_process):
    """make(k, n, w=None, *, stripe_size, store_size, bound=False, extra=None, mount=True)."""

    def make(k: int = 2, n: int = 3, w: int | None = None, *, stripe_size: int | str = STRIPE,
             store_size: str = "64m", bound: bool = False, extra: dict | None = None,
             mount: bool = True) -> PoolUnderTest:
        stores = bound_stores(n, store_size) if bound else store_dirs(n, store_size)
        paths = [s.path if bound else s for s in stores]
        cfg = pool_config(k, n, w, stripe_size=stripe_size, stores=paths, extra=extra)
        shoal_init(cfg)
        p = PoolUnderTest(config=cfg, mountpoint=tmp_path / "mnt", stores=stores, start=mount_process)
        if mount:
            p.mount()
        return p

    return make


@dataclass(kw_only=True)
class SharedMount:
    config: Path
    mountpoint: Path
    stores: list[Path]
    proc: MountProcess


@pytest.fixture(scope="module")
def shared_mount(tmp_path_factory):
    """One six-store pool (k=4 n=6 w=5, 64 KiB stripes) mounted for a whole module."""
    base = tmp_path_factory.mktemp("shared-pool")
    stores: list[Path] = []
    proc = None
    try:
        for i in range(6):
            stores.append(mount_tmpfs(base / "stores" / f"store{i}", "192m"))
        cfg = write_pool_config(base, k=4, n=6, w=5, stores=stores, stripe_size=STRIPE, state_dir=base / "state")
        shoal_init(cfg)
        proc = MountProcess(shoal_argv("mount", cfg, base / "mnt"), base / "mnt", log_dir=base / "logs")
        proc.wait_mounted()
        yield SharedMount(config=cfg, mountpoint=base / "mnt", stores=stores, proc=proc)
    finally:
        if proc is not None:
            proc.cleanup()
            print(proc.log_tail(60))
        for s in reversed(stores):
            unmount_all(s)


@pytest.fixture
def mnt(shared_mount, request) -> Path:
    """A fresh directory in the shared mount. Afterwards the daemon must be
    alive and must not have logged new errors."""
    name = re.sub(r"[^A-Za-z0-9_.-]+", "-", request.node.name)[:200]
    d = shared_mount.mountpoint / name
    d.mkdir()
    seen = len(shared_mount.proc.log_text().splitlines())
    yield d
    proc = shared_mount.proc
    assert proc.alive, f"the daemon died during the test:\n{proc.log_tail()}"
    new = proc.log_text().splitlines()[seen:]
    errors = [ln for ln in new if re.search(r"\b(ERROR|CRITICAL)\b|^Traceback", ln)]
    bad = unexpected_errors(request.node, errors)
    assert not bad, "the daemon logged errors:\n" + "\n".join(bad[:20])


@pytest.fixture
def ref(tmp_path) -> Path:
    """A plain directory on the kernel's own filesystem: the reference."""
    d = tmp_path / "reference"
    d.mkdir()
    return d


# -- ordinary tools -----------------------------------------------------------------------

# 130 stripes: more than one block of the 64 stripe records a reader fetches at a time.
BOUNDARY_SIZES = [0, 1, 4095, STRIPE - 1, STRIPE, STRIPE + 1, 2 * STRIPE, 3 * STRIPE, 3 * STRIPE + 12345,
                  40 * STRIPE + 3, 130 * STRIPE + 1]


@pytest.mark.parametrize("size", BOUNDARY_SIZES)
def test_cp_dd_cmp_sha256sum_across_stripe_boundaries(mnt, tmp_path, size):
    src = tmp_path / "run.raw"
    src.write_bytes(instrument_bytes(random.Random(size), size))
    run("cp", src, mnt / "cp.raw")
    run("cmp", src, mnt / "cp.raw")  # reference: cmp against the source on the kernel's filesystem
    assert sha256sum(mnt / "cp.raw") == sha256sum(src)  # reference: sha256sum of the source
    assert (mnt / "cp.raw").stat().st_size == size  # reference: the source's size
    # dd with a block size that fits no stripe: writes straddle boundaries.
    run("dd", f"if={src}", f"of={mnt / 'dd.raw'}", "bs=7777", "status=none")
    run("cmp", src, mnt / "dd.raw")  # reference: cmp against the source
    out = tmp_path / "out.raw"
    run("dd", f"if={mnt / 'dd.raw'}", f"of={out}", "bs=100003", "status=none")
    run("cmp", src, out)  # reference: cmp of dd's copy out, on the kernel's filesystem
    # dd conv=notrunc overwrites the middle in place, as on any filesystem.
    patch = tmp_path / "patch"
    patch.write_bytes(b"\xa5" * 5000)
    for target in (mnt / "dd.raw", out):
        run("dd", f"if={patch}", f"of={target}", "bs=1000", f"seek={size // 2000}", "conv=notrunc", "status=none")
    run("cmp", out, mnt / "dd.raw")  # reference: the same dd on the kernel's filesystem


def test_tar_tree_in_and_out(mnt, tmp_path):
    src = make_run_tree(tmp_path / "runs")
    archive = tmp_path / "runs.tar"
    run("tar", "-C", src, "-cf", archive, ".")
    (mnt / "runs").mkdir()
    run("tar", "-C", mnt / "runs", "-xpf", archive)
    # reference: tar's own compare mode checks contents, sizes, modes, mtimes and link targets.
    run("tar", "-C", mnt / "runs", "--compare", "-f", archive)
    back = tmp_path / "back.tar"
    run("tar", "-C", mnt / "runs", "-cf", back, ".")
    out = tmp_path / "out"
    out.mkdir()
    run("tar", "-C", out, "-xpf", back)
    run("diff", "-r", "--no-dereference", src, out)  # reference: diff of the source tree and the round trip
    assert tree_view(mnt / "runs") == tree_view(src)  # reference: the source tree on the kernel's filesystem


def test_rsync_archive_then_checksum_dry_run_has_nothing_to_do(mnt, tmp_path):
    src = make_run_tree(tmp_path / "runs", seed=11)
    run("rsync", "-a", f"{src}/", f"{mnt / 'mirror'}/")
    # reference: rsync's checksum comparison; an itemized dry run lists every difference.
    r = run("rsync", "-a", "--checksum", "-n", "-i", f"{src}/", f"{mnt / 'mirror'}/")
    assert r.stdout.strip() == ""
    r = run("rsync", "-a", "--checksum", "-n", "-i", f"{mnt / 'mirror'}/", f"{src}/")
    assert r.stdout.strip() == ""
    # A changed file is found and fixed by rsync's delta transfer (in-place rewrite).
    data = bytearray((src / "spectrometer-2" / "run-0008" / "spectrum.raw").read_bytes())
    data[STRIPE + 5:STRIPE + 9] = b"\x00\x01\x02\x03"
    (src / "spectrometer-2" / "run-0008" / "spectrum.raw").write_bytes(bytes(data))
    r = run("rsync", "-a", "--checksum", "-i", "--inplace", "--no-whole-file", f"{src}/", f"{mnt / 'mirror'}/")
    assert "spectrum.raw" in r.stdout
    r = run("rsync", "-a", "--checksum", "-n", "-i", f"{src}/", f"{mnt / 'mirror'}/")
    assert r.stdout.strip() == ""  # reference: rsync's checksum comparison again


def test_dd_oflag_direct_works_or_fails_cleanly(mnt, tmp_path, shared_mount):
    src = tmp_path / "direct.raw"
    src.write_bytes(instrument_bytes(random.Random(3), 3 * STRIPE + 4096))
    r = subprocess.run(["dd", f"if={src}", f"of={mnt / 'direct.raw'}", "bs=64k", "oflag=direct", "status=none"],
                       capture_output=True, text=True, timeout=60)
    if r.returncode == 0:
        run("cmp", src, mnt / "direct.raw")  # reference: cmp against the source
        back = tmp_path / "back.raw"
        run("dd", f"if={mnt / 'direct.raw'}", f"of={back}", "bs=64k", "iflag=direct", "status=none")
        run("cmp", src, back)  # reference: cmp against the source
    else:
        assert "Transport endpoint" not in r.stderr, r.stderr
    # Either way the daemon is alive and serves another file.
    (mnt / "after").write_bytes(b"still here")
    assert (mnt / "after").read_bytes() == b"still here"
    assert shared_mount.proc.alive


@pytest.mark.slow
@pytest.mark.parametrize("job", [
    ["--rw=write", "--bs=128k", "--size=64m"],
    ["--rw=randwrite", "--bs=16k", "--size=32m"],
], ids=["sequential", "random"])
def test_fio_writes_verify_crc32c(mnt, tmp_path, job):
    # reference: fio's own verification (crc32c in every block, fatal on the first mismatch).
    # Run from tmp_path, without a verify state file: fio would leave one in its working directory.
    r = run("fio", "--name=shoal", f"--filename={mnt / 'fio.dat'}", *job, "--ioengine=psync", "--direct=0",
            "--verify=crc32c", "--verify_fatal=1", "--do_verify=1", "--verify_state_save=0", "--fallocate=none",
            "--end_fsync=1", "--randrepeat=1", "--output-format=json", timeout=300, cwd=tmp_path)
    report = json.loads(r.stdout[r.stdout.index("{"):])
    (result,) = report["jobs"]
    assert result["error"] == 0
    assert result["write"]["io_bytes"] == int(job[2].split("=")[1][:-1]) * MiB
    assert result["read"]["io_bytes"] == result["write"]["io_bytes"]  # every block was read back and verified


# -- file contents ------------------------------------------------------------------------


def test_random_offset_pwrites_match_a_plain_file(mnt, ref):
    rng = random.Random(20240611)
    span = 5 * STRIPE + 999
    fds = [os.open(d / "scan.raw", os.O_CREAT | os.O_RDWR, 0o644) for d in (mnt, ref)]
    try:
        for step in range(300):
            off = rng.randrange(span) if rng.random() < 0.9 else rng.randrange(span, 3 * span)
            length = rng.choice([1, 17, 4096, STRIPE - 3, STRIPE, STRIPE + 11, rng.randrange(1, 3 * STRIPE)])
            data = instrument_bytes(rng, length)
            for fd in fds:
                assert os.pwrite(fd, data, off) == len(data)
            if step % 25 == 0:
                # reads see writes not yet committed; reference: pread on the plain file
                at, n = rng.randrange(3 * span), rng.randrange(1, 2 * STRIPE)
                assert os.pread(fds[0], n, at) == os.pread(fds[1], n, at)
                assert os.fstat(fds[0]).st_size == os.fstat(fds[1]).st_size
            if step % 100 == 99:
                os.fsync(fds[0])
    finally:
        for fd in fds:
            os.close(fd)
    # reference: the same pwrites on a plain file on the kernel's filesystem
    assert (mnt / "scan.raw").read_bytes() == (ref / "scan.raw").read_bytes()


def test_truncate_down_and_up_holes_read_as_zeros(mnt, ref):
    rng = random.Random(5)
    data = instrument_bytes(rng, 3 * STRIPE + 700)
    steps: list[Callable[[Path], object]] = [
        lambda d: (d / "t").write_bytes(data),
        lambda d: os.truncate(d / "t", STRIPE + 100),
        lambda d: os.truncate(d / "t", 4 * STRIPE + 1),  # up: the cut-off bytes must come back as zeros
        lambda d: os.truncate(d / "t", STRIPE),
        lambda d: os.truncate(d / "t", 0),
        lambda d: os.truncate(d / "t", 10 * STRIPE + 5),  # a file that is all hole
    ]
    for step in steps:
        on_both(step, mnt, ref)
        # reference: the same truncates on the kernel's filesystem
        assert (mnt / "t").read_bytes() == (ref / "t").read_bytes()
        assert (mnt / "t").stat().st_size == (ref / "t").stat().st_size
    # ftruncate on an open file with uncommitted writes on both sides of the cut
    fds = [os.open(d / "t", os.O_RDWR) for d in (mnt, ref)]
    try:
        for fd in fds:
            os.pwrite(fd, data, STRIPE // 2)
            os.ftruncate(fd, 2 * STRIPE + 3)
            os.pwrite(fd, b"tail", 3 * STRIPE)
        assert os.pread(fds[0], 4 * STRIPE, 0) == os.pread(fds[1], 4 * STRIPE, 0)  # reference: the plain file
    finally:
        for fd in fds:
            os.close(fd)
    assert (mnt / "t").read_bytes() == (ref / "t").read_bytes()  # reference: the plain file


def test_o_append_o_excl_o_trunc(mnt, ref):
    def append(d: Path):
        fd = os.open(d / "log", os.O_CREAT | os.O_WRONLY | os.O_APPEND, 0o644)
        try:
            os.write(fd, b"first line\n")
            os.lseek(fd, 0, os.SEEK_SET)  # O_APPEND ignores the position
            os.write(fd, b"x" * (STRIPE + 10))
            other = os.open(d / "log", os.O_WRONLY | os.O_APPEND)
            os.write(other, b"from another descriptor\n")
            os.close(other)
            os.write(fd, b"last\n")
        finally:
            os.close(fd)
        return (d / "log").read_bytes()

    on_both(append, mnt, ref)  # reference: O_APPEND on the kernel's filesystem
    on_both(lambda d: os.close(os.open(d / "log", os.O_CREAT | os.O_EXCL | os.O_WRONLY)), mnt, ref)  # EEXIST
    on_both(lambda d: os.symlink("nowhere", d / "dangling"), mnt, ref)
    on_both(lambda d: os.close(os.open(d / "dangling", os.O_CREAT | os.O_EXCL | os.O_WRONLY)), mnt, ref)  # EEXIST
    on_both(lambda d: os.close(os.open(d / "new", os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o600)), mnt, ref)

    def trunc(d: Path):
        fd = os.open(d / "log", os.O_WRONLY | os.O_TRUNC)
        size_at_open = os.fstat(fd).st_size
        os.write(fd, b"short")
        os.close(fd)
        return size_at_open, (d / "log").read_bytes()

    on_both(trunc, mnt, ref)  # reference: O_TRUNC on the kernel's filesystem
    assert [(p.name, oct(p.stat().st_mode)) for p in sorted(mnt.iterdir()) if p.name != "dangling"] == \
        [(p.name, oct(p.stat().st_mode)) for p in sorted(ref.iterdir()) if p.name != "dangling"]


def test_rename_over_an_open_file_keeps_its_old_content(mnt, ref):
    rng = random.Random(9)
    old, new = instrument_bytes(rng, 2 * STRIPE + 3), instrument_bytes(rng, STRIPE + 5)
    for d in (mnt, ref):
        (d / "current").write_bytes(old)
        (d / "incoming").write_bytes(new)
    fds = [os.open(d / "current", os.O_RDWR) for d in (mnt, ref)]
    try:
        for d in (mnt, ref):
            os.rename(d / "incoming", d / "current")
        # reference: the kernel's filesystem keeps the replaced inode alive for open descriptors
        assert os.pread(fds[0], 4 * STRIPE, 0) == os.pread(fds[1], 4 * STRIPE, 0) == old
        assert os.fstat(fds[0]).st_nlink == os.fstat(fds[1]).st_nlink == 0
        for fd in fds:
            os.pwrite(fd, b"edited after replacement", 10)
        assert os.pread(fds[0], 4 * STRIPE, 0) == os.pread(fds[1], 4 * STRIPE, 0)
        assert (mnt / "current").read_bytes() == new  # the name now holds the new file
    finally:
        for fd in fds:
            os.close(fd)
    assert tree_view(mnt) == tree_view(ref)  # reference: the kernel's filesystem


def test_open_unlinked_file_lives_until_last_close_then_space_is_reclaimed(make_pool, ref):
    pool = make_pool(2, 3, stripe_size=STRIPE)
    mnt = pool.mountpoint
    stores = pool.store_paths
    (mnt / "warmup").write_bytes(b"w")
    base = shard_bytes(stores)
    data = instrument_bytes(random.Random(1), 40 * STRIPE)
    (mnt / "big.raw").write_bytes(data)
    (ref / "big.raw").write_bytes(data)
    # reference: the shard files on the stores' tmpfs (n/k = 1.5 times the data)
    wait_for(lambda: shard_bytes(stores) >= base + len(data) * 3 // 2, "shards of big.raw on the stores")
    fds = [os.open(d / "big.raw", os.O_RDWR) for d in (mnt, ref)]
    readers = [os.open(d / "big.raw", os.O_RDONLY) for d in (mnt, ref)]
    try:
        for d in (mnt, ref):
            os.unlink(d / "big.raw")
        assert os.listdir(mnt) == ["warmup"]
        for fd in fds:
            os.pwrite(fd, b"written after unlink", 3 * STRIPE - 4)
            os.fsync(fd)
        # reference: an unlinked file on the kernel's filesystem stays readable and writable
        assert os.pread(readers[0], len(data), 0) == os.pread(readers[1], len(data), 0)
        assert os.fstat(fds[0]).st_nlink == 0
        for fd in fds:
            os.close(fd)
        fds = []
        assert os.pread(readers[0], len(data), 0) == os.pread(readers[1], len(data), 0)  # one descriptor left
    finally:
        for fd in fds + readers:
            os.close(fd)
    # reference: the shard files on the stores' tmpfs, gone once the last descriptor is closed
    wait_for(lambda: shard_bytes(stores) <= base, "space of the unlinked file reclaimed")


def test_concurrent_writers_on_different_files_and_on_one_file(mnt, ref, tmp_path):
    rng = random.Random(77)
    blobs = {f"run-{i}.raw": instrument_bytes(rng, rng.randrange(STRIPE, 9 * STRIPE)) for i in range(8)}
    errors: list[BaseException] = []

    def writer(name: str) -> None:
        try:
            data = blobs[name]
            with open(mnt / name, "wb") as f:
                for i in range(0, len(data), 10000):
                    f.write(data[i:i + 10000])
        except BaseException as e:  # pragma: no cover - reported below
            errors.append(e)

    threads = [threading.Thread(target=writer, args=(n,)) for n in blobs]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors
    for name, data in blobs.items():
        assert sha256sum(mnt / name) == hashlib.sha256(data).hexdigest()  # reference: sha256sum vs. the data

    # Processes writing one file at different offsets; region edges fall inside stripes.
    region = STRIPE + STRIPE // 2 + 333
    parts = [instrument_bytes(rng, region) for _ in range(4)]
    for d in (mnt, ref):
        (d / "shared.raw").write_bytes(b"")
    script = ("import os, sys\n"
              "path, off, src = sys.argv[1], int(sys.argv[2]), sys.argv[3]\n"
              "data = open(src, 'rb').read()\n"
              "fd = os.open(path, os.O_WRONLY)\n"
              "for i in range(0, len(data), 4096):\n"
              "    os.pwrite(fd, data[i:i + 4096], off + i)\n"
              "os.close(fd)\n")
    srcs = []
    for i, p in enumerate(parts):
        s = tmp_path / f"part{i}"
        s.write_bytes(p)
        srcs.append(s)
    procs = [subprocess.Popen([sys.executable, "-c", script, str(mnt / "shared.raw"), str(i * region), str(s)])
             for i, s in enumerate(srcs)]
    assert [p.wait(120) for p in procs] == [0] * len(procs)
    with open(ref / "shared.raw", "r+b") as f:
        for i, p in enumerate(parts):
            f.seek(i * region)
            f.write(p)
    # reference: the same writes applied to a plain file on the kernel's filesystem
    assert (mnt / "shared.raw").read_bytes() == (ref / "shared.raw").read_bytes()


def test_concurrent_writers_under_a_tight_memory_cap(make_pool, tmp_path):
    # Regression: with memory_cap at four stripes, writers keep pushing each
    # other's half-written stripes out. A write that reached such a stripe
    # while it was on its way out found no base (not dirty any more, not yet
    # in flight) and replaced the earlier bytes of the stripe with zeros.
    pool = make_pool(4, 6, 5, store_size="128m", extra={"pool": {"memory_cap": 4 * STRIPE}})
    mnt = pool.mountpoint
    errors: list[BaseException] = []

    def blob(i: int, rnd: int) -> bytes:
        return instrument_bytes(random.Random(1000 * rnd + i), 10 * STRIPE + i)

    def writer(i: int, rnd: int) -> None:
        try:
            data = blob(i, rnd)
            with open(mnt / f"run-{rnd}-{i}.raw", "wb") as f:
                for at in range(0, len(data), 3000):
                    f.write(data[at:at + 3000])
        except BaseException as e:  # pragma: no cover - reported below
            errors.append(e)

    for rnd in range(3):
        threads = [threading.Thread(target=writer, args=(i, rnd)) for i in range(6)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(120)
        assert not errors
    bad = [(rnd, i) for rnd in range(3) for i in range(6)
           if sha256sum(mnt / f"run-{rnd}-{i}.raw") != hashlib.sha256(blob(i, rnd)).hexdigest()]
    assert bad == []  # reference: sha256sum of each file against the bytes written


def test_concurrent_direct_readers_with_a_tiny_stripe_cache(make_pool):
    # Regression: readers waiting for the same stripe fetch, whose result the
    # (smaller than a stripe) cache had not kept, each started a new fetch; the
    # second overwrote the first's marker; one of them failed with a KeyError
    # (answered as EIO) and the readers waiting on it hung. O_DIRECT keeps
    # the kernel's page cache out of the way.
    pool = make_pool(4, 6, 5, extra={"pool": {"memory_cap": 4 * STRIPE}})
    data = instrument_bytes(random.Random(12), 8 * STRIPE)
    (pool.mountpoint / "spectra.raw").write_bytes(data)
    errors: list[BaseException] = []
    wrong: list[int] = []

    def reader(seed: int) -> None:
        rng = random.Random(seed)
        buf = mmap.mmap(-1, 4 * 4096)  # page-aligned, as O_DIRECT wants
        try:
            fd = os.open(pool.mountpoint / "spectra.raw", os.O_RDONLY | os.O_DIRECT)
            try:
                for _ in range(150):
                    at = rng.randrange(len(data) // 4096 - 4) * 4096
                    n = os.preadv(fd, [buf], at)
                    if bytes(buf[:n]) != data[at:at + n]:  # reference: the bytes written
                        wrong.append(at)
            finally:
                os.close(fd)
        except BaseException as e:  # pragma: no cover - reported below
            errors.append(e)

    threads = [threading.Thread(target=reader, args=(i,), daemon=True) for i in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(120)
    # The lost marker also left the other waiters hanging for ever.
    assert not [t for t in threads if t.is_alive()], "readers hang"
    assert not errors and not wrong


# -- namespace ----------------------------------------------------------------------------


def test_mkdir_rmdir_symlink_hard_links(mnt, ref):
    steps: list[Callable[[Path], object]] = [
        lambda d: os.mkdir(d / "runs"),
        lambda d: os.mkdir(d / "runs"),  # EEXIST
        lambda d: os.mkdir(d / "runs" / "day1"),
        lambda d: os.stat(d / "runs").st_nlink,  # 2 + one subdirectory
        lambda d: (d / "runs" / "day1" / "spectrum.raw").write_bytes(b"\x01" * 3000),
        lambda d: os.rmdir(d / "runs"),  # ENOTEMPTY
        lambda d: os.rmdir(d / "runs" / "day1" / "spectrum.raw"),  # ENOTDIR
        lambda d: os.unlink(d / "runs" / "day1"),  # EISDIR
        lambda d: os.mkdir(d / "missing" / "sub"),  # ENOENT
        lambda d: os.symlink("day1/spectrum.raw", d / "runs" / "latest"),
        lambda d: os.readlink(d / "runs" / "latest"),
        lambda d: os.lstat(d / "runs" / "latest").st_size,
        lambda d: (d / "runs" / "latest").read_bytes(),
        lambda d: os.symlink("/nonexistent/target with spaces", d / "dangling"),
        lambda d: os.path.exists(d / "dangling"),
        lambda d: os.readlink(d / "runs" / "day1"),  # EINVAL: not a link
        lambda d: os.link(d / "runs" / "day1" / "spectrum.raw", d / "hard"),
        lambda d: (os.stat(d / "hard").st_nlink, os.stat(d / "runs" / "day1" / "spectrum.raw").st_nlink),
        lambda d: os.stat(d / "hard").st_ino == os.stat(d / "runs" / "day1" / "spectrum.raw").st_ino,
        lambda d: os.link(d / "runs" / "day1" / "spectrum.raw", d / "hard2"),
        lambda d: os.stat(d / "hard").st_nlink,
        lambda d: (d / "hard").write_bytes(b"through the second name"),
        lambda d: (d / "runs" / "day1" / "spectrum.raw").read_bytes(),
        lambda d: os.link(d / "runs", d / "dirlink"),  # EPERM: no hard links to directories
        lambda d: os.link(d / "hard", d / "hard2"),  # EEXIST
        lambda d: os.unlink(d / "runs" / "day1" / "spectrum.raw"),
        lambda d: (os.stat(d / "hard").st_nlink, (d / "hard2").read_bytes()),
        lambda d: os.rmdir(d / "runs" / "day1"),
        lambda d: os.unlink(d / "runs" / "latest"),
        lambda d: os.rmdir(d / "runs"),
        lambda d: os.stat(d / "runs"),  # ENOENT
        lambda d: os.stat(d).st_nlink,
    ]
    for step in steps:
        on_both(step, mnt, ref)  # reference: the same call on the kernel's filesystem
    assert tree_view(mnt) == tree_view(ref)  # reference: the kernel's filesystem


def test_chmod_chown_utimes_and_special_files(mnt, ref):
    steps: list[Callable[[Path], object]] = [
        lambda d: (d / "run.raw").write_bytes(b"spectrum" * 100),
        lambda d: os.chmod(d / "run.raw", 0o4751),
        lambda d: oct(os.stat(d / "run.raw").st_mode),
        lambda d: os.chown(d / "run.raw", 1234, 5678),
        lambda d: (os.stat(d / "run.raw").st_uid, os.stat(d / "run.raw").st_gid),
        lambda d: os.utime(d / "run.raw", ns=(1_000_000_123, 1_700_000_000_987_654_321)),
        lambda d: (os.stat(d / "run.raw").st_atime_ns, os.stat(d / "run.raw").st_mtime_ns),
        lambda d: os.symlink("run.raw", d / "link"),
        lambda d: os.utime(d / "link", ns=(5, 7), follow_symlinks=False),
        lambda d: (os.lstat(d / "link").st_mtime_ns, os.stat(d / "run.raw").st_mtime_ns),
        lambda d: os.chown(d / "link", 42, 43, follow_symlinks=False),
        lambda d: (os.lstat(d / "link").st_uid, os.stat(d / "run.raw").st_uid),
        lambda d: os.mkfifo(d / "fifo", 0o640),
        lambda d: (stat.S_ISFIFO(os.stat(d / "fifo").st_mode), oct(os.stat(d / "fifo").st_mode)),
        lambda d: os.mknod(d / "null", stat.S_IFCHR | 0o600, os.makedev(1, 3)),
        lambda d: (oct(os.stat(d / "null").st_mode), os.stat(d / "null").st_rdev == os.makedev(1, 3)),
        lambda d: os.chmod(d / "run.raw", 0o000),
        lambda d: (d / "run.raw").read_bytes()[:8],  # root reads it anyway
    ]
    for step in steps:
        on_both(step, mnt, ref)  # reference: the same call on the kernel's filesystem
    assert tree_view(mnt) == tree_view(ref)  # reference: the kernel's filesystem


def test_mmap_and_exec_through_the_mount(mnt, ref, tmp_path):
    size = 3 * STRIPE + 1234
    for d in (mnt, ref):
        (d / "map.raw").write_bytes(bytes(size))
        with open(d / "map.raw", "r+b") as f, mmap.mmap(f.fileno(), size) as m:
            m[100:110] = b"0123456789"
            m[STRIPE - 3:STRIPE + 3] = b"across"
            m[size - 4:] = b"tail"
            m.flush()
    # reference: the same shared mapping of a plain file on the kernel's filesystem
    assert (mnt / "map.raw").read_bytes() == (ref / "map.raw").read_bytes()
    with open(mnt / "map.raw", "rb") as f, mmap.mmap(f.fileno(), size, prot=mmap.PROT_READ) as m:
        assert m[STRIPE - 3:STRIPE + 3] == b"across"
    # The kernel pages a program in through the mount's read handler.
    true = Path("/usr/bin/true") if Path("/usr/bin/true").exists() else Path("/bin/true")
    run("cp", "-p", true, mnt / "true")
    run(mnt / "true")  # reference: the same program exits 0 from its own filesystem
    run("cmp", true, mnt / "true")  # reference: cmp against the original


def test_xattrs_get_set_list_remove(mnt, ref):
    blob = bytes(range(256)) * 7  # ext4 keeps a value within one block
    steps: list[Callable[[Path], object]] = [
        lambda d: (d / "run.raw").write_bytes(b"spectrum"),
        lambda d: os.mkdir(d / "folder"),
        lambda d: os.symlink("run.raw", d / "link"),
        lambda d: os.setxattr(d / "run.raw", "user.instrument", b"spectrometer-7"),
        lambda d: os.setxattr(d / "run.raw", "user.empty", b""),
        lambda d: os.setxattr(d / "run.raw", "user.calibration", blob),
        lambda d: os.setxattr(d / "folder", "user.owner", "lab \u00e9quipe".encode()),
        lambda d: os.getxattr(d / "run.raw", "user.instrument"),
        lambda d: os.getxattr(d / "run.raw", "user.empty"),
        lambda d: os.getxattr(d / "run.raw", "user.calibration"),
        lambda d: os.getxattr(d / "run.raw", "user.absent"),  # ENODATA
        lambda d: sorted(os.listxattr(d / "run.raw")),
        lambda d: os.getxattr(d / "link", "user.instrument"),  # follows the link
        lambda d: os.setxattr(d / "link", "user.x", b"1", follow_symlinks=False),  # EPERM on a symlink
        lambda d: os.setxattr(d / "run.raw", "user.instrument", b"x", os.XATTR_CREATE),  # EEXIST
        lambda d: os.setxattr(d / "run.raw", "user.new", b"x", os.XATTR_REPLACE),  # ENODATA
        lambda d: os.setxattr(d / "run.raw", "user.new", b"created", os.XATTR_CREATE),
        lambda d: os.setxattr(d / "run.raw", "user.new", b"replaced", os.XATTR_REPLACE),
        lambda d: os.getxattr(d / "run.raw", "user.new"),
        lambda d: os.setxattr(d / "run.raw", "user.instrument", b"replaced"),
        lambda d: os.getxattr(d / "run.raw", "user.instrument"),
        lambda d: os.removexattr(d / "run.raw", "user.empty"),
        lambda d: os.removexattr(d / "run.raw", "user.empty"),  # ENODATA
        lambda d: sorted(os.listxattr(d / "run.raw")),
        lambda d: sorted(os.listxattr(d / "folder")),
        lambda d: os.rename(d / "run.raw", d / "renamed.raw"),
        lambda d: os.getxattr(d / "renamed.raw", "user.calibration"),  # xattrs travel with the inode
    ]
    for step in steps:
        on_both(step, mnt, ref)  # reference: the same call on the kernel's filesystem
    assert tree_view(mnt) == tree_view(ref)  # reference: the kernel's filesystem


def test_names_arbitrary_bytes_and_length_limits(mnt, ref):
    names = [b"\xff\xfe spaces \t and unicode \xc3\xa9\xe2\x84\xab\xf0\x9f\x94\xac", b"-leading-dash", b".hidden",
             b"...", b"new\nline", b"\x01\x02\x7f", b"a" * 255, "\u00e9" .encode() * 127 + b"x"]
    for name in names:
        on_both(lambda d: os.close(os.open(os.path.join(os.fsencode(d), name), os.O_CREAT | os.O_WRONLY, 0o644)),
                mnt, ref)
        on_both(lambda d: os.stat(os.path.join(os.fsencode(d), name)).st_size, mnt, ref)
    on_both(lambda d: sorted(os.listdir(os.fsencode(d))), mnt, ref)  # reference: listdir of the kernel's filesystem
    too_long = b"b" * 256
    for op in (lambda d: os.open(os.path.join(os.fsencode(d), too_long), os.O_CREAT | os.O_WRONLY, 0o644),
               lambda d: os.mkdir(os.path.join(os.fsencode(d), too_long)),
               lambda d: os.symlink(b"x", os.path.join(os.fsencode(d), too_long)),
               lambda d: os.rename(os.path.join(os.fsencode(d), b"..."), os.path.join(os.fsencode(d), too_long)),
               lambda d: os.link(os.path.join(os.fsencode(d), b"..."), os.path.join(os.fsencode(d), too_long)),
               lambda d: os.stat(os.path.join(os.fsencode(d), too_long))):
        assert on_both(op, mnt, ref) == ("error", "ENAMETOOLONG")  # reference: the kernel's filesystem
    # a long path made of long names
    deep = os.fsencode(mnt)
    for i in range(12):
        deep = os.path.join(deep, bytes([0x61 + i]) * 250)
        os.mkdir(deep)
    with open(os.path.join(deep, b"leaf"), "wb") as f:
        f.write(b"deep")
    with open(os.path.join(deep, b"leaf"), "rb") as f:
        assert f.read() == b"deep"


def test_rename_noreplace_and_exchange(mnt, ref):
    steps: list[Callable[[Path], object]] = [
        lambda d: (d / "a").write_bytes(b"A" * (STRIPE + 1)),
        lambda d: (d / "b").write_bytes(b"B" * 10),
        lambda d: os.mkdir(d / "dir"),
        lambda d: (d / "dir" / "inside").write_bytes(b"i"),
        lambda d: os.mkdir(d / "empty"),
        lambda d: renameat2(d / "a", d / "b", RENAME_NOREPLACE),  # EEXIST
        lambda d: (d / "a").read_bytes()[:3] + (d / "b").read_bytes()[:3],
        lambda d: renameat2(d / "a", d / "c", RENAME_NOREPLACE),
        lambda d: renameat2(d / "c", d / "b", RENAME_EXCHANGE),
        lambda d: ((d / "c").read_bytes()[:3], (d / "b").stat().st_size),
        lambda d: renameat2(d / "c", d / "nothing", RENAME_EXCHANGE),  # ENOENT
        lambda d: renameat2(d / "b", d / "dir", RENAME_EXCHANGE),  # a file and a directory trade places
        lambda d: (os.path.isdir(d / "b"), (d / "dir").stat().st_size, os.listdir(d / "b")),
        lambda d: (os.stat(d).st_nlink, os.stat(d / "b").st_nlink),
        lambda d: renameat2(d / "b", d / "empty", RENAME_EXCHANGE | RENAME_NOREPLACE),  # EINVAL
        lambda d: os.rename(d / "c", d / "b"),  # a file over a directory: EISDIR
        lambda d: os.rename(d / "empty", d / "c"),  # a directory over a file: ENOTDIR
        lambda d: os.rename(d / "empty", d / "b"),  # over a non-empty directory: ENOTEMPTY
        lambda d: os.rename(d / "b", d / "b" / "loop"),  # into itself: EINVAL
        lambda d: os.rename(d / "b", d / "empty"),  # over an empty directory: fine
        lambda d: os.rename(d / "c", d / "c"),  # onto itself: nothing happens
        lambda d: os.rename(d / "dir", d / "empty" / "moved"),
        lambda d: sorted(os.listdir(d)),
    ]
    for step in steps:
        on_both(step, mnt, ref)  # reference: the same call on the kernel's filesystem
    assert tree_view(mnt) == tree_view(ref)  # reference: the kernel's filesystem


def scan_while_changing(d: Path) -> tuple[list[str], set[str], set[str], set[str]]:
    """List d with os.scandir while removing and adding entries mid-listing."""
    stay = {f"stay-{i:04d}" for i in range(500)}
    gone = {f"gone-{i:04d}" for i in range(200)}
    for name in sorted(stay | gone):
        (d / name).write_bytes(b"")
    added: set[str] = set()
    seen: list[str] = []
    with os.scandir(d) as it:
        for i, entry in enumerate(it):
            seen.append(entry.name)
            if i == 20:
                for name in sorted(gone):
                    os.unlink(d / name)
            if 20 <= i < 220:
                name = f"new-{i:04d}"
                (d / name).write_bytes(b"")
                added.add(name)
    return seen, stay, gone, added


def test_readdir_is_stable_while_entries_come_and_go(mnt, ref):
    for d in (mnt, ref):  # reference: POSIX's promise, which the kernel's filesystem keeps too
        seen, stay, gone, added = scan_while_changing(d)
        assert len(seen) == len(set(seen)), "an entry was listed twice"
        assert stay <= set(seen), f"entries that stayed were skipped: {sorted(stay - set(seen))[:5]}"
        assert set(seen) <= stay | gone | added
    assert sorted(os.listdir(mnt)) == sorted(os.listdir(ref))  # reference: the kernel's filesystem
    # Long names fill the kernel's readdir buffer after a few entries: many resumed listings.
    for d in (mnt, ref):
        os.mkdir(d / "long")
        for i in range(300):
            (d / "long" / (f"{i:04d}-" + "spectrum" * 31)[:255]).write_bytes(b"")
    assert sorted(os.listdir(mnt / "long")) == sorted(os.listdir(ref / "long"))  # reference: the kernel's filesystem
    os.mkdir(mnt / "sub")
    os.symlink("stay-0001", mnt / "link")
    with os.scandir(mnt) as it:
        for entry in it:  # reference: lstat, which the kernel answers apart from readdir
            st = os.lstat(entry.path)
            assert entry.inode() == st.st_ino
            assert (entry.is_dir(follow_symlinks=False), entry.is_symlink()) == \
                (stat.S_ISDIR(st.st_mode), stat.S_ISLNK(st.st_mode))


def test_statfs_reports_stores_free_space_times_k_over_n(make_pool):
    pool = make_pool(4, 6, 5, store_size="96m")

    def expected() -> int:
        # reference: the kernel's statvfs of each store's tmpfs
        free = sum(os.statvfs(s).f_bavail * os.statvfs(s).f_frsize for s in pool.store_paths)
        return free * 4 // 6

    def shoal_free() -> int:
        v = os.statvfs(pool.mountpoint)
        return v.f_bavail * v.f_frsize

    assert abs(shoal_free() - expected()) <= 1 * MiB
    v = os.statvfs(pool.mountpoint)
    assert v.f_namemax == 255
    assert v.f_blocks * v.f_frsize >= shoal_free()
    (pool.mountpoint / "fill.raw").write_bytes(instrument_bytes(random.Random(2), 48 * MiB))
    # The free space follows the stores as they fill (the daemon re-probes them).
    wait_for(lambda: abs(shoal_free() - expected()) <= 1 * MiB, "statfs free space tracks the stores")
    assert shoal_free() < 4 * 96 * MiB - 40 * MiB

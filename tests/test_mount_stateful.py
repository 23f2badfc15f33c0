"""A stateful property test: the mount against the kernel's own filesystem.

Hypothesis draws a sequence of operations (create, write at an offset,
truncate, rename, link, unlink, mkdir, rmdir, chmod, setxattr, and writes,
reads and truncates through descriptors held open across steps) and applies
each one to a directory in the Shoal mount and to a plain directory under
tmp_path on the kernel's own filesystem. The plain directory is the
reference: after every step both must have given the same result (the same
value or the same errno), and the two trees must hold the same names, types,
modes, link counts, sizes, contents, link targets and user xattrs.
"""
from __future__ import annotations

import itertools
import os
import random
from pathlib import Path

import pytest
from hypothesis import HealthCheck, settings
from hypothesis import strategies as st
from hypothesis.stateful import (
    RuleBasedStateMachine, initialize, invariant, precondition, rule, run_state_machine_as_test,
)

from test_mount import (  # noqa: F401  (make_pool, shared_mount, mnt and ref are fixtures)
    STRIPE, make_pool, mnt, on_both, outcome, ref, shared_mount, tree_view,
)
from mounting import requires_fuse, requires_root

pytestmark = [pytest.mark.fuse, requires_fuse, requires_root]

# A small namespace, so that operations keep meeting each other's results.
PATHS = ["run-a.raw", "run-b.raw", "notes", "\udcff odd \t name", "day1", "day1/run-c.raw", "day1/cal",
         "day1/cal/lamp.raw"]
paths = st.sampled_from(PATHS)
offsets = st.one_of(st.sampled_from([0, 1, STRIPE - 1, STRIPE, STRIPE + 1, 2 * STRIPE, 3 * STRIPE - 5]),
                    st.integers(0, 4 * STRIPE))
lengths = st.one_of(st.sampled_from([0, 1, 4096, STRIPE - 1, STRIPE, STRIPE + 1]), st.integers(0, 2 * STRIPE + 10))
sizes = st.one_of(st.sampled_from([0, 1, STRIPE - 1, STRIPE, STRIPE + 1, 3 * STRIPE]), st.integers(0, 4 * STRIPE))
modes = st.sampled_from([0o644, 0o600, 0o640, 0o755, 0o444])
xattr_names = st.sampled_from(["user.instrument", "user.operator", "user.calibration.run"])
xattr_values = st.one_of(st.just(b""), st.binary(max_size=64), st.sampled_from([b"spectrometer-7", bytes(1000)]))


def payload(seed: int, length: int) -> bytes:
    """Instrument bytes, drawn as a seed and a length so examples stay small."""
    return random.Random(seed).randbytes(length)


class MountVsKernel(RuleBasedStateMachine):
    """Set mnt_root and ref_root on a subclass before running."""

    mnt_root: Path
    ref_root: Path
    cases = itertools.count()

    def __init__(self) -> None:
        super().__init__()
        case = f"case-{next(self.cases):04d}"
        self.mnt = self.mnt_root / case
        self.ref = self.ref_root / case
        self.mnt.mkdir()
        self.ref.mkdir()
        self.handles: list[tuple[int, int]] = []  # (fd on the mount, fd on the reference)

    def both(self, op):
        return on_both(op, self.mnt, self.ref)

    def on_handles(self, i: int, op):
        """Apply op(fd) to the i-th pair of open descriptors; the outcomes must agree."""
        m, r = self.handles[i % len(self.handles)]
        got, want = outcome(lambda: op(m)), outcome(lambda: op(r))
        assert got == want, f"shoal gave {got}, the kernel's own filesystem {want}"
        return got

    @initialize(seed=st.integers(0, 1 << 16), length=lengths)
    def start_with_a_run(self, seed, length):
        data = payload(seed, length)
        self.both(lambda d: os.mkdir(d / "day1"))
        self.both(lambda d: (d / "run-a.raw").write_bytes(data))

    # -- namespace ------------------------------------------------------------
    @rule(path=paths, mode=modes, excl=st.booleans())
    def create(self, path, mode, excl):
        flags = os.O_CREAT | os.O_WRONLY | (os.O_EXCL if excl else 0)
        self.both(lambda d: os.close(os.open(d / path, flags, mode)))

    @rule(path=paths, mode=st.sampled_from([0o755, 0o700, 0o750]))
    def mkdir(self, path, mode):
        self.both(lambda d: os.mkdir(d / path, mode))

    @rule(path=paths)
    def rmdir(self, path):
        self.both(lambda d: os.rmdir(d / path))

    @rule(path=paths)
    def unlink(self, path):
        self.both(lambda d: os.unlink(d / path))

    @rule(src=paths, dst=paths)
    def rename(self, src, dst):
        self.both(lambda d: os.rename(d / src, d / dst))

    @rule(src=paths, dst=paths)
    def link(self, src, dst):
        self.both(lambda d: os.link(d / src, d / dst))

    @rule(path=paths, to=st.sampled_from(["run-a.raw", "../case", "day1/cal", "nowhere"]))
    def symlink(self, path, to):
        self.both(lambda d: os.symlink(to, d / path))

    @rule(path=paths, mode=modes)
    def chmod(self, path, mode):
        self.both(lambda d: os.chmod(d / path, mode))  # follows a symlink, as chmod(1) does

    @rule(path=paths, name=xattr_names, value=xattr_values)
    def setxattr(self, path, name, value):
        self.both(lambda d: os.setxattr(d / path, name, value))

    @rule(path=paths, name=xattr_names)
    def removexattr(self, path, name):
        self.both(lambda d: os.removexattr(d / path, name))

    # -- contents by path -------------------------------------------------------
    @rule(path=paths, offset=offsets, length=lengths, seed=st.integers(0, 1 << 16), create=st.booleans())
    def write(self, path, offset, length, seed, create):
        data = payload(seed, length)

        def op(d: Path):
            fd = os.open(d / path, os.O_WRONLY | (os.O_CREAT if create else 0), 0o644)
            try:
                return os.pwrite(fd, data, offset)
            finally:
                os.close(fd)

        self.both(op)

    @rule(path=paths, size=sizes)
    def truncate(self, path, size):
        self.both(lambda d: os.truncate(d / path, size))

    # -- descriptors held open across steps -------------------------------------
    @precondition(lambda self: len(self.handles) < 4)
    @rule(path=paths, append=st.booleans())
    def open_handle(self, path, append):
        flags = os.O_RDWR | (os.O_APPEND if append else 0)
        fds = []
        for d in (self.mnt, self.ref):
            res = outcome(lambda: os.open(d / path, flags))
            fds.append(res)
        assert [r[0] for r in fds] == [fds[1][0]] * 2, f"open: shoal {fds[0]}, kernel {fds[1]}"
        if fds[0][0] == "ok":
            self.handles.append((fds[0][1], fds[1][1]))
        else:
            assert fds[0] == fds[1]

    @precondition(lambda self: self.handles)
    @rule(i=st.integers(0, 3), offset=offsets, length=lengths, seed=st.integers(0, 1 << 16))
    def handle_write(self, i, offset, length, seed):
        data = payload(seed, length)
        self.on_handles(i, lambda fd: os.pwrite(fd, data, offset))

    @precondition(lambda self: self.handles)
    @rule(i=st.integers(0, 3), offset=offsets, length=lengths)
    def handle_read(self, i, offset, length):
        self.on_handles(i, lambda fd: os.pread(fd, length, offset))

    @precondition(lambda self: self.handles)
    @rule(i=st.integers(0, 3), size=sizes)
    def handle_truncate(self, i, size):
        self.on_handles(i, lambda fd: os.ftruncate(fd, size))

    @precondition(lambda self: self.handles)
    @rule(i=st.integers(0, 3))
    def handle_fsync_and_stat(self, i):
        self.on_handles(i, lambda fd: (os.fsync(fd), os.fstat(fd).st_size, os.fstat(fd).st_nlink))

    @precondition(lambda self: self.handles)
    @rule(i=st.integers(0, 3))
    def handle_close(self, i):
        m, r = self.handles.pop(i % len(self.handles))
        assert outcome(lambda: os.close(m)) == outcome(lambda: os.close(r)) == ("ok", None)

    # -- after every step ---------------------------------------------------------
    @invariant()
    def trees_agree(self):
        # reference: the same operations on the kernel's own filesystem
        assert tree_view(self.mnt) == tree_view(self.ref)

    def teardown(self):
        for m, r in self.handles:
            os.close(m)
            os.close(r)
        self.handles.clear()


def run_machine(mnt_root: Path, ref_root: Path) -> None:
    """Deterministic by default; SHOAL_STATEFUL_EXAMPLES=N runs N random examples instead (a longer hunt)."""
    hunt = os.environ.get("SHOAL_STATEFUL_EXAMPLES")
    machine = type("Machine", (MountVsKernel,), {"mnt_root": mnt_root, "ref_root": ref_root})
    run_state_machine_as_test(machine, settings=settings(
        max_examples=int(hunt or 30), stateful_step_count=30, deadline=None, derandomize=not hunt, database=None,
        suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much]))


@pytest.mark.slow
def test_mount_behaves_like_the_kernels_own_filesystem(mnt, ref):
    run_machine(mnt, ref)  # reference: the kernel's own filesystem under tmp_path


@pytest.mark.slow
def test_mount_behaves_like_the_kernels_own_filesystem_under_a_tight_memory_cap(make_pool, ref):
    # Four stripes of memory for the whole pool: the held descriptors' writes
    # keep pushing each other's half-written stripes out to the stores.
    pool = make_pool(4, 6, 5, store_size="128m", extra={"pool": {"memory_cap": 4 * STRIPE}})
    run_machine(pool.mountpoint, ref)  # reference: the kernel's own filesystem under tmp_path

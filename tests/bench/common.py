"""Building blocks for throughput benchmarks on real mounts.

Every figure is measured with a real tool (dd, cp) in a subprocess and
timed from start to exit, so close() -- and with it flush, where a FUSE
filesystem may wait for its data to be durable -- is part of the time.
dd's own report is kept alongside for reference. Figures are MB/s
(10^6 bytes per second), like dd's.

Benchmarks print; they assert nothing about speed. Compare figures only
against a baseline measured in the same run on the same machine.
"""
from __future__ import annotations

import contextlib
import os
import re
import subprocess
import sys
import time
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

_TESTS = Path(__file__).resolve().parent.parent
if str(_TESTS) not in sys.path:
    sys.path.insert(0, str(_TESTS))

import mounting  # noqa: E402  (needs the path above when run as a script)

__test__ = False

MiB = 1 << 20
GiB = 1 << 30
_DD_RATE = re.compile(r"copied, ([0-9.]+) s, ([0-9.]+) ([kMGT]?B)/s")


@dataclass(frozen=True, kw_only=True)
class Figure:
    """One measured transfer."""

    label: str
    bytes: int
    seconds: float  # wall time of the whole command, close included
    tool_report: str = ""  # dd's own summary line, if any

    @property
    def mb_per_s(self) -> float:
        return self.bytes / 1e6 / self.seconds if self.seconds > 0 else float("inf")

    def ratio_to(self, baseline: Figure) -> float:
        return self.mb_per_s / baseline.mb_per_s


def _timed(label: str, argv: Sequence[str | os.PathLike], nbytes: int) -> Figure:
    argv = [os.fspath(a) for a in argv]
    start = time.perf_counter()
    r = subprocess.run(argv, capture_output=True, text=True)
    seconds = time.perf_counter() - start
    if r.returncode != 0:
        raise RuntimeError(f"{' '.join(argv)} exited {r.returncode}: {r.stderr.strip()}")
    m = _DD_RATE.search(r.stderr)
    return Figure(label=label, bytes=nbytes, seconds=seconds, tool_report=m.group(0) if m else "")


def measure_dd_write(path: str | os.PathLike, size: int, *, bs: int = MiB, fsync: bool = False,
                     direct: bool = False, label: str | None = None) -> Figure:
    """dd size bytes of zeros into path (created or truncated), bs bytes per write()."""
    if size % bs:
        raise ValueError(f"size {size} is not a multiple of bs {bs}")
    argv = ["dd", "if=/dev/zero", f"of={os.fspath(path)}", f"bs={bs}", f"count={size // bs}"]
    if fsync:
        argv.append("conv=fsync")
    if direct:
        argv.append("oflag=direct")
    return _timed(label or f"dd write bs={bs}", argv, size)


def measure_dd_read(path: str | os.PathLike, *, bs: int = MiB, direct: bool = False,
                    label: str | None = None) -> Figure:
    """dd the whole of path to /dev/null, bs bytes per read(); drops path's cached pages first."""
    drop_cached_pages(path)
    argv = ["dd", f"if={os.fspath(path)}", "of=/dev/null", f"bs={bs}"]
    if direct:
        argv.append("iflag=direct")
    return _timed(label or f"dd read bs={bs}", argv, os.stat(path).st_size)


def measure_cp(src: str | os.PathLike, dst: str | os.PathLike, *, label: str | None = None) -> Figure:
    """cp src to dst (the copy is timed to cp's exit, close included)."""
    return _timed(label or "cp", ["cp", os.fspath(src), os.fspath(dst)], os.stat(src).st_size)


def drop_cached_pages(path: str | os.PathLike) -> None:
    """Ask the kernel to drop path's clean cached pages, so a read reaches the filesystem.

    Harmless on tmpfs, whose pages are the data itself and stay.
    """
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
        os.posix_fadvise(fd, 0, 0, os.POSIX_FADV_DONTNEED)
    finally:
        os.close(fd)


def make_file(path: str | os.PathLike, size: int, *, random: bool = False) -> Path:
    """A source file of size bytes (zeros, or random bytes)."""
    src = "/dev/urandom" if random else "/dev/zero"
    r = subprocess.run(["dd", f"if={src}", f"of={os.fspath(path)}", f"bs={MiB}", f"count={size // MiB}",
                        "status=none"], capture_output=True, text=True)
    if r.returncode != 0:
        raise RuntimeError(f"making {path}: {r.stderr.strip()}")
    return Path(path)


def best(measure, repeat: int) -> Figure:
    """The fastest of repeat runs of measure() (least disturbed by the rest of the machine)."""
    return min((measure() for _ in range(repeat)), key=lambda f: f.seconds)


@contextlib.contextmanager
def mounted(argv: Sequence[str | os.PathLike], mountpoint: str | os.PathLike, *, log_dir: str | os.PathLike,
            env: dict[str, str] | None = None, timeout: float = 30.0) -> Iterator[mounting.MountProcess]:
    """Run a filesystem command, wait for its mount, yield it; stop it with SIGTERM after.

    Raises if the filesystem does not exit 0; the mount is gone afterwards in any case.
    """
    with mounting.MountProcess(argv, mountpoint, env=env, log_dir=log_dir) as mp:
        mp.wait_mounted(timeout)
        yield mp
        rc = mp.stop()
        if rc != 0:
            raise RuntimeError(f"{' '.join(map(str, argv))} exited {rc}:\n{mp.log_tail()}")


def print_table(title: str, rows: Sequence[tuple[Figure, Figure | None]], out=sys.stdout) -> None:
    """One line per figure: label, MB/s, seconds, and the ratio to its baseline (if any)."""
    print(f"\n{title}", file=out)
    print(f"  {'measurement':<44} {'MB/s':>9} {'seconds':>8} {'ratio':>7}", file=out)
    for fig, base in rows:
        ratio = f"{fig.ratio_to(base):7.3f}" if base is not None else f"{'1.000':>7}"
        print(f"  {fig.label:<44} {fig.mb_per_s:9.1f} {fig.seconds:8.3f} {ratio}", file=out)

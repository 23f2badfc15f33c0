"""Kernel options of the mount, measured: entry/attribute timeouts and the
writeback cache, on a small-file workload and a streaming write.

Usage (as root): python tests/bench/bench_options.py [--files 1500]

For each variant it mounts a fresh pool (k=4, n=6, w=5, six tmpfs stores),
then times: untar of --files small files (4 KiB to 64 KiB), `find -ls` over
the tree twice, and dd of 512 MiB. Times are printed as ratios to the first
variant (the shipped defaults) from the same run. Not a test.
"""
from __future__ import annotations

import argparse
import io
import os
import random
import shutil
import subprocess
import sys
import tarfile
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from common import mounted  # noqa: E402

import mounting  # noqa: E402

__test__ = False

RUNNER = """
import sys
from gateway import config, daemon, fs
fs.ENTRY_TIMEOUT = fs.ATTR_TIMEOUT = float(sys.argv[3])
fs.ShoalFS.enable_writeback_cache = sys.argv[4] == "1"
sys.exit(daemon.run(config.load(sys.argv[1]), sys.argv[2]))
"""

VARIANTS = [("timeouts 1 s, writeback off (shipped)", 1.0, False),
            ("timeouts 0, writeback off", 0.0, False),
            ("timeouts 10 s, writeback off", 10.0, False),
            ("timeouts 1 s, writeback on", 1.0, True)]


def make_tar(path: Path, files: int) -> None:
    rng = random.Random(3)
    with tarfile.open(path, "w") as tar:
        for i in range(files):
            data = rng.randbytes(rng.choice([4096, 16384, 65536]))
            info = tarfile.TarInfo(f"plate-{i // 100:03d}/well-{i:05d}.csv")
            info.size = len(data)
            tar.addfile(info, io.BytesIO(data))


def timed(argv, cwd=None) -> float:
    t = time.perf_counter()
    subprocess.run(argv, check=True, capture_output=True, cwd=cwd)
    return time.perf_counter() - t


def main(argv=None) -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--files", type=int, default=1500)
    args = ap.parse_args(argv)
    work = Path(tempfile.mkdtemp(prefix="shoal-options-"))
    try:
        tar = work / "plates.tar"
        make_tar(tar, args.files)
        results = []
        for label, timeout, writeback in VARIANTS:
            base = work / label.split(",")[0].replace(" ", "")[:12] / ("wb" if writeback else "wt")
            stores = [mounting.mount_tmpfs(base / f"disk-{i}", "400m") for i in range(6)]
            try:
                cfg = mounting.write_pool_config(base, k=4, n=6, w=5, stores=stores, state_dir=base / "state",
                                                 name="bench")
                subprocess.run(mounting.shoal_argv("init", cfg), check=True, capture_output=True)
                mnt = base / "mnt"
                mnt.mkdir()
                argv = [sys.executable, "-c", RUNNER, cfg, mnt, str(timeout), "1" if writeback else "0"]
                with mounted(argv, mnt, log_dir=base):
                    untar = timed(["tar", "-xf", tar, "-C", mnt])
                    listing = timed(["find", mnt, "-ls"]) + timed(["find", mnt, "-ls"])
                    dd = timed(["dd", "if=/dev/zero", f"of={mnt / 'stream'}", "bs=1M", "count=512"])
                results.append((label, untar, listing, dd))
            finally:
                for s in stores:
                    mounting.unmount_all(s)
        first = results[0]
        print(f"\nmount options, {args.files} small files; seconds and ratio to the shipped defaults")
        print(f"  {'variant':<40} {'untar':>12} {'find -ls x2':>14} {'dd 512 MiB':>14}")
        for label, untar, listing, dd in results:
            print(f"  {label:<40} {untar:6.2f} {untar / first[1]:5.2f} {listing:7.2f} {listing / first[2]:5.2f}"
                  f" {dd:7.2f} {dd / first[3]:5.2f}")
        return 0
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())

"""The Shoal mount against the ceiling of this FUSE stack, in one run.

Usage (as root): python tests/bench/bench_mount.py [--size 1GiB] [--rss-size 2GiB] [--repeat 2]

Prints MB/s for:
  (a) dd bs=1M write and read of --size through the Shoal mount, k=4, n=6,
      w=5, six stores each on its own tmpfs;
  (b) the same through nullfs (tests/bench/nullfs.py), a pyfuse3 filesystem
      that stores nothing and reads zeros: the ceiling of this stack, with the
      same kernel options (writeback cache off, 1 MiB read-ahead);
  (c) cp of --size into a plain tmpfs directory;
  (d) a degraded read with two stores' tmpfs unmounted;
and the ratios a/b and d/a, and the daemon's peak RSS (VmHWM) while it
writes --rss-size. Not a test: it prints figures and asserts nothing.
"""
from __future__ import annotations

import argparse
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from common import MiB, best, make_file, measure_cp, measure_dd_read, measure_dd_write, mounted  # noqa: E402

import mounting  # noqa: E402  (common put tests/ on the path)

sys.path.insert(0, str(mounting.REPO))
from gateway.config import parse_size  # noqa: E402

__test__ = False

NULLFS = Path(__file__).resolve().with_name("nullfs.py")


def peak_rss(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) * 1024
    return 0


def main(argv=None) -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--size", default="1GiB")
    ap.add_argument("--rss-size", default="2GiB")
    ap.add_argument("--repeat", type=int, default=2)
    args = ap.parse_args(argv)
    size, rss_size = parse_size(args.size), parse_size(args.rss_size)
    store_size = f"{(max(size, rss_size) * 6 // 4 // 6 + 256 * MiB) // MiB}m"
    work = Path(tempfile.mkdtemp(prefix="shoal-bench-"))
    mounts = []
    try:
        plain = mounting.mount_tmpfs(work / "plain", f"{(size * 2 + 64 * MiB) // MiB}m")
        mounts.append(plain)
        src = make_file(plain / "source", size)
        stores = []
        for i in range(6):
            stores.append(mounting.mount_tmpfs(work / "stores" / f"disk-{i}", store_size))
            mounts.append(stores[-1])
        cfg = mounting.write_pool_config(work, k=4, n=6, w=5, stores=stores, state_dir=work / "state",
                                         stripe_size="4MiB", name="bench")
        subprocess.run(mounting.shoal_argv("init", cfg), check=True, capture_output=True)
        logs = work / "logs"
        logs.mkdir()
        rows = []

        # (c) the plain tmpfs baseline for cp
        cp_plain = best(lambda: measure_cp(src, plain / "copy", label="(c) cp into plain tmpfs"), args.repeat)
        (plain / "copy").unlink()

        # (b) the ceiling
        mnt = work / "mnt-null"
        mnt.mkdir()
        with mounted([sys.executable, NULLFS, mnt, "--read-ahead-kb", "1024"], mnt, log_dir=logs):
            null_w = best(lambda: measure_dd_write(mnt / "f", size, label="(b) nullfs dd write"), args.repeat)
            null_r = best(lambda: measure_dd_read(mnt / "f", label="(b) nullfs dd read"), args.repeat)

        # (a) Shoal
        mnt = work / "mnt"
        mnt.mkdir()
        with mounted(mounting.shoal_argv("mount", cfg, mnt), mnt, log_dir=logs) as mp:
            shoal_w = best(lambda: measure_dd_write(mnt / "f", size, label="(a) shoal dd write"), args.repeat)
            subprocess.run(["sh", "-c", "echo 3 > /proc/sys/vm/drop_caches"], check=False)
            shoal_r = best(lambda: measure_dd_read(mnt / "f", label="(a) shoal dd read"), args.repeat)
            shoal_cp = best(lambda: measure_cp(src, mnt / "copy", label="    cp into the shoal mount"), 1)
            # (d) two stores gone
            for s in stores[:2]:
                mounting.umount(s, lazy=True)
            time.sleep(0.5)
            subprocess.run(["sh", "-c", "echo 3 > /proc/sys/vm/drop_caches"], check=False)
            degraded = best(lambda: measure_dd_read(mnt / "f", label="(d) shoal dd read, 2 stores gone"), 1)
        for s in stores[:2]:
            mounting.mount_tmpfs(s, store_size)
        # Peak RSS over a fresh daemon while it writes rss_size (the two wiped
        # stores are new and unlabelled, so they come back as offline: use a
        # fresh pool instead).
        for s in stores:
            mounting.umount(s, lazy=True)
            mounting.mount_tmpfs(s, store_size)
        shutil.rmtree(work / "state")
        subprocess.run(mounting.shoal_argv("init", cfg), check=True, capture_output=True)
        with mounted(mounting.shoal_argv("mount", cfg, mnt), mnt, log_dir=logs) as mp:
            rss_before = peak_rss(mp.pid)
            big = measure_dd_write(mnt / "big", rss_size, label=f"    shoal dd write {rss_size >> 20} MiB")
            rss = peak_rss(mp.pid)

        print(f"\nShoal mount benchmark, {time.strftime('%Y-%m-%d %H:%M')}, {platform.node()}, "
              f"{os.cpu_count()} CPUs, Python {platform.python_version()}")
        print(f"size {size >> 20} MiB, k=4 n=6 w=5, six tmpfs stores, stripe 4 MiB, best of {args.repeat}\n")
        print(f"  {'measurement':<40} {'MB/s':>8}")
        for f in (shoal_w, shoal_r, null_w, null_r, cp_plain, shoal_cp, degraded, big):
            print(f"  {f.label:<40} {f.mb_per_s:8.1f}")
        print()
        print(f"  a/b write  {shoal_w.ratio_to(null_w):.3f}   (target >= 0.6)")
        print(f"  a/b read   {shoal_r.ratio_to(null_r):.3f}   (target >= 0.6)")
        print(f"  d/a read   {degraded.ratio_to(shoal_r):.3f}   (target >= 0.5)")
        print(f"  peak RSS writing {rss_size >> 20} MiB: {rss / MiB:.0f} MiB (at mount: {rss_before / MiB:.0f} MiB;"
              " target <= 300 MiB)")
        return 0
    finally:
        for m in reversed(mounts):
            try:
                mounting.unmount_all(m)
            except Exception as e:  # report, keep cleaning
                print(f"cleanup {m}: {e}", file=sys.stderr)


if __name__ == "__main__":
    sys.exit(main())

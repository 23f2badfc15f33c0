"""The codec and the shard-buffer allocator setting, each against its baseline, in one run.

Usage: python tests/bench/bench_codec.py [--reps 40]

Prints milliseconds per operation, and ratios to the baseline measured in
the same run:
  - encode of a 4 MiB stripe at k=4, n=6 (two parity shards), and the
    rebuild of one missing data shard from k others: gateway._gf (the
    kernel the CPU picks) against the zfec fallback, the same bytes;
  - reading and verifying 1 MiB shard files from /dev/shm with four threads
    (read, header check, BLAKE3), in a child process with glibc's default
    malloc settings and in one with gateway.allocator.tune() applied.
Not a test: it prints figures and asserts nothing about speed.
"""
from __future__ import annotations

import argparse
import os
import platform
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from gateway import allocator, codec  # noqa: E402
from gateway.store import _read_upto  # noqa: E402

__test__ = False

MiB = 1 << 20
K, N = 4, 6
POOL = "0" * 31 + "1"
FILE = "ab" + "0" * 30


def per_op(fn, reps: int) -> float:
    fn()
    t = time.perf_counter()
    for _ in range(reps):
        fn()
    return (time.perf_counter() - t) / reps * 1000


def coding(reps: int) -> list[tuple[str, float, float]]:
    data = os.urandom(4 * MiB)
    shards = codec.encode(data, K, N)
    given = {0: shards[0], 1: shards[1], 2: shards[2], 4: shards[4]}
    rows = []
    for label, fn in (("encode 4 MiB stripe, k=4 n=6", lambda: codec.encode(data, K, N)),
                      ("rebuild one missing data shard", lambda: codec.rebuild(given, K, N, [3]))):
        fast = per_op(fn, reps)
        saved, codec._gf = codec._gf, None
        try:
            slow = per_op(fn, reps)
        finally:
            codec._gf = saved
        rows.append((label, fast, slow))
    return rows


def child(mode: str, directory: str, reps: int) -> None:
    """Read and verify the shard files in directory with four threads; print ms per shard."""
    if mode == "tuned":
        allocator.tune()
    paths = sorted(Path(directory).iterdir())

    def work(i: int) -> None:
        for r in range(reps):
            fd = os.open(paths[(i + r) % len(paths)], os.O_RDONLY)
            try:
                blob = _read_upto(fd, MiB + 8193)
            finally:
                os.close(fd)
            codec.parse(blob, pool_id=POOL)

    threads = [threading.Thread(target=work, args=(i,)) for i in range(4)]
    t = time.perf_counter()
    for th in threads:
        th.start()
    for th in threads:
        th.join()
    print((time.perf_counter() - t) / (4 * reps) * 1000)


def reading(reps: int) -> tuple[float, float]:
    with tempfile.TemporaryDirectory(dir="/dev/shm", prefix="shoal-codec-bench-") as d:
        for i in range(8):
            payload = os.urandom(MiB)
            h = codec.make_header(pool_id=POOL, file_id=FILE, stripe_index=i, stripe_version=1, shard_index=0,
                                  k=K, n=N, stripe_length=K * MiB, payload=payload)
            Path(d, f"s{i}.shd").write_bytes(b"".join(bytes(b) for b in codec.pack(h, payload)))
        out = {}
        for mode in ("default", "tuned"):
            r = subprocess.run([sys.executable, __file__, "--child", mode, d, "--reps", str(reps * 4)],
                               capture_output=True, text=True, check=True)
            out[mode] = float(r.stdout.strip())
    return out["tuned"], out["default"]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--reps", type=int, default=40)
    ap.add_argument("--child", nargs=2, metavar=("MODE", "DIR"), help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        child(args.child[0], args.child[1], args.reps)
        return 0
    kernel = codec._gf.kernel() if codec._gf else "not built"
    print(f"\nShoal codec benchmark, {time.strftime('%Y-%m-%d %H:%M')}, {platform.node()}, "
          f"{os.cpu_count()} CPUs, Python {platform.python_version()}; gateway._gf kernel: {kernel}\n")
    print(f"  {'operation':<50} {'ms':>8} {'baseline ms':>12} {'ratio':>7}")
    if codec._gf is None:
        print("  (gateway._gf is not built: nothing to compare against zfec)")
    else:
        for label, fast, slow in coding(args.reps):
            print(f"  {label + ' (baseline: zfec)':<50} {fast:8.2f} {slow:12.2f} {fast / slow:7.3f}")
    tuned, default = reading(args.reps)
    print(f"  {'read + verify 1 MiB shard (baseline: malloc)':<50} {tuned:8.3f} {default:12.3f} {tuned / default:7.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

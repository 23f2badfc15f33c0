"""The FUSE ceiling: dd and cp through nullfs, against plain tmpfs in the same run.

Usage (as root): python tests/bench/bench_nullfs.py [--size 1GiB] [--repeat 3] [-- NULLFS FLAGS...]

Prints MB/s for dd bs=1M writes and reads of --size bytes and for cp of a
--size file, on a plain tmpfs (the baseline, ratio 1) and on nullfs with
the writeback cache off and on; each nullfs figure also as a ratio to the
same operation on tmpfs. The best of --repeat runs is shown. Flags after
"--" go to every nullfs mount (e.g. --read-ahead-kb 1024).

Not a test: it prints figures and asserts nothing.
"""
from __future__ import annotations

import argparse
import os
import platform
import re
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import common  # noqa: E402
from common import MiB, best, make_file, measure_cp, measure_dd_read, measure_dd_write, mounted, print_table  # noqa: E402

import mounting  # noqa: E402  (common put tests/ on the path)

sys.path.insert(0, str(mounting.REPO))
from gateway.config import parse_size  # noqa: E402

__test__ = False

NULLFS = Path(__file__).resolve().with_name("nullfs.py")
VARIANTS = {"write-through": [], "writeback": ["--writeback-cache"]}


def nullfs_argv(mountpoint: Path, *flags: str) -> list[str]:
    return [sys.executable, str(NULLFS), str(mountpoint), *flags]


def tmpfs_baseline(ram: Path, source: Path, size: int, repeat: int) -> dict[str, common.Figure]:
    out = {
        "write": best(lambda: measure_dd_write(ram / "dd", size, label="tmpfs dd write bs=1M"), repeat),
        "read": best(lambda: measure_dd_read(ram / "dd", label="tmpfs dd read bs=1M"), repeat),
    }
    os.unlink(ram / "dd")
    out["cp"] = best(lambda: measure_cp(source, ram / "copy", label="tmpfs cp"), repeat)
    os.unlink(ram / "copy")
    return out


def nullfs_figures(work: Path, name: str, flags: list[str], source: Path, size: int,
                   repeat: int) -> tuple[dict[str, common.Figure], str]:
    mnt = work / f"mnt-{name}"
    with mounted(nullfs_argv(mnt, *flags), mnt, log_dir=work / "logs") as mp:
        figs = {
            "write": best(lambda: measure_dd_write(mnt / "dd", size, label=f"nullfs {name} dd write bs=1M"), repeat),
            "read": best(lambda: measure_dd_read(mnt / "dd", label=f"nullfs {name} dd read bs=1M"), repeat),
            "cp": best(lambda: measure_cp(source, mnt / "copy", label=f"nullfs {name} cp from tmpfs"), repeat),
        }
    m = re.search(r"served .*", mp.log_text())
    return figs, m.group(0) if m else "(no request statistics in the log)"


def describe_machine() -> str:
    fuse = subprocess.run(["fusermount3", "-V"], capture_output=True, text=True).stdout.strip()
    import pyfuse3
    return (f"kernel {platform.release()}, {os.cpu_count()} CPUs, python {platform.python_version()}, "
            f"pyfuse3 {pyfuse3.__version__}, {fuse}")


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    extra: list[str] = []
    if "--" in argv:
        i = argv.index("--")
        argv, extra = argv[:i], argv[i + 1:]
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--size", default="1GiB", help="bytes per transfer (default 1GiB)")
    p.add_argument("--repeat", type=int, default=3, help="runs per figure; the best is shown")
    args = p.parse_args(argv)
    size = parse_size(args.size)
    if size % MiB or size <= 0:
        p.error("--size must be a positive multiple of 1MiB")
    if os.geteuid() != 0 or mounting.fuse_available():
        p.error(f"needs root and FUSE: {mounting.root_available() or mounting.fuse_available()}")

    print(describe_machine())
    print(f"{size} bytes per transfer, best of {args.repeat}; nullfs flags: {' '.join(extra) or '(none)'}")
    work = Path(tempfile.mkdtemp(prefix="bench-nullfs-"))
    try:
        with mounting.tmpfs(work / "ram", size=2 * size + 64 * MiB) as ram:
            source = make_file(ram / "source", size)
            base = tmpfs_baseline(ram, source, size, args.repeat)
            rows: list[tuple[common.Figure, common.Figure | None]] = [(base[k], None) for k in ("write", "read", "cp")]
            notes = []
            for name, flags in VARIANTS.items():
                figs, served = nullfs_figures(work, name, flags + extra, source, size, args.repeat)
                rows += [(figs[k], base[k]) for k in ("write", "read", "cp")]
                notes.append(f"  nullfs {name}: {served}")
        print_table("MB/s, ratio to the same operation on tmpfs", rows)
        print("\nrequests nullfs saw (all runs):")
        print("\n".join(notes))
    finally:
        mounting.unmount_all(work / "ram")
        shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""`shoal mount` and `shoal demo`."""
from __future__ import annotations

import argparse
import os
import sys
import textwrap
from pathlib import Path

from .. import admin, config, daemon


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("mount", help="mount a pool in the foreground (Ctrl-C, SIGTERM or `fusermount3 -u` unmount it)")
    p.add_argument("config", help="pool config file (TOML)")
    p.add_argument("mountpoint", help="an empty directory")
    p.set_defaults(func=cmd_mount)

    p = sub.add_parser("demo", help="make a six-store demo pool under DIR (default ./shoal-demo) and mount it")
    p.add_argument("dir", nargs="?", default="shoal-demo")
    p.set_defaults(func=cmd_demo)


def cmd_mount(args) -> int:
    cfg = config.load(args.config)
    return daemon.run(cfg, args.mountpoint)


DEMO_CONFIG = """\
# A demo pool: six directory stores standing in for six disks of a lab's
# instrument server. Any 4 of the 6 shards of a stripe rebuild it (k=4, n=6),
# and a copy is acknowledged once 5 shards of every stripe are durable (w=5).
# Made by `shoal demo`; edit it, or write your own from config/*.toml.
[pool]
name = "demo"
k = 4
n = 6
write_quorum = 5
stripe_size = "4MiB"
state_dir = "state"

[metrics]
listen = "127.0.0.1:9851"
{stores}"""


def make_demo(base: Path) -> Path:
    stores = base / "stores"
    stores.mkdir(parents=True, exist_ok=True)
    (base / "mnt").mkdir(exist_ok=True)
    names = [f"disk-{i}" for i in range(1, 7)]
    for name in names:
        (stores / name).mkdir(exist_ok=True)
    cfg_path = base / "pool.toml"
    if not cfg_path.exists():
        body = "".join(f'\n[[store]]\npath = "stores/{n}"\n' for n in names)
        cfg_path.write_text(DEMO_CONFIG.format(stores=body))
    return cfg_path


def cmd_demo(args) -> int:
    base = Path(args.dir).resolve()
    cfg_path = make_demo(base)
    cfg = config.load(cfg_path)
    admin.init_pool(cfg)
    mnt = base / "mnt"
    me = os.path.basename(sys.argv[0]) if sys.argv[0].endswith("shoal") else "shoal"
    print(textwrap.dedent(f"""\
        Shoal demo pool: six stores in {base}/stores, k=4 of n=6, write quorum 5.
        Shoal is not a backup: keep an independent copy of data you cannot lose.

          copy files in:     cp -r ~/instrument-runs {mnt}/
          pull two "disks":  mv {base}/stores/disk-2 {base}/stores/disk-2.away   (and disk-5)
                             then read your files again: they still come back bit-exact
          put them back:     mv {base}/stores/disk-2.away {base}/stores/disk-2
          status:            {me} status {cfg_path}     (add --json for one JSON object)
          metrics:           http://127.0.0.1:9851/metrics

        Press Ctrl-C to unmount.
        """), flush=True)
    return daemon.run(cfg, mnt)

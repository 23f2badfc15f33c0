"""`shoal repair`, `shoal scrub` and `shoal store add|replace|retire|fail`.

Each command first asks the running daemon (control socket ops "repair",
"scrub", "store_add", "store_replace", "store_retire", "store_fail"); with no
daemon it opens the pool itself and does the work in this process.
"""
from __future__ import annotations

import argparse
import os
import sys
import time

import trio

from .. import config
from . import control_client
from ._output import ProgressBar, size

POLL_SECONDS = 0.5


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("repair", help="rebuild missing and corrupt shards from the repair queue")
    p.add_argument("config", help="pool config file (TOML)")
    p.add_argument("--wait", action="store_true", help="wait until the queue is empty (a progress bar on a terminal)")
    p.set_defaults(func=cmd_repair)

    p = sub.add_parser("scrub", help="read and verify every shard; remove orphan shards and stale temporary files")
    p.add_argument("config", help="pool config file (TOML)")
    p.add_argument("--wait", action="store_true", help="with a running daemon: wait until the pass is done")
    p.set_defaults(func=cmd_scrub)

    p = sub.add_parser("store", help="add, replace, retire or fail a store")
    acts = p.add_subparsers(dest="store_action", metavar="ACTION", required=True)
    a = acts.add_parser("add", help="label an empty directory as a new store of the pool")
    a.add_argument("config", help="pool config file (TOML)")
    a.add_argument("path", help="an empty directory (a new disk's mount point)")
    a.add_argument("--domain", help="failure domain (host, shelf, site); default: the directory's name")
    a.set_defaults(func=cmd_store, op="store_add")
    for name, op, text in (
            ("replace", "store_replace", "a new empty disk at PATH takes the place of the store that was there"),
            ("retire", "store_retire", "move every shard off the store at PATH, then retire it"),
            ("fail", "store_fail", "declare the store at PATH failed: rebuild its shards elsewhere")):
        a = acts.add_parser(name, help=text)
        a.add_argument("config", help="pool config file (TOML)")
        a.add_argument("path", help="the store's directory, as in the config")
        a.add_argument("--wait", action="store_true", help="wait until repair has done what it can")
        if name == "replace":
            a.add_argument("--allow-same-filesystem", action="store_true",
                           help="PATH is meant to be a plain directory on its parent's filesystem, not a mount point")
        a.set_defaults(func=cmd_store, op=op)


# ---------------------------------------------------------------- output

class RepairProgress:
    """Turns repair statistics into bar updates: done = the largest queue seen minus what is left."""

    def __init__(self, bar: ProgressBar):
        self.bar, self.top = bar, 0

    def __call__(self, st: dict) -> None:
        left = st.get("queue_stripes", 0)
        self.top = max(self.top, left)
        done = self.top - left
        eta = st.get("eta_seconds")
        text = (f"{done}/{self.top} stripes, {size(st.get('repaired_bytes', 0))} rebuilt, "
                f"{size(st.get('rate_bytes_per_second', 0))}/s" + (f", about {eta:.0f} s left" if eta else ""))
        self.bar.show(done / self.top if self.top else 1.0, text)


def _repair_summary(st: dict, *, daemon: bool = False) -> str:
    line = f"repair: {st['repaired_shards']} shards ({size(st['repaired_bytes'])}) rebuilt"
    if daemon:  # the daemon's counts run from its start, not from this command
        line += " since the daemon started"
    left = st.get("queue_stripes", 0)
    if not left:
        return line + "; the queue is empty"
    return (line + f"; {left} stripes still queued, {st.get('waiting_stripes', 0)} of them waiting for stores that are "
            "away (they get their shards back if they return within [repair] grace, otherwise the shards are "
            "rebuilt elsewhere) or for a store with room")


def _settled(st: dict) -> bool:
    return st.get("queue_stripes", 0) <= st.get("waiting_stripes", 0)


def _poll_repair(cfg, show: RepairProgress) -> dict:
    while True:
        # The daemon answers as soon as repair settles, or after POLL_SECONDS.
        st = control_client.request(cfg, "repair", kick=False, wait=POLL_SECONDS)
        show(st)
        if _settled(st):
            return st


# ---------------------------------------------------------------- repair

def _run(fn, *args):
    """trio.run, with a ShoalError from inside the pool's nurseries raised as itself."""
    from ..errors import ShoalError
    from ..lifecycle import lone_error

    try:
        return trio.run(fn, *args)
    except BaseExceptionGroup as eg:
        inner = lone_error(eg)
        if isinstance(inner, ShoalError):
            raise inner from None
        raise


async def offline_repair(cfg, progress=None) -> dict:
    from ..lifecycle import opened
    from ..repair import Repairer

    async with opened(cfg) as pool:
        return await Repairer(pool, cfg).run_until_empty(progress)


def cmd_repair(args) -> int:
    cfg = config.load(args.config)
    bar = ProgressBar()
    show = RepairProgress(bar)
    try:
        st = control_client.try_request(cfg, "repair", kick=True)
        by_daemon = st is not None
        if st is not None:
            if args.wait:
                st = _poll_repair(cfg, show)
            elif not _settled(st):
                bar.close()
                print(f"repair: the daemon is working on {st['queue_stripes']} queued stripes "
                      "(`shoal repair --wait` follows it)")
                return 0
        else:
            st = _run(offline_repair, cfg, show if args.wait else None)
    finally:
        bar.close()
    print(_repair_summary(st, daemon=by_daemon))
    return 0


# ---------------------------------------------------------------- scrub

async def offline_scrub(cfg, progress=None) -> dict:
    from ..lifecycle import opened
    from ..scrub import Scrubber

    async with opened(cfg) as pool:
        return await Scrubber(pool, cfg).scrub_once(progress)


def _scrub_summary(rep: dict) -> str:
    errs = rep.get("errors") or {}
    found = ", ".join(f"{v} {k.replace('_', ' ')}" for k, v in errs.items() if v) or "no problems"
    return (f"scrub: {rep.get('shards_checked', 0)} shards ({size(rep.get('bytes_checked', 0))}) checked: {found}; "
            f"{rep.get('orphans_removed', 0)} orphan shards and {rep.get('temp_removed', 0)} temporary files removed"
            + (f"; {rep['skipped_shards']} shards on stores that are away were not checked" if rep.get("skipped_shards") else "")
            + ("; what was found is queued for repair (`shoal repair CONFIG`)" if any(
                v for k, v in errs.items() if k != "orphan") else ""))


def cmd_scrub(args) -> int:
    cfg = config.load(args.config)
    bar = ProgressBar()
    t0 = time.time()
    try:
        st = control_client.try_request(cfg, "scrub", start=True)
        if st is not None:
            if not args.wait:
                print("scrub: a pass is running in the daemon (`shoal scrub --wait` follows it; `shoal status` shows it)")
                return 0
            while True:
                bar.show(st.get("progress_ratio", 0.0), f"{st.get('shards_checked', 0)} shards checked")
                done = st.get("last_complete_time")
                if not st.get("running") and done is not None and done >= t0:
                    break
                time.sleep(POLL_SECONDS)
                st = control_client.request(cfg, "scrub", start=False)
            rep = st.get("last_pass") or st
        else:
            rep = _run(offline_scrub, cfg,
                           lambda s: bar.show(s["progress_ratio"], f"{s['stripes_done']}/{s['stripes_total']} stripes"))
    finally:
        bar.close()
    print(_scrub_summary(rep))
    return 0


# ---------------------------------------------------------------- stores

async def offline_store(cfg, op: str, path: str, domain: str | None, wait: bool, progress=None,
                        same_fs: bool = False) -> dict:
    from .. import lifecycle

    if op == "store_add":
        change = await lifecycle.add_store(cfg, path, domain)
    elif op == "store_replace":
        change = await lifecycle.replace_store(cfg, path, wait=wait, progress=progress, allow_same_filesystem=same_fs)
    else:
        fn = {"store_replace": lifecycle.replace_store, "store_retire": lifecycle.retire_store,
              "store_fail": lifecycle.fail_store}[op]
        change = await fn(cfg, path, wait=wait, progress=progress)
    return change.as_dict()


def _print_change(res: dict, *, daemon: bool = False) -> None:
    for w in res.get("warnings") or ():
        print(f"warning: {w}", file=sys.stderr)
    print(res["message"])
    if res.get("repair"):
        print(_repair_summary(res["repair"], daemon=daemon))


def _finish_retire(cfg, path: str, first: dict) -> dict:
    """After following a drain: ask the daemon to retire the drained store,
    unless it is retired already, by the first request (a drain that had
    finished) or by the repair worker's own sweep meanwhile; asking again
    then would be refused as 'already retired'."""
    from ..errors import ControlError

    def retired() -> bool:
        st = control_client.request(cfg, "status")
        return any(s["path"] == path and s.get("admin") == "retired" for s in st["stores"])

    if first.get("action") != "retired" and not retired():
        try:
            return {**control_client.request(cfg, "store_retire", path=path), "repair": first["repair"]}
        except ControlError:
            if not retired():
                raise
    return {**first, "action": "retired",
            "message": f"store {path} is drained and retired: remove its [[store]] table from {cfg.source}"}


def cmd_store(args) -> int:
    cfg = config.load(args.config)
    path = os.path.abspath(args.path)
    domain = getattr(args, "domain", None)
    wait = getattr(args, "wait", False)
    bar = ProgressBar()
    show = RepairProgress(bar)
    try:
        same_fs = bool(getattr(args, "allow_same_filesystem", False))
        kw = {"path": path}
        if args.op == "store_add":
            kw["domain"] = domain
        if same_fs:
            kw["allow_same_filesystem"] = True
        res = control_client.try_request(cfg, args.op, **kw)
        by_daemon = res is not None
        if res is not None:
            if wait and args.op != "store_add":
                res["repair"] = _poll_repair(cfg, show)
                if args.op == "store_retire":
                    res = _finish_retire(cfg, path, res)
        else:
            res = _run(offline_store, cfg, args.op, path, domain, wait, show if wait else None, same_fs)
    finally:
        bar.close()
    _print_change(res, daemon=by_daemon)
    if args.op != "store_add" and not wait and res.get("action") in ("replaced", "failed", "retiring"):
        if by_daemon:
            print("the running daemon repairs in the background: `shoal repair --wait " + args.config + "` follows it")
        else:
            print("repair does the rest: mount the pool, or run `shoal repair --wait " + args.config + "`")
    return 0

"""`shoal recover`, `shoal export` and `shoal check`: offline tools that need
only the config and the stores (gateway.recovery does the work)."""
from __future__ import annotations

import argparse
import json
import sys
import time
from dataclasses import asdict

import trio

from .. import config, recovery
from ._output import ProgressBar

EXIT_INCOMPLETE = 3  # the tool ran, but something could not be recovered, exported or fixed


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("recover", help="rebuild a lost or corrupt catalog from the mirrors and shard headers on the stores")
    p.add_argument("config", help="pool config file (TOML)")
    p.add_argument("--force", action="store_true",
                   help="replace a catalog that looks healthy (it is moved aside, not deleted)")
    p.add_argument("--generation", type=int, metavar="G",
                   help="start from the mirror of this generation instead of the one most stores agree on")
    p.add_argument("--json", action="store_true", help="print the report as one JSON object")
    p.set_defaults(func=cmd_recover)

    p = sub.add_parser("export", help="copy a file or directory out of the pool, verified, without mounting it")
    p.add_argument("config", help="pool config file (TOML)")
    p.add_argument("pool_path", metavar="POOL_PATH", help="path inside the pool, e.g. /runs/2024-05")
    p.add_argument("dest", metavar="DEST", help="where the copy goes (the copy's own name)")
    p.add_argument("--from-mirror", action="store_true",
                   help="read the namespace from the newest catalog mirror on the stores, not the state_dir catalog")
    p.add_argument("--force", action="store_true", help="replace existing destination files")
    p.add_argument("--json", action="store_true", help="print the report as one JSON object")
    p.set_defaults(func=cmd_export)

    p = sub.add_parser("check", help="check the catalog against the stores; --repair fixes what is safe")
    p.add_argument("config", help="pool config file (TOML)")
    p.add_argument("--repair", action="store_true", help="fix what is safe to fix (the pool must not be mounted)")
    p.add_argument("--json", action="store_true", help="print the report as one JSON object")
    p.set_defaults(func=cmd_check)


def _dump(obj) -> None:
    json.dump(obj, sys.stdout, indent=1, default=str)
    print()


def _lost_lines(items, limit: int = 50) -> list[str]:
    out = []
    for ls in items[:limit]:
        where = ls.path or f"file {ls.file_id}"
        out.append(f"    {where}: stripe {ls.idx} (version {ls.version}): {ls.found} of k={ls.k} shards found"
                   + (f"; {ls.note}" if ls.note else ""))
    if len(items) > limit:
        out.append(f"    ... and {len(items) - limit} more (--json lists them all)")
    return out


def format_recover(r: recovery.RecoverReport) -> str:
    lines = []
    if r.mirror_generation is None:
        lines.append("no catalog mirror could be used: the namespace was rebuilt from shard headers alone")
    else:
        when = time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(r.mirror_time)) if r.mirror_time else "?"
        agree = "a majority of" if r.mirror_majority else "NOT a majority of"
        lines.append(f"catalog mirror generation {r.mirror_generation} (taken {when}), held by {len(r.mirror_holders)} "
                     f"stores, {agree} the {len(r.stores_scanned)} reachable")
    lines.append(f"  from the mirror:    {r.files_from_mirror} files, {r.stripes_from_mirror} stripes")
    lines.append(f"  from shard headers: {r.stripes_from_headers} stripes written after the mirror"
                 + (f", {len(r.files_in_lost_and_found)} files the mirror did not know, now in /lost+found"
                    if r.files_in_lost_and_found else ""))
    lines.append(f"  shard locations:    {r.shards_relocated} corrected, {r.shards_marked_missing} marked missing "
                 f"and queued for repair")
    lines.append(f"  scanned {r.shards_scanned} shards on {len(r.stores_scanned)} stores")
    for f in r.files_in_lost_and_found[:20]:
        lines.append(f"    {f}")
    if len(r.files_in_lost_and_found) > 20:
        lines.append(f"    ... and {len(r.files_in_lost_and_found) - 20} more")
    if r.unrecoverable or r.unreadable_files:
        lines.append(f"CANNOT BE READ: {len(r.unrecoverable)} stripes have fewer than k shards on the reachable stores")
        lines += _lost_lines(r.unrecoverable)
        if r.unreadable_files:
            lines.append(f"  {len(r.unreadable_files)} files the mirror did not know have no readable stripe and were "
                         "not brought back: " + ", ".join(r.unreadable_files[:10]))
    if r.stale:
        lines.append(f"OLDER CONTENT: {len(r.stale)} stripes came back at the mirror's version")
        lines += _lost_lines(r.stale)
    for x in r.left_alone:
        lines.append(f"left alone: {x}")
    for w in r.warnings:
        lines.append(f"warning: {w}")
    lines.append("recovered everything the stores hold" if r.complete else
                 "recovered what could be read; the stripes listed above cannot be read")
    return "\n".join(lines)


def _with_bar(run):
    """run(progress) under trio, with a progress bar on a terminal."""
    bar = ProgressBar()
    try:
        return trio.run(run, bar)
    finally:
        bar.close()


def _report(args, report, text) -> int:
    if args.json:
        _dump(asdict(report) | {"complete": report.complete})
    else:
        print(text(report))
    return 0 if report.complete else EXIT_INCOMPLETE


def cmd_recover(args) -> int:
    cfg = config.load(args.config)
    report = _with_bar(lambda bar: recovery.recover(cfg, force=args.force, generation=args.generation, progress=bar))
    return _report(args, report, format_recover)


def format_export(r: recovery.ExportReport) -> str:
    lines = [f"exported {r.files} files ({r.bytes} bytes), {r.directories} directories, {r.symlinks} symlinks, "
             f"{r.hard_links} hard links, {r.special} special files, using {r.source}"]
    if r.bad_shards or r.degraded_stripes:
        lines.append(f"  {r.degraded_stripes} stripes were rebuilt from parity; {r.bad_shards} missing or corrupt "
                     "shards were met on reachable stores")
    if r.failed:
        lines.append(f"NOT EXPORTED: {len(r.failed)} files have stripes that cannot be read (nothing was written for them)")
        for f in r.failed[:50]:
            ranges = ", ".join(f"stripe {i} (bytes {a}-{b})" for i, a, b, _ in f.stripes[:5])
            lines.append(f"    {f.path}: {ranges}" + (" ..." if len(f.stripes) > 5 else ""))
    for s in r.skipped:
        lines.append(f"skipped: {s}")
    for w in r.warnings:
        lines.append(f"warning: {w}")
    return "\n".join(lines)


def cmd_export(args) -> int:
    cfg = config.load(args.config)
    report = _with_bar(lambda bar: recovery.export(cfg, args.pool_path, args.dest, from_mirror=args.from_mirror,
                                                   force=args.force, progress=bar))
    return _report(args, report, format_export)


def format_check(r: recovery.CheckReport) -> str:
    lines = [f"checked {r.stripes} stripes, {r.shards_checked} shard headers"]
    if r.clean:
        lines.append("no problems found")
    for kind, count in r.counts().items():
        lines.append(f"{kind}: {count}")
        shown = [f for f in r.findings if f.kind == kind]
        for f in shown[:20]:
            lines.append(f"    {f.what}" + (f"  -> {f.action}" if f.action else ""))
        if len(shown) > 20:
            lines.append(f"    ... and {len(shown) - 20} more (--json lists them all)")
    for n in r.notes:
        lines.append(f"note: {n}")
    if r.findings:
        left = len(r.remaining)
        lines.append(f"{len(r.findings) - left} problems repaired, {left} left" if r.repair else
                     f"{len(r.findings)} problems; `shoal check --repair` fixes the safe ones")
    return "\n".join(lines)


def cmd_check(args) -> int:
    cfg = config.load(args.config)
    report = _with_bar(lambda bar: recovery.check(cfg, repair=args.repair, progress=bar))
    if args.json:
        _dump({"findings": [asdict(f) for f in report.findings], "counts": report.counts(), "notes": report.notes,
               "stripes": report.stripes, "shards_checked": report.shards_checked, "repair": report.repair,
               "remaining": len(report.remaining)})
    else:
        print(format_check(report))
    return 0 if not report.remaining else EXIT_INCOMPLETE

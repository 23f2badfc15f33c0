"""`shoal init` and `shoal status`."""
from __future__ import annotations

import argparse
import json
import sys

import trio

from .. import admin, config
from ._output import size


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("init", help="label the stores of a pool config and prepare its state_dir (idempotent)")
    p.add_argument("config", help="pool config file (TOML)")
    p.set_defaults(func=cmd_init)

    p = sub.add_parser("status", help="stores, their state and space, and stripes counted by health")
    p.add_argument("config", help="pool config file (TOML)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(func=cmd_status)


def cmd_init(args) -> int:
    cfg = config.load(args.config)
    report = admin.init_pool(cfg)
    for w in report.warnings:
        print(f"warning: {w}", file=sys.stderr)
    print(f"pool {cfg.name} ({report.pool_id}): k={cfg.k} n={cfg.n} w={cfg.write_quorum}, "
          f"catalog {'created' if report.created_catalog else 'kept'} at {cfg.catalog_path}")
    for path in report.labelled:
        print(f"  labelled  {path}")
    for path in report.already:
        print(f"  ready     {path}")
    return 0


def fetch_status(cfg) -> dict:
    """The daemon's view when a mount is running, else the offline view."""
    from . import control_client

    live = control_client.try_request(cfg, "status")
    if live is not None:
        return live
    return trio.run(admin.offline_status, cfg)


def format_status(st: dict) -> str:
    p = st["pool"]
    lines = [f"pool {p['name']}  k={p['k']} n={p['n']} w={p['w']}  "
             f"{'mounted' if p.get('mounted') else 'not mounted'}, "
             f"{'writable' if p['writable'] else 'READ-ONLY (fewer than w stores online)' if p['readable'] else 'UNREADABLE (fewer than k stores usable)'}",
             f"  {p['files']} files, {size(p['bytes'])}; usable free space {size(p['usable_free_bytes'])}", "",
             f"  {'store':<40} {'domain':<12} {'state':<9} {'free':>10} {'size':>10}"]
    for s in st["stores"]:
        seen = s["state"] in ("online", "full", "retiring")  # otherwise the space figures are from before it left
        free, total = (size(s["free_bytes"]), size(s["total_bytes"])) if seen else ("-", "-")
        lines.append(f"  {s['path']:<40} {s['domain']:<12} {s['state']:<9} {free:>10} {total:>10}")
        if s["state"] != "online" and s.get("reason"):
            lines.append(f"      {s['reason']}")
    h = st["stripes"]
    lines += ["", f"  stripes: {h['intact']} intact, {h['degraded']} degraded, {h['critical']} critical, {h['lost']} lost"]
    r = st.get("repair") or {}
    if r:
        eta = r.get("eta_seconds")
        lines.append(f"  repair: {r.get('queued_stripes', 0)} stripes queued, {size(r.get('repaired_bytes', 0))} regenerated, "
                     f"{size(r.get('rate_bytes_per_second', 0))}/s" + (f", about {eta:.0f} s left" if eta else ""))
    m = st.get("catalog") or {}
    if m:
        age = m.get("mirror_age_seconds")
        if age is None:
            text = "none yet"
        else:
            text = (f"generation {m.get('generation')} on {m.get('stores_with_mirror')} of "
                    f"{m.get('stores_total')} stores, {age:.0f} s old")
        if m.get("last_error"):
            text += f"; last attempt failed: {m['last_error']}"
        lines.append(f"  catalog mirror: {text}")
    doms = st.get("domains") or []
    if doms and any(s["domain"] == t["domain"] for s in st["stores"] for t in st["stores"] if s is not t):
        one = [d for d in doms if len(d["lost"]) == 1]
        lines.append("  whole-domain losses survived: " + ", ".join(
            f"{'+'.join(d['lost'])} ({'reads' if d['reads'] else 'no reads'}, {'writes' if d['writes'] else 'no writes'})"
            for d in one))
    return "\n".join(lines)


def cmd_status(args) -> int:
    cfg = config.load(args.config)
    st = fetch_status(cfg)
    if args.json:
        json.dump(st, sys.stdout, indent=1, default=str)
        print()
    else:
        print(format_status(st))
    h = st["stripes"]
    return 0 if not h["lost"] else 3

"""Offline recovery tools: ``recover`` (rebuild a lost catalog), ``export``
(copy files out with no daemon and no mount) and ``check`` (consistency of
the catalog against the stores, with safe repairs).

They need only the pool config and the stores. None of them writes to a
store except ``check(repair=True)`` deleting unreferenced shards past their
grace; ``export`` only reads, so it is safe beside a mounted pool.

recover, step by step:

1. Refuse if state_dir holds a healthy catalog (unless force: it is then
   moved aside, never deleted). A missing catalog is fine; a corrupt one
   is moved aside to ``catalog.sqlite.corrupt-<time>`` and the report says so.
2. Read every configured store's label. The pool is the one most labels
   name (ties: the one named like the config); stores of another pool are
   ignored with a warning.
3. List the mirrors (see gateway.mirror), ignoring those of another pool
   with a warning, and verify copies newest first: sidecar, BLAKE3 of the
   file, SQLite quick_check, pool id and generation inside. Take the newest
   (generation, checksum) held by more than half of the reachable stores;
   if none is, the newest valid copy, and say so. Newer valid mirrors that
   were passed over are named in the report (``generation=`` picks one).
4. Scan every shard header on the reachable stores. For each stripe take
   the highest version newer than the mirror's with at least k shards whose
   headers are valid and agree (k, n, length); versions the mirror lists as
   garbage are never taken. Shards the mirror places wrongly are pointed at
   the store that holds them; shards absent from a reachable store are
   marked missing and queued for repair. Files the mirror does not know come
   back as ``/lost+found/<file id>`` (mode 0600, owner root, mtime of their
   newest shard). next_version rises past every version found.
5. The rebuilt catalog is written under a temporary name and renamed into
   place last, so an interrupted recover leaves no half-built catalog.

The report says what came from the mirror, what came from headers, which
stripes cannot be read (fewer than k shards found) and which came back at
an older version than one seen on the stores.

Modules: common (errors, the pool lock, the store survey), sources (mirrors
and the header scan), recover, export, check. Their public names are
re-exported here: ``gateway.recovery.recover`` and so on.

Part of the pool layer: it uses catalog, store, codec, stripeio and mirror.
"""
from __future__ import annotations

from .common import Progress, LOST_AND_FOUND, RecoveryRefused, ExportFailed, LOCK_NAME, StoreView, survey_stores
from .sources import MirrorChoice, choose_mirror, FoundShard, Found, scan_headers, agreeing
from .recover import LostStripe, RecoveryPlan, plan_recovery, RecoverReport, local_catalog_state, recover, node_name
from .export import FailedFile, ExportReport, export
from .check import CHECK_KINDS, Finding, CheckReport, Namespace, analyse_namespace, check

__all__ = [
    "CHECK_KINDS",
    "CheckReport",
    "ExportFailed",
    "ExportReport",
    "FailedFile",
    "Finding",
    "Found",
    "FoundShard",
    "LOCK_NAME",
    "LOST_AND_FOUND",
    "LostStripe",
    "MirrorChoice",
    "Namespace",
    "Progress",
    "RecoverReport",
    "RecoveryPlan",
    "RecoveryRefused",
    "StoreView",
    "agreeing",
    "analyse_namespace",
    "check",
    "choose_mirror",
    "export",
    "local_catalog_state",
    "node_name",
    "plan_recovery",
    "recover",
    "scan_headers",
    "survey_stores",
]

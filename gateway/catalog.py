"""The catalog: SQLite metadata for one pool. The only module that speaks SQL.

It holds the namespace (inodes, directory entries, extended attributes),
each file's stripes (version, length) and the store and state of every
shard, the repair queue, the garbage list (shards to delete) and write
intents (stripes dispatched but not yet committed).

Every method is blocking; callers run them in a worker thread, one at a time
per Catalog (the pool holds a limiter of one).

Durability, in WAL mode: a transaction that acknowledges data (a file's
commit), reserves stripe versions or changes the pool's stores runs with
``synchronous=FULL``: SQLite fsyncs the WAL before COMMIT returns, so it
survives a power cut. Every other transaction (namespace and attribute
changes, write intents, shard news, the repair queue) runs with
``synchronous=NORMAL``: no fsync, but it survives a killed daemon at once
(the WAL is in the page cache), and because the WAL is sequential the next
FULL commit (a close, fsync or fsyncdir) makes it durable too. A write
intent lost to a power cut leaves an unknown shard, which scrub removes
after its grace period.

Schema migrations are versioned (``PRAGMA user_version``); ``MIGRATIONS[i]``
takes the schema from version i to i+1.
"""
from __future__ import annotations

import os
import sqlite3
import stat
import time
import uuid
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Sequence

from .errors import (
    CatalogError, Exists, InvalidArgument, IsADirectory, NameTooLong, NoAttribute,
    NotADirectory, NotEmpty, NotFound,
)
from .ids import FileId, Ino, StoreId

ROOT: Ino = Ino(1)
NAME_MAX = 255
SHARD_STATES = ("ok", "pending", "missing", "corrupt")

MIGRATIONS: tuple[str, ...] = (
    # 0 -> 1
    """
    CREATE TABLE meta(key TEXT PRIMARY KEY, value) WITHOUT ROWID;
    CREATE TABLE stores(
        store_id TEXT PRIMARY KEY, path TEXT NOT NULL UNIQUE, domain TEXT NOT NULL,
        admin TEXT NOT NULL DEFAULT 'active',      -- active | retiring | retired | failed
        replaces TEXT, added REAL NOT NULL, away_since REAL);
    CREATE TABLE inodes(  -- AUTOINCREMENT: an inode number is never reused (the kernel and caches key on it)
        ino INTEGER PRIMARY KEY AUTOINCREMENT, mode INTEGER NOT NULL, uid INTEGER NOT NULL, gid INTEGER NOT NULL,
        size INTEGER NOT NULL DEFAULT 0, nlink INTEGER NOT NULL,
        atime_ns INTEGER NOT NULL, mtime_ns INTEGER NOT NULL, ctime_ns INTEGER NOT NULL,
        rdev INTEGER NOT NULL DEFAULT 0, file_id TEXT UNIQUE, target BLOB);
    CREATE TABLE entries(
        id INTEGER PRIMARY KEY AUTOINCREMENT, parent INTEGER NOT NULL, name BLOB NOT NULL,
        ino INTEGER NOT NULL, UNIQUE(parent, name));
    CREATE INDEX entries_ino ON entries(ino);
    CREATE TABLE xattrs(ino INTEGER NOT NULL, name BLOB NOT NULL, value BLOB NOT NULL,
        PRIMARY KEY(ino, name)) WITHOUT ROWID;
    CREATE TABLE stripes(ino INTEGER NOT NULL, idx INTEGER NOT NULL, version INTEGER NOT NULL,
        length INTEGER NOT NULL, coded_length INTEGER NOT NULL, k INTEGER NOT NULL, n INTEGER NOT NULL,
        PRIMARY KEY(ino, idx)) WITHOUT ROWID;
    CREATE TABLE shards(ino INTEGER NOT NULL, idx INTEGER NOT NULL, shard INTEGER NOT NULL,
        version INTEGER NOT NULL, store_id TEXT, state TEXT NOT NULL,
        PRIMARY KEY(ino, idx, shard)) WITHOUT ROWID;
    CREATE INDEX shards_store ON shards(store_id, state);
    CREATE TABLE garbage(id INTEGER PRIMARY KEY, store_id TEXT NOT NULL, file_id TEXT NOT NULL,
        idx INTEGER NOT NULL, version INTEGER NOT NULL, shard INTEGER NOT NULL, since REAL NOT NULL);
    CREATE TABLE intents(file_id TEXT NOT NULL, idx INTEGER NOT NULL, version INTEGER NOT NULL,
        placement TEXT NOT NULL, since REAL NOT NULL, PRIMARY KEY(file_id, idx, version)) WITHOUT ROWID;
    CREATE TABLE repair_queue(ino INTEGER NOT NULL, idx INTEGER NOT NULL, reason TEXT NOT NULL,
        queued REAL NOT NULL, PRIMARY KEY(ino, idx)) WITHOUT ROWID;
    """,
)
SCHEMA_VERSION = len(MIGRATIONS)


@dataclass(frozen=True, kw_only=True)
class Inode:
    ino: Ino
    mode: int
    uid: int
    gid: int
    size: int
    nlink: int
    atime_ns: int
    mtime_ns: int
    ctime_ns: int
    rdev: int
    file_id: FileId | None
    target: bytes | None

    @property
    def is_dir(self) -> bool:
        return stat.S_ISDIR(self.mode)

    @property
    def is_reg(self) -> bool:
        return stat.S_ISREG(self.mode)


_INODE_COLS = "ino, mode, uid, gid, size, nlink, atime_ns, mtime_ns, ctime_ns, rdev, file_id, target"


def _inode(row) -> Inode:
    return Inode(ino=row[0], mode=row[1], uid=row[2], gid=row[3], size=row[4], nlink=row[5],
                 atime_ns=row[6], mtime_ns=row[7], ctime_ns=row[8], rdev=row[9], file_id=row[10],
                 target=None if row[11] is None else bytes(row[11]))


@dataclass(frozen=True, kw_only=True)
class ShardLoc:
    shard: int
    store_id: StoreId | None
    state: str


@dataclass(frozen=True, kw_only=True)
class StripeRecord:
    ino: Ino
    idx: int
    version: int
    length: int  # valid bytes; past them the stripe reads as zeros (truncation trims this)
    coded_length: int  # bytes that were encoded, as the shard headers say
    k: int
    n: int
    shards: tuple[ShardLoc, ...]


@dataclass(frozen=True, kw_only=True)
class StoreRecord:
    store_id: StoreId
    path: str
    domain: str
    admin: str
    replaces: str | None
    added: float
    away_since: float | None


@dataclass(frozen=True, kw_only=True)
class NewStripe:
    """A stripe version ready to become current at commit."""
    idx: int
    version: int
    length: int
    coded_length: int
    k: int
    n: int
    shards: tuple[ShardLoc, ...]


@dataclass(frozen=True, kw_only=True)
class Garbage:
    id: int
    store_id: StoreId
    file_id: FileId
    idx: int
    version: int
    shard: int


def now_ns() -> int:
    return time.time_ns()


def check_name(name: bytes) -> None:
    if len(name) > NAME_MAX:
        raise NameTooLong(f"name of {len(name)} bytes exceeds {NAME_MAX}")
    if not name or b"/" in name or b"\0" in name or name in (b".", b".."):
        raise InvalidArgument(f"invalid name {name!r}")


class Catalog:
    """One SQLite database. Not thread-safe: serialise calls (one thread at a time)."""

    def __init__(self, path: Path, *, create: bool = False):
        self.path = Path(path)
        if not create and not self.path.exists():
            raise CatalogError(f"no catalog at {self.path}: run `shoal init CONFIG` (or `shoal recover CONFIG` if it was lost)")
        try:
            self.db = sqlite3.connect(str(self.path), isolation_level=None, check_same_thread=False, timeout=30)
            self.db.execute("PRAGMA journal_mode=WAL")
            self.db.execute("PRAGMA synchronous=NORMAL")
            self.db.execute("PRAGMA foreign_keys=OFF")
            self._migrate()
        except sqlite3.DatabaseError as e:
            raise CatalogError(f"catalog {self.path} cannot be opened: {e}") from e

    def close(self) -> None:
        self.db.close()

    # -- schema -------------------------------------------------------------
    def _migrate(self) -> None:
        ver = self.db.execute("PRAGMA user_version").fetchone()[0]
        if ver > SCHEMA_VERSION:
            raise CatalogError(f"catalog {self.path} has schema {ver}, newer than this Shoal ({SCHEMA_VERSION}): upgrade Shoal")
        for i in range(ver, SCHEMA_VERSION):
            with self._tx():
                for stmt in _statements(MIGRATIONS[i]):
                    self.db.execute(stmt)
                self.db.execute(f"PRAGMA user_version={i + 1}")

    class _Tx:
        def __init__(self, db: sqlite3.Connection, durable: bool):
            self.db, self.durable = db, durable

        def __enter__(self):
            if self.durable:
                self.db.execute("PRAGMA synchronous=FULL")
            self.db.execute("BEGIN IMMEDIATE")
            return self.db

        def __exit__(self, et, ev, tb):
            try:
                self.db.execute("COMMIT" if et is None else "ROLLBACK")
            finally:
                if self.durable:
                    self.db.execute("PRAGMA synchronous=NORMAL")
            return False

    def _tx(self, durable: bool = False) -> "Catalog._Tx":
        """A write transaction; durable=True fsyncs the WAL at COMMIT (see the module docstring)."""
        return Catalog._Tx(self.db, durable)

    def sync(self) -> None:
        """Make every earlier transaction durable (one fsync of the WAL)."""
        with self._tx(durable=True) as db:
            db.execute("UPDATE meta SET value=value WHERE key='generation'")

    # -- meta ---------------------------------------------------------------
    def get_meta(self, key: str, default=None):
        row = self.db.execute("SELECT value FROM meta WHERE key=?", (key,)).fetchone()
        return default if row is None else row[0]

    def set_meta(self, key: str, value) -> None:
        self.db.execute("INSERT OR REPLACE INTO meta(key, value) VALUES(?, ?)", (key, value))

    def initialise(self, *, pool_id: str, name: str, k: int, n: int, stripe_size: int) -> bool:
        """Create the root and the pool's identity once. Returns False if already done."""
        if self.get_meta("pool_id") is not None:
            return False
        t = now_ns()
        with self._tx(durable=True) as db:
            for key, val in (("pool_id", pool_id), ("pool_name", name), ("k", k), ("n", n),
                             ("stripe_size", stripe_size), ("created", time.time()),
                             ("next_version", 1), ("generation", 0)):
                db.execute("INSERT INTO meta(key, value) VALUES(?, ?)", (key, val))
            db.execute(f"INSERT INTO inodes({_INODE_COLS}) VALUES(?,?,?,?,?,?,?,?,?,?,?,?)",
                       (ROOT, stat.S_IFDIR | 0o755, 0, 0, 0, 2, t, t, t, 0, None, None))
        return True

    @property
    def pool_id(self) -> str:
        pid = self.get_meta("pool_id")
        if pid is None:
            raise CatalogError(f"catalog {self.path} is not initialised: run `shoal init CONFIG`")
        return pid

    def reserve_versions(self, count: int) -> int:
        """Reserve `count` stripe versions durably; returns the first."""
        with self._tx(durable=True) as db:
            first = int(db.execute("SELECT value FROM meta WHERE key='next_version'").fetchone()[0])
            db.execute("UPDATE meta SET value=? WHERE key='next_version'", (first + count,))
        return first

    def generation(self) -> int:
        return int(self.get_meta("generation", 0))

    def _bump(self, db) -> None:
        db.execute("UPDATE meta SET value=value+1 WHERE key='generation'")

    # -- stores -------------------------------------------------------------
    def stores(self) -> list[StoreRecord]:
        rows = self.db.execute("SELECT store_id, path, domain, admin, replaces, added, away_since FROM stores ORDER BY added, path")
        return [StoreRecord(store_id=r[0], path=r[1], domain=r[2], admin=r[3], replaces=r[4], added=r[5], away_since=r[6]) for r in rows]

    def add_store(self, *, store_id: str, path: str, domain: str, replaces: str | None = None) -> None:
        with self._tx(durable=True) as db:
            db.execute("INSERT INTO stores(store_id, path, domain, replaces, added) VALUES(?,?,?,?,?)",
                       (store_id, path, domain, replaces, time.time()))
            self._bump(db)

    def update_store(self, store_id: str, **fields) -> None:
        allowed = {"path", "domain", "admin", "replaces", "away_since"}
        if not fields or set(fields) - allowed:
            raise ValueError(f"bad store fields {fields}")
        cols = ", ".join(f"{k}=?" for k in fields)
        with self._tx(durable=True) as db:
            db.execute(f"UPDATE stores SET {cols} WHERE store_id=?", (*fields.values(), store_id))
            self._bump(db)

    # -- namespace ----------------------------------------------------------
    def get_inode(self, ino: int) -> Inode:
        row = self.db.execute(f"SELECT {_INODE_COLS} FROM inodes WHERE ino=?", (ino,)).fetchone()
        if row is None:
            raise NotFound(f"inode {ino}")
        return _inode(row)

    def lookup(self, parent: int, name: bytes) -> Inode:
        if len(name) > NAME_MAX:
            raise NameTooLong(f"name of {len(name)} bytes exceeds {NAME_MAX}")
        row = self.db.execute(
            f"SELECT {', '.join('i.' + c.strip() for c in _INODE_COLS.split(','))} FROM entries e JOIN inodes i ON i.ino=e.ino "
            "WHERE e.parent=? AND e.name=?", (parent, name)).fetchone()
        if row is None:
            self._require_dir(parent)
            raise NotFound(name.decode(errors="replace"))
        return _inode(row)

    def _require_dir(self, ino: int) -> Inode:
        node = self.get_inode(ino)
        if not node.is_dir:
            raise NotADirectory(f"inode {ino}")
        return node

    def create(self, parent: int, name: bytes, *, mode: int, uid: int, gid: int,
               target: bytes | None = None, rdev: int = 0, file_id: str | None = None,
               mtime_ns: int | None = None) -> Inode:
        """Create a file, directory, symlink or special file. Raises Exists.
        A regular file gets a new file id unless one is given (recovery
        re-adopting a file the catalog lost)."""
        check_name(name)
        t = now_ns()
        m = mtime_ns if mtime_ns is not None else t
        is_dir = stat.S_ISDIR(mode)
        if stat.S_ISREG(mode):
            file_id = file_id or uuid.uuid4().hex
        elif file_id is not None:
            raise InvalidArgument("only a regular file has a file id")
        with self._tx() as db:
            self._require_dir(parent)
            if db.execute("SELECT 1 FROM entries WHERE parent=? AND name=?", (parent, name)).fetchone():
                raise Exists(name.decode(errors="replace"))
            cur = db.execute(
                "INSERT INTO inodes(mode, uid, gid, size, nlink, atime_ns, mtime_ns, ctime_ns, rdev, file_id, target) "
                "VALUES(?,?,?,?,?,?,?,?,?,?,?)",
                (mode, uid, gid, len(target) if target is not None else 0, 2 if is_dir else 1, m, m, t, rdev, file_id, target))
            ino = cur.lastrowid
            db.execute("INSERT INTO entries(parent, name, ino) VALUES(?,?,?)", (parent, name, ino))
            db.execute("UPDATE inodes SET mtime_ns=?, ctime_ns=?, nlink=nlink+? WHERE ino=?", (t, t, 1 if is_dir else 0, parent))
            self._bump(db)
        return self.get_inode(ino)

    def link(self, ino: int, parent: int, name: bytes) -> Inode:
        check_name(name)
        t = now_ns()
        with self._tx() as db:
            node = self.get_inode(ino)
            if node.is_dir:
                raise IsADirectory("hard links to directories are not allowed")
            self._require_dir(parent)
            if db.execute("SELECT 1 FROM entries WHERE parent=? AND name=?", (parent, name)).fetchone():
                raise Exists(name.decode(errors="replace"))
            db.execute("INSERT INTO entries(parent, name, ino) VALUES(?,?,?)", (parent, name, ino))
            db.execute("UPDATE inodes SET nlink=nlink+1, ctime_ns=? WHERE ino=?", (t, ino))
            db.execute("UPDATE inodes SET mtime_ns=?, ctime_ns=? WHERE ino=?", (t, t, parent))
            self._bump(db)
        return self.get_inode(ino)

    def unlink(self, parent: int, name: bytes) -> Inode:
        """Remove a non-directory entry. Returns the inode after nlink-1; its data
        stays until the caller purges it (an open file keeps it alive)."""
        t = now_ns()
        with self._tx() as db:
            node = self.lookup(parent, name)
            if node.is_dir:
                raise IsADirectory(name.decode(errors="replace"))
            db.execute("DELETE FROM entries WHERE parent=? AND name=?", (parent, name))
            db.execute("UPDATE inodes SET nlink=nlink-1, ctime_ns=? WHERE ino=?", (t, node.ino))
            db.execute("UPDATE inodes SET mtime_ns=?, ctime_ns=? WHERE ino=?", (t, t, parent))
            self._bump(db)
        return self.get_inode(node.ino)

    def rmdir(self, parent: int, name: bytes) -> None:
        t = now_ns()
        with self._tx() as db:
            node = self.lookup(parent, name)
            if not node.is_dir:
                raise NotADirectory(name.decode(errors="replace"))
            if db.execute("SELECT 1 FROM entries WHERE parent=? LIMIT 1", (node.ino,)).fetchone():
                raise NotEmpty(name.decode(errors="replace"))
            db.execute("DELETE FROM entries WHERE parent=? AND name=?", (parent, name))
            db.execute("DELETE FROM inodes WHERE ino=?", (node.ino,))
            db.execute("DELETE FROM xattrs WHERE ino=?", (node.ino,))
            db.execute("UPDATE inodes SET nlink=nlink-1, mtime_ns=?, ctime_ns=? WHERE ino=?", (t, t, parent))
            self._bump(db)

    def _is_ancestor(self, anc: int, ino: int) -> bool:
        """True if `anc` is `ino` or one of its ancestors (directories have one parent)."""
        while True:
            if ino == anc:
                return True
            if ino == ROOT:
                return False
            row = self.db.execute("SELECT parent FROM entries WHERE ino=? LIMIT 1", (ino,)).fetchone()
            if row is None:
                return False
            ino = row[0]

    def rename(self, old_parent: int, old_name: bytes, new_parent: int, new_name: bytes, *,
               noreplace: bool = False, exchange: bool = False) -> Inode | None:
        """Atomic rename. Returns the replaced inode (nlink already lowered) when a
        non-directory target was replaced, so the caller can purge it."""
        check_name(new_name)
        t = now_ns()
        replaced = None
        with self._tx() as db:
            src = self.lookup(old_parent, old_name)
            self._require_dir(new_parent)
            row = db.execute("SELECT ino FROM entries WHERE parent=? AND name=?", (new_parent, new_name)).fetchone()
            dst = self.get_inode(row[0]) if row else None
            if src.is_dir and self._is_ancestor(src.ino, new_parent):
                raise InvalidArgument("cannot move a directory into itself")
            if exchange:
                if dst is None:
                    raise NotFound(new_name.decode(errors="replace"))
                if dst.is_dir and self._is_ancestor(dst.ino, old_parent):
                    raise InvalidArgument("cannot move a directory into itself")
                db.execute("UPDATE entries SET ino=? WHERE parent=? AND name=?", (dst.ino, old_parent, old_name))
                db.execute("UPDATE entries SET ino=? WHERE parent=? AND name=?", (src.ino, new_parent, new_name))
                if src.is_dir != dst.is_dir and old_parent != new_parent:
                    d = 1 if src.is_dir else -1
                    db.execute("UPDATE inodes SET nlink=nlink+? WHERE ino=?", (d, new_parent))
                    db.execute("UPDATE inodes SET nlink=nlink-? WHERE ino=?", (d, old_parent))
            else:
                if dst is not None:
                    if dst.ino == src.ino:
                        return None  # same file: POSIX says do nothing
                    if noreplace:
                        raise Exists(new_name.decode(errors="replace"))
                    if dst.is_dir:
                        if not src.is_dir:
                            raise IsADirectory(new_name.decode(errors="replace"))
                        if db.execute("SELECT 1 FROM entries WHERE parent=? LIMIT 1", (dst.ino,)).fetchone():
                            raise NotEmpty(new_name.decode(errors="replace"))
                        db.execute("DELETE FROM inodes WHERE ino=?", (dst.ino,))
                        db.execute("DELETE FROM xattrs WHERE ino=?", (dst.ino,))
                        db.execute("UPDATE inodes SET nlink=nlink-1 WHERE ino=?", (new_parent,))
                    else:
                        if src.is_dir:
                            raise NotADirectory(new_name.decode(errors="replace"))
                        db.execute("UPDATE inodes SET nlink=nlink-1, ctime_ns=? WHERE ino=?", (t, dst.ino))
                        replaced = dst.ino
                    db.execute("DELETE FROM entries WHERE parent=? AND name=?", (new_parent, new_name))
                db.execute("UPDATE entries SET parent=?, name=? WHERE parent=? AND name=?",
                           (new_parent, new_name, old_parent, old_name))
                if src.is_dir and old_parent != new_parent:
                    db.execute("UPDATE inodes SET nlink=nlink-1 WHERE ino=?", (old_parent,))
                    db.execute("UPDATE inodes SET nlink=nlink+1 WHERE ino=?", (new_parent,))
            db.execute("UPDATE inodes SET ctime_ns=? WHERE ino=?", (t, src.ino))
            db.execute("UPDATE inodes SET mtime_ns=?, ctime_ns=? WHERE ino IN (?, ?)", (t, t, old_parent, new_parent))
            self._bump(db)
        return self.get_inode(replaced) if replaced is not None else None

    def readdir(self, ino: int, after: int, limit: int = 1000) -> list[tuple[int, bytes, Inode]]:
        """Entries with id > after, in id order. Ids never change for an entry and
        new entries get larger ids, so offsets stay stable under concurrent change."""
        self._require_dir(ino)
        cols = ", ".join("i." + c.strip() for c in _INODE_COLS.split(","))
        rows = self.db.execute(
            f"SELECT e.id, e.name, {cols} FROM entries e JOIN inodes i ON i.ino=e.ino "
            "WHERE e.parent=? AND e.id>? ORDER BY e.id LIMIT ?", (ino, after, limit)).fetchall()
        return [(r[0], bytes(r[1]), _inode(r[2:])) for r in rows]

    def parent_of(self, ino: int) -> int:
        row = self.db.execute("SELECT parent FROM entries WHERE ino=? LIMIT 1", (ino,)).fetchone()
        return ROOT if row is None else row[0]

    def set_attrs(self, ino: int, **fields) -> Inode:
        allowed = {"mode", "uid", "gid", "size", "atime_ns", "mtime_ns", "ctime_ns"}
        if set(fields) - allowed:
            raise ValueError(f"bad inode fields {fields}")
        if fields:
            cols = ", ".join(f"{k}=?" for k in fields)
            with self._tx() as db:
                cur = db.execute(f"UPDATE inodes SET {cols} WHERE ino=?", (*fields.values(), ino))
                if cur.rowcount == 0:
                    raise NotFound(f"inode {ino}")
                self._bump(db)
        return self.get_inode(ino)

    def purge(self, ino: int) -> None:
        """Delete an unlinked inode with its stripes; its shards go to the garbage list."""
        with self._tx() as db:
            node = self.get_inode(ino)
            if node.nlink > 0:
                return
            self._garbage_stripes(db, node, 0)
            db.execute("DELETE FROM inodes WHERE ino=?", (ino,))
            db.execute("DELETE FROM xattrs WHERE ino=?", (ino,))
            db.execute("DELETE FROM repair_queue WHERE ino=?", (ino,))
            self._bump(db)

    def unlinked_inodes(self) -> list[int]:
        return [r[0] for r in self.db.execute("SELECT ino FROM inodes WHERE nlink<=0 AND ino<>?", (ROOT,))]

    # -- extended attributes -----------------------------------------------
    def getxattr(self, ino: int, name: bytes) -> bytes:
        row = self.db.execute("SELECT value FROM xattrs WHERE ino=? AND name=?", (ino, name)).fetchone()
        if row is None:
            self.get_inode(ino)
            raise NoAttribute(name.decode(errors="replace"))
        return bytes(row[0])

    def setxattr(self, ino: int, name: bytes, value: bytes, *, create: bool = False, replace: bool = False) -> None:
        with self._tx() as db:
            self.get_inode(ino)
            have = db.execute("SELECT 1 FROM xattrs WHERE ino=? AND name=?", (ino, name)).fetchone()
            if create and have:
                raise Exists(name.decode(errors="replace"))
            if replace and not have:
                raise NoAttribute(name.decode(errors="replace"))
            db.execute("INSERT OR REPLACE INTO xattrs(ino, name, value) VALUES(?,?,?)", (ino, name, value))
            db.execute("UPDATE inodes SET ctime_ns=? WHERE ino=?", (now_ns(), ino))
            self._bump(db)

    def xattrs_of(self, ino: int) -> dict[bytes, bytes]:
        """Every extended attribute of an inode (raises NotFound for no inode)."""
        self.get_inode(ino)
        return {bytes(n): bytes(v) for n, v in self.db.execute("SELECT name, value FROM xattrs WHERE ino=?", (ino,))}

    def listxattr(self, ino: int) -> list[bytes]:
        self.get_inode(ino)
        return [bytes(r[0]) for r in self.db.execute("SELECT name FROM xattrs WHERE ino=? ORDER BY name", (ino,))]

    def removexattr(self, ino: int, name: bytes) -> None:
        with self._tx() as db:
            cur = db.execute("DELETE FROM xattrs WHERE ino=? AND name=?", (ino, name))
            if cur.rowcount == 0:
                self.get_inode(ino)
                raise NoAttribute(name.decode(errors="replace"))
            db.execute("UPDATE inodes SET ctime_ns=? WHERE ino=?", (now_ns(), ino))
            self._bump(db)

    # -- stripes and shards -------------------------------------------------
    def _shards_of(self, ino: int, lo: int, hi: int) -> dict[int, list[ShardLoc]]:
        out: dict[int, list[ShardLoc]] = {}
        for idx, shard, store_id, state in self.db.execute(
                "SELECT idx, shard, store_id, state FROM shards WHERE ino=? AND idx>=? AND idx<? ORDER BY idx, shard",
                (ino, lo, hi)):
            out.setdefault(idx, []).append(ShardLoc(shard=shard, store_id=store_id, state=state))
        return out

    def stripes(self, ino: int, lo: int = 0, hi: int = 1 << 62) -> dict[int, StripeRecord]:
        """Current stripes of a file with index in [lo, hi)."""
        shards = self._shards_of(ino, lo, hi)
        out = {}
        for idx, version, length, coded, k, n in self.db.execute(
                "SELECT idx, version, length, coded_length, k, n FROM stripes WHERE ino=? AND idx>=? AND idx<?", (ino, lo, hi)):
            out[idx] = StripeRecord(ino=ino, idx=idx, version=version, length=length, coded_length=coded, k=k, n=n,
                                    shards=tuple(shards.get(idx, ())))
        return out

    def stripe(self, ino: int, idx: int) -> StripeRecord | None:
        return self.stripes(ino, idx, idx + 1).get(idx)

    def add_intents(self, file_id: str, items: Iterable[tuple[int, int, str]]) -> None:
        """Record stripes about to be written: (idx, version, placement as
        comma-separated store ids). No fsync (see the module docstring)."""
        self.add_intent_rows([(file_id, i, v, p) for i, v, p in items])

    def add_intent_rows(self, rows: Iterable[tuple[str, int, int, str]]) -> None:
        """add_intents for stripes of several files: (file_id, idx, version, placement)."""
        t = time.time()
        with self._tx() as db:
            db.executemany("INSERT OR REPLACE INTO intents(file_id, idx, version, placement, since) VALUES(?,?,?,?,?)",
                           [(*row, t) for row in rows])

    def intents(self) -> list[tuple[str, int, int, list[str]]]:
        return [(r[0], r[1], r[2], [s for s in r[3].split(",") if s])
                for r in self.db.execute("SELECT file_id, idx, version, placement FROM intents")]

    def drop_intents(self, items: Iterable[tuple[str, int, int]]) -> None:
        with self._tx() as db:
            db.executemany("DELETE FROM intents WHERE file_id=? AND idx=? AND version=?", list(items))

    def _garbage_stripes(self, db, node: Inode, from_idx: int, only: Sequence[int] | None = None) -> None:
        t = time.time()
        if only is not None:
            rows = []
            for idx in only:
                rows += db.execute("SELECT idx, version, shard, store_id FROM shards WHERE ino=? AND idx=?", (node.ino, idx)).fetchall()
        else:
            rows = db.execute("SELECT idx, version, shard, store_id FROM shards WHERE ino=? AND idx>=?", (node.ino, from_idx)).fetchall()
        db.executemany("INSERT INTO garbage(store_id, file_id, idx, version, shard, since) VALUES(?,?,?,?,?,?)",
                       [(s, node.file_id, i, v, sh, t) for i, v, sh, s in rows if s is not None])
        if only is not None:
            for idx in only:
                db.execute("DELETE FROM shards WHERE ino=? AND idx=?", (node.ino, idx))
                db.execute("DELETE FROM stripes WHERE ino=? AND idx=?", (node.ino, idx))
        else:
            db.execute("DELETE FROM shards WHERE ino=? AND idx>=?", (node.ino, from_idx))
            db.execute("DELETE FROM stripes WHERE ino=? AND idx>=?", (node.ino, from_idx))

    def commit_file(self, ino: int, *, size: int, mtime_ns: int | None, stripes: Sequence[NewStripe],
                    stripe_size: int, cut: int | None = None) -> Inode:
        """Make new stripe versions current and set the file size, in one durable
        transaction. `cut`, if given, is a truncation that happened before the
        new stripes were written: it applies first. Replaced versions and
        stripes past the end go to the garbage list; a last stripe reaching
        past the end is trimmed in place (bytes past a stripe's length read as
        zeros). Intents of these stripes are dropped."""
        t = now_ns()
        with self._tx(durable=True) as db:
            node = self.get_inode(ino)
            if not node.is_reg:
                raise IsADirectory(f"inode {ino} is not a regular file")
            if cut is not None:
                self._truncate_stripes(db, node, cut, stripe_size)
            replaced = [s.idx for s in stripes]
            if replaced:
                self._garbage_stripes(db, node, 0, only=replaced)
            for s in stripes:
                db.execute("INSERT INTO stripes(ino, idx, version, length, coded_length, k, n) VALUES(?,?,?,?,?,?,?)",
                           (ino, s.idx, s.version, s.length, s.coded_length, s.k, s.n))
                db.executemany("INSERT INTO shards(ino, idx, shard, version, store_id, state) VALUES(?,?,?,?,?,?)",
                               [(ino, s.idx, sh.shard, s.version, sh.store_id, sh.state) for sh in s.shards])
                db.execute("DELETE FROM intents WHERE file_id=? AND idx=? AND version=?", (node.file_id, s.idx, s.version))
                if any(sh.state in ("missing", "corrupt") for sh in s.shards):
                    db.execute("INSERT OR IGNORE INTO repair_queue(ino, idx, reason, queued) VALUES(?,?,?,?)",
                               (ino, s.idx, "written-short", time.time()))
            self._truncate_stripes(db, node, size, stripe_size)
            db.execute("UPDATE inodes SET size=?, mtime_ns=COALESCE(?, mtime_ns), ctime_ns=? WHERE ino=?",
                       (size, mtime_ns, t, ino))
            self._bump(db)
        return self.get_inode(ino)

    def _truncate_stripes(self, db, node: Inode, size: int, stripe_size: int) -> None:
        keep = -(-size // stripe_size)  # stripes [0, keep) stay
        self._garbage_stripes(db, node, keep)
        if size % stripe_size and keep:
            db.execute("UPDATE stripes SET length=MIN(length, ?) WHERE ino=? AND idx=?",
                       (size % stripe_size, node.ino, keep - 1))

    def set_shard_states(self, updates: Iterable[tuple[int, int, int, int, str | None, str]]) -> None:
        """(ino, idx, version, shard, store_id, state): applied only where the
        stripe's current version still matches, so late news about a replaced
        version is ignored."""
        with self._tx() as db:
            for ino, idx, version, shard, store_id, state in updates:
                db.execute("UPDATE shards SET state=?, store_id=COALESCE(?, store_id) "
                           "WHERE ino=? AND idx=? AND shard=? AND version=?", (state, store_id, ino, idx, shard, version))

    # -- repair queue -------------------------------------------------------
    def queue_repair(self, items: Iterable[tuple[int, int, str]]) -> None:
        t = time.time()
        with self._tx() as db:
            db.executemany("INSERT OR IGNORE INTO repair_queue(ino, idx, reason, queued) VALUES(?,?,?,?)",
                           [(i, x, r, t) for i, x, r in items])

    def repair_queue(self, limit: int = 1000) -> list[tuple[int, int, str]]:
        return [tuple(r) for r in self.db.execute(
            "SELECT ino, idx, reason FROM repair_queue ORDER BY queued LIMIT ?", (limit,))]

    def repair_queue_length(self) -> int:
        return self.db.execute("SELECT COUNT(*) FROM repair_queue").fetchone()[0]

    # -- garbage ------------------------------------------------------------
    def add_garbage(self, items: Iterable[tuple[str, str, int, int, int]]) -> None:
        t = time.time()
        with self._tx() as db:
            db.executemany("INSERT INTO garbage(store_id, file_id, idx, version, shard, since) VALUES(?,?,?,?,?,?)",
                           [(*it, t) for it in items])

    def garbage(self, limit: int = 1000) -> list[Garbage]:
        return [Garbage(id=r[0], store_id=r[1], file_id=r[2], idx=r[3], version=r[4], shard=r[5]) for r in
                self.db.execute("SELECT id, store_id, file_id, idx, version, shard FROM garbage ORDER BY id LIMIT ?", (limit,))]

    def drop_garbage(self, ids: Iterable[int]) -> None:
        with self._tx() as db:
            db.executemany("DELETE FROM garbage WHERE id=?", [(i,) for i in ids])

    # -- health ---------------------------------------------------------------
    def stripe_health(self, usable: Iterable[str]) -> dict[str, int]:
        """Stripes counted by health, counting only 'ok' shards on the given stores."""
        usable = list(usable)
        marks = ",".join("?" * len(usable)) or "NULL"
        rows = self.db.execute(
            f"SELECT s.k, s.n, COALESCE(v.valid, 0), COUNT(*) FROM stripes s LEFT JOIN "
            f"(SELECT ino, idx, COUNT(*) AS valid FROM shards WHERE state='ok' AND store_id IN ({marks}) GROUP BY ino, idx) v "
            "ON v.ino=s.ino AND v.idx=s.idx GROUP BY s.k, s.n, COALESCE(v.valid, 0)", usable).fetchall()
        out = {"intact": 0, "degraded": 0, "critical": 0, "lost": 0}
        for k, n, valid, count in rows:
            out[health_of(valid, k, n)] += count
        return out

    def counts(self) -> dict[str, int]:
        one = lambda q: self.db.execute(q).fetchone()[0]  # noqa: E731
        return {"files": one("SELECT COUNT(*) FROM inodes WHERE file_id IS NOT NULL"),
                "directories": one("SELECT COUNT(*) FROM inodes WHERE (mode & 61440) = 16384"),
                "stripes": one("SELECT COUNT(*) FROM stripes"),
                "bytes": one("SELECT COALESCE(SUM(size), 0) FROM inodes WHERE file_id IS NOT NULL"),
                "garbage": one("SELECT COUNT(*) FROM garbage")}

    def pending_stripes(self) -> list[tuple[int, int]]:
        """Stripes with shards whose write outcome was never recorded."""
        return [tuple(r) for r in self.db.execute("SELECT DISTINCT ino, idx FROM shards WHERE state='pending'")]

    def file_ids(self) -> dict[str, int]:
        return {r[0]: r[1] for r in self.db.execute("SELECT file_id, ino FROM inodes WHERE file_id IS NOT NULL")}

    def ino_of_file(self, file_id: str) -> int | None:
        row = self.db.execute("SELECT ino FROM inodes WHERE file_id=?", (file_id,)).fetchone()
        return None if row is None else row[0]

    @classmethod
    def open_read_only(cls, path: Path) -> "Catalog":
        """A read-only connection (SQLite URI ``mode=ro``): it never writes the
        database and never migrates, so it is safe beside a running daemon (WAL
        lets readers and the writer proceed together). SQLite may create the
        -wal and -shm files next to it. Raises CatalogError if the file is
        missing, not a catalog or of another schema version."""
        self = cls.__new__(cls)
        self.path = Path(path)
        if not self.path.is_file():
            raise CatalogError(f"no catalog at {self.path}")
        try:
            self.db = sqlite3.connect(self.path.resolve().as_uri() + "?mode=ro", uri=True, isolation_level=None,
                                      check_same_thread=False, timeout=30)
        except sqlite3.DatabaseError as e:
            raise CatalogError(f"catalog {self.path} cannot be opened: {e}") from e
        try:
            ver = self.db.execute("PRAGMA user_version").fetchone()[0]
            if ver != SCHEMA_VERSION:
                raise CatalogError(f"catalog {self.path} has schema {ver}, this Shoal reads {SCHEMA_VERSION}")
        except sqlite3.DatabaseError as e:
            self.db.close()
            raise CatalogError(f"catalog {self.path} cannot be read: {e}") from e
        except CatalogError:
            self.db.close()
            raise
        return self

    @staticmethod
    def inspect(path: Path) -> dict:
        """Identity of a catalog file, read-only: {"pool_id", "pool_name",
        "generation", "next_version", "schema"}. Runs SQLite's quick_check.
        Raises CatalogError saying what is wrong."""
        c = Catalog.open_read_only(path)
        try:
            problems = [r[0] for r in c.db.execute("PRAGMA quick_check").fetchall()]
            if problems != ["ok"]:
                raise CatalogError(f"catalog {path} fails SQLite's quick_check: {'; '.join(problems[:3])}")
            if c.get_meta("pool_id") is None:
                raise CatalogError(f"catalog {path} is not initialised")
            return {"pool_id": c.get_meta("pool_id"), "pool_name": c.get_meta("pool_name"),
                    "generation": int(c.get_meta("generation", 0)), "next_version": int(c.get_meta("next_version", 1)),
                    "schema": SCHEMA_VERSION}
        except sqlite3.DatabaseError as e:
            raise CatalogError(f"catalog {path} cannot be read: {e}") from e
        finally:
            c.close()

    def snapshot_to(self, dest: Path) -> tuple[str, int]:
        """Copy the whole database to dest with SQLite's online backup API (one
        step, so one consistent read snapshot), in rollback-journal mode, and
        fsync it. Returns (pool_id, generation) as recorded in the copy itself.
        Works on a read-only connection."""
        out = sqlite3.connect(str(dest))
        try:
            self.db.backup(out)
            out.execute("PRAGMA journal_mode=DELETE")
            meta = dict(out.execute("SELECT key, value FROM meta WHERE key IN ('pool_id', 'generation')").fetchall())
        finally:
            out.close()
        fd = os.open(dest, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
        return meta.get("pool_id"), int(meta.get("generation", 0))

    def all_inodes(self) -> list[Inode]:
        return [_inode(r) for r in self.db.execute(f"SELECT {_INODE_COLS} FROM inodes ORDER BY ino")]

    def all_entries(self) -> list[tuple[int, int, bytes, int]]:
        """(entry id, parent, name, ino) of every directory entry."""
        return [(r[0], r[1], bytes(r[2]), r[3]) for r in self.db.execute("SELECT id, parent, name, ino FROM entries ORDER BY id")]

    def all_stripes(self) -> list[tuple[FileId | None, StripeRecord]]:
        """Every current stripe with its file id (None if the inode is gone)."""
        shards: dict[tuple[int, int], list[ShardLoc]] = {}
        for ino, idx, shard, store_id, state in self.db.execute(
                "SELECT ino, idx, shard, store_id, state FROM shards ORDER BY ino, idx, shard"):
            shards.setdefault((ino, idx), []).append(ShardLoc(shard=shard, store_id=store_id, state=state))
        return [(r[0], StripeRecord(ino=r[1], idx=r[2], version=r[3], length=r[4], coded_length=r[5], k=r[6], n=r[7],
                                    shards=tuple(shards.get((r[1], r[2]), ()))))
                for r in self.db.execute(
                    "SELECT i.file_id, s.ino, s.idx, s.version, s.length, s.coded_length, s.k, s.n "
                    "FROM stripes s LEFT JOIN inodes i ON i.ino=s.ino ORDER BY s.ino, s.idx")]

    def repair_queued(self) -> set[tuple[int, int]]:
        return {(r[0], r[1]) for r in self.db.execute("SELECT ino, idx FROM repair_queue")}

    def restore_stripes(self, ino: int, stripes: Sequence[NewStripe], *, size: int | None = None,
                        reason: str = "recovered") -> None:
        """Make these stripe versions current as found on the stores (recovery):
        no garbage is listed for what they replace. Stripes with shards that are
        not 'ok' are queued for repair. size, if given, becomes the file size."""
        t = time.time()
        with self._tx() as db:
            for s in stripes:
                db.execute("DELETE FROM shards WHERE ino=? AND idx=?", (ino, s.idx))
                db.execute("INSERT OR REPLACE INTO stripes(ino, idx, version, length, coded_length, k, n) VALUES(?,?,?,?,?,?,?)",
                           (ino, s.idx, s.version, s.length, s.coded_length, s.k, s.n))
                db.executemany("INSERT INTO shards(ino, idx, shard, version, store_id, state) VALUES(?,?,?,?,?,?)",
                               [(ino, s.idx, sh.shard, s.version, sh.store_id, sh.state) for sh in s.shards])
                if any(sh.state != "ok" for sh in s.shards):
                    db.execute("INSERT OR IGNORE INTO repair_queue(ino, idx, reason, queued) VALUES(?,?,?,?)",
                               (ino, s.idx, reason, t))
            if size is not None:
                db.execute("UPDATE inodes SET size=?, ctime_ns=? WHERE ino=?", (size, now_ns(), ino))
            self._bump(db)

    def adopt_file(self, parent: int, name: bytes, *, file_id: str, mode: int, uid: int = 0, gid: int = 0,
                   mtime_ns: int | None = None) -> Inode:
        """A regular file that takes an existing file id (recovery puts files
        the catalog lost back under lost+found). Raises Exists."""
        return self.create(parent, name, mode=stat.S_IFREG | (mode & 0o7777), uid=uid, gid=gid,
                           file_id=file_id, mtime_ns=mtime_ns)

    def raise_next_version(self, at_least: int) -> None:
        """Stripe versions below at_least are taken (found on the stores)."""
        with self._tx() as db:
            db.execute("UPDATE meta SET value=MAX(CAST(value AS INTEGER), ?) WHERE key='next_version'", (at_least,))

    def path_of(self, ino: int) -> bytes | None:
        """The path of an inode from the root (its first entry at each level),
        or None if it is not reachable."""
        parts, seen = [], set()
        while ino != ROOT:
            if ino in seen:
                return None
            seen.add(ino)
            row = self.db.execute("SELECT parent, name FROM entries WHERE ino=? ORDER BY id LIMIT 1", (ino,)).fetchone()
            if row is None:
                return None
            parts.append(bytes(row[1]))
            ino = row[0]
        return b"/" + b"/".join(reversed(parts))

    def drop_entries(self, ids: Iterable[int]) -> None:
        with self._tx() as db:
            db.executemany("DELETE FROM entries WHERE id=?", [(i,) for i in ids])
            self._bump(db)

    def reattach(self, ino: int, parent: int, name: bytes) -> None:
        """Replace every entry of ino by one entry parent/name (check --repair
        moves unreachable inodes into lost+found). nlink is the caller's."""
        check_name(name)
        with self._tx() as db:
            self._require_dir(parent)
            if db.execute("SELECT 1 FROM entries WHERE parent=? AND name=?", (parent, name)).fetchone():
                raise Exists(name.decode(errors="replace"))
            db.execute("DELETE FROM entries WHERE ino=?", (ino,))
            db.execute("INSERT INTO entries(parent, name, ino) VALUES(?,?,?)", (parent, name, ino))
            self._bump(db)

    def set_nlinks(self, items: Iterable[tuple[int, int]]) -> None:
        """(ino, nlink) pairs."""
        with self._tx() as db:
            db.executemany("UPDATE inodes SET nlink=? WHERE ino=?", [(n, i) for i, n in items])
            self._bump(db)

    def give_file_id(self, ino: int) -> str | None:
        """A fresh file id for a regular file that has none and no stripes."""
        with self._tx() as db:
            node = self.get_inode(ino)
            if not node.is_reg or node.file_id is not None or \
                    db.execute("SELECT 1 FROM stripes WHERE ino=? LIMIT 1", (ino,)).fetchone():
                return None
            fid = uuid.uuid4().hex
            db.execute("UPDATE inodes SET file_id=? WHERE ino=?", (fid, ino))
            self._bump(db)
        return fid

    # -- repair, scrub and store lifecycle (gateway.repair, gateway.scrub, gateway.lifecycle)
    def repair_batch(self, usable: Sequence[str], limit: int = 1000) -> list[tuple[int, int, str, int | None]]:
        """Queued stripes, lowest margin first: (ino, idx, reason, margin), where
        margin is the shards 'ok' on the usable stores minus k, and None when
        the stripe no longer exists (the caller dequeues it). Ties: longest
        queued first."""
        usable = list(usable)
        marks = ",".join("?" * len(usable)) or "NULL"
        rows = self.db.execute(
            "SELECT q.ino, q.idx, q.reason, s.k, "
            f"(SELECT COUNT(*) FROM shards h WHERE h.ino=q.ino AND h.idx=q.idx AND h.state='ok' AND h.store_id IN ({marks})) AS valid "
            "FROM repair_queue q LEFT JOIN stripes s ON s.ino=q.ino AND s.idx=q.idx "
            "ORDER BY s.k IS NOT NULL, valid - COALESCE(s.k, 0), q.queued LIMIT ?", (*usable, limit)).fetchall()
        return [(r[0], r[1], r[2], None if r[3] is None else r[4] - r[3]) for r in rows]

    def queue_store_stripes(self, store_id: str, reason: str, states: Sequence[str] = SHARD_STATES) -> int:
        """Queue every stripe with a shard on store_id in one of `states`;
        returns how many were not queued already."""
        marks = ",".join("?" * len(states))
        with self._tx() as db:
            cur = db.execute("INSERT OR IGNORE INTO repair_queue(ino, idx, reason, queued) "
                             f"SELECT DISTINCT ino, idx, ?, ? FROM shards WHERE store_id=? AND state IN ({marks})",
                             (reason, time.time(), store_id, *states))
            return cur.rowcount

    def queue_unplaced(self, reason: str = "unplaced") -> int:
        """Queue every stripe with a shard that has no store (written short)."""
        with self._tx() as db:
            cur = db.execute("INSERT OR IGNORE INTO repair_queue(ino, idx, reason, queued) "
                             "SELECT DISTINCT ino, idx, ?, ? FROM shards WHERE store_id IS NULL", (reason, time.time()))
            return cur.rowcount

    def repair_view(self, keys: Sequence[tuple[int, int]]) -> dict[tuple[int, int], tuple[str, StripeRecord]]:
        """For repair, read in one snapshot: the file id and current record of
        each (ino, idx) that still exists."""
        if not keys:
            return {}
        want = "WITH want(ino, idx) AS (VALUES " + ",".join("(?,?)" for _ in keys) + ") "
        args = [v for key in keys for v in key]
        self.db.execute("BEGIN")
        try:
            stripes = self.db.execute(
                want + "SELECT s.ino, s.idx, s.version, s.length, s.coded_length, s.k, s.n, i.file_id FROM want w "
                "JOIN stripes s ON s.ino=w.ino AND s.idx=w.idx JOIN inodes i ON i.ino=s.ino "
                "WHERE i.file_id IS NOT NULL", args).fetchall()
            shards: dict[tuple[int, int], list[ShardLoc]] = {}
            for ino, idx, shard, store_id, state in self.db.execute(
                    want + "SELECT h.ino, h.idx, h.shard, h.store_id, h.state FROM want w "
                    "JOIN shards h ON h.ino=w.ino AND h.idx=w.idx ORDER BY h.ino, h.idx, h.shard", args):
                shards.setdefault((ino, idx), []).append(ShardLoc(shard=shard, store_id=store_id, state=state))
        finally:
            self.db.execute("COMMIT")
        return {(ino, idx): (fid, StripeRecord(ino=ino, idx=idx, version=v, length=length, coded_length=coded, k=k, n=n,
                                               shards=tuple(shards.get((ino, idx), ()))))
                for ino, idx, v, length, coded, k, n, fid in stripes}

    def record_repairs(self, items: Sequence[tuple[int, int, int, str, Sequence[tuple[int, str, str | None]], bool]],
                       intents: Iterable[tuple[str, int, int]] = ()) -> tuple[list[int], int]:
        """Record what repair did to several stripes, in one transaction.

        Each item is (ino, idx, version, file_id, moves, dequeue). moves point
        regenerated shards at the stores that now hold them: (shard,
        store_id, old store_id whose copy becomes garbage, or None), applied
        only while the stripe's version is still `version`; a regenerated
        shard of a version replaced meanwhile goes to the garbage list
        instead. With dequeue, the stripe leaves the repair queue if every
        move applied. The given write intents are dropped. Returns the number
        of moves applied per item, and how many stripes left the queue."""
        t = time.time()
        applied_per_item = []
        dequeued = 0
        with self._tx() as db:
            for ino, idx, version, file_id, moves, dequeue in items:
                applied = 0
                for shard, store_id, old in moves:
                    cur = db.execute("UPDATE shards SET store_id=?, state='ok' WHERE ino=? AND idx=? AND shard=? AND version=?",
                                     (store_id, ino, idx, shard, version))
                    if cur.rowcount:
                        applied += 1
                        dead = old if old is not None and old != store_id else None
                    else:
                        dead = store_id
                    if dead is not None:
                        db.execute("INSERT INTO garbage(store_id, file_id, idx, version, shard, since) VALUES(?,?,?,?,?,?)",
                                   (dead, file_id, idx, version, shard, t))
                if dequeue and applied == len(moves):
                    dequeued += db.execute("DELETE FROM repair_queue WHERE ino=? AND idx=?", (ino, idx)).rowcount
                applied_per_item.append(applied)
            db.executemany("DELETE FROM intents WHERE file_id=? AND idx=? AND version=?", list(intents))
        return applied_per_item, dequeued

    def stripe_page(self, after: tuple[int, int], limit: int) -> list[tuple[FileId | None, StripeRecord]]:
        """Up to `limit` current stripes after (ino, idx), in (ino, idx) order,
        with their file ids, read in one snapshot (for scans)."""
        self.db.execute("BEGIN")
        try:
            rows = self.db.execute(
                "SELECT i.file_id, s.ino, s.idx, s.version, s.length, s.coded_length, s.k, s.n FROM stripes s "
                "LEFT JOIN inodes i ON i.ino=s.ino WHERE (s.ino, s.idx) > (?, ?) ORDER BY s.ino, s.idx LIMIT ?",
                (after[0], after[1], limit)).fetchall()
            shards: dict[tuple[int, int], list[ShardLoc]] = {}
            if rows:
                last = (rows[-1][1], rows[-1][2])
                for ino, idx, shard, store_id, state in self.db.execute(
                        "SELECT ino, idx, shard, store_id, state FROM shards WHERE (ino, idx) > (?, ?) AND (ino, idx) <= (?, ?) "
                        "ORDER BY ino, idx, shard", (after[0], after[1], last[0], last[1])):
                    shards.setdefault((ino, idx), []).append(ShardLoc(shard=shard, store_id=store_id, state=state))
        finally:
            self.db.execute("COMMIT")
        return [(r[0], StripeRecord(ino=r[1], idx=r[2], version=r[3], length=r[4], coded_length=r[5], k=r[6], n=r[7],
                                    shards=tuple(shards.get((r[1], r[2]), ())))) for r in rows]

    def known_shards(self, store_id: str, file_ids: Sequence[str]) -> tuple[set[tuple[str, int, int, int]], set[tuple[str, int, int]]]:
        """For an orphan scan of one store, read in one snapshot: (file_id, idx,
        version, shard) of every shard of these files that the catalog places
        on the store or lists as garbage there, and (file_id, idx, version) of
        every write intent of these files (its shards may be on any store)."""
        fids = list(file_ids)
        placed: set[tuple[str, int, int, int]] = set()
        intents: set[tuple[str, int, int]] = set()
        self.db.execute("BEGIN")
        try:
            for i in range(0, len(fids), 500):
                part = fids[i:i + 500]
                marks = ",".join("?" * len(part))
                placed.update(tuple(r) for r in self.db.execute(
                    "SELECT i.file_id, h.idx, h.version, h.shard FROM shards h JOIN inodes i ON i.ino=h.ino "
                    f"WHERE h.store_id=? AND i.file_id IN ({marks})", (store_id, *part)))
                placed.update(tuple(r) for r in self.db.execute(
                    f"SELECT file_id, idx, version, shard FROM garbage WHERE store_id=? AND file_id IN ({marks})",
                    (store_id, *part)))
                intents.update(tuple(r) for r in self.db.execute(
                    f"SELECT file_id, idx, version FROM intents WHERE file_id IN ({marks})", part))
        finally:
            self.db.execute("COMMIT")
        return placed, intents

    def replace_store_record(self, old_id: str, new_id: str, *, path: str, old_path: str) -> int:
        """A new store takes over from old_id at `path`, in one transaction: the
        old record moves to `old_path` and is marked failed; the new one gets
        the old domain and replaces=old_id; the old store's shard rows point at
        the new store with state 'missing' and their stripes are queued for
        repair; garbage listed on the old store is forgotten (it went with the
        old disk). Returns the number of shard rows re-pointed."""
        t = time.time()
        with self._tx(durable=True) as db:
            row = db.execute("SELECT domain FROM stores WHERE store_id=?", (old_id,)).fetchone()
            if row is None:
                raise CatalogError(f"store {old_id} is not in the catalog")
            db.execute("UPDATE stores SET path=?, admin='failed' WHERE store_id=?", (old_path, old_id))
            db.execute("INSERT INTO stores(store_id, path, domain, replaces, added) VALUES(?,?,?,?,?)",
                       (new_id, path, row[0], old_id, t))
            moved = db.execute("UPDATE shards SET store_id=?, state='missing' WHERE store_id=?", (new_id, old_id)).rowcount
            db.execute("INSERT OR IGNORE INTO repair_queue(ino, idx, reason, queued) "
                       "SELECT DISTINCT ino, idx, 'store-replaced', ? FROM shards WHERE store_id=?", (t, new_id))
            db.execute("DELETE FROM garbage WHERE store_id=?", (old_id,))
            self._bump(db)
        return moved

    def last_commit_time(self) -> float:
        """Unix time of the newest inode change: every commit sets the file's
        ctime, so a shard file newer than this may belong to a commit this
        catalog has not seen (one restored from an older mirror, say)."""
        row = self.db.execute("SELECT MAX(ctime_ns) FROM inodes").fetchone()
        return (row[0] or 0) / 1e9

    def store_shard_count(self, store_id: str) -> int:
        return self.db.execute("SELECT COUNT(*) FROM shards WHERE store_id=?", (store_id,)).fetchone()[0]

    def store_payload_bytes(self, store_id: str) -> int:
        """Payload bytes of the current shards on store_id (headers not counted)."""
        return self.db.execute(
            "SELECT COALESCE(SUM((s.coded_length + s.k - 1) / s.k), 0) FROM shards h "
            "JOIN stripes s ON s.ino=h.ino AND s.idx=h.idx WHERE h.store_id=?", (store_id,)).fetchone()[0]

    def checkpoint(self) -> None:
        self.db.execute("PRAGMA wal_checkpoint(TRUNCATE)")

def health_of(valid: int, k: int, n: int) -> str:
    if valid >= n:
        return "intact"
    if valid > k:
        return "degraded"
    if valid == k:
        return "critical"
    return "lost"


def _statements(script: str) -> list[str]:
    out, buf = [], []
    for line in script.splitlines():
        line = line.split("--", 1)[0]
        if not line.strip():
            continue
        buf.append(line)
        if line.rstrip().endswith(";"):
            out.append("\n".join(buf))
            buf = []
    if buf:
        out.append("\n".join(buf))
    return out

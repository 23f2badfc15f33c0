"""The catalog: namespace rules, durable commits, versioned schema."""
from __future__ import annotations

import sqlite3
import stat

import pytest

from gateway import catalog as cat
from gateway.catalog import Catalog, NewStripe, ShardLoc
from gateway.errors import (
    CatalogError, Exists, InvalidArgument, IsADirectory, NameTooLong, NoAttribute, NotADirectory, NotEmpty,
    NotFound,
)

FILE = stat.S_IFREG | 0o644
DIR = stat.S_IFDIR | 0o755


@pytest.fixture
def c(tmp_path):
    db = Catalog(tmp_path / "c.sqlite", create=True)
    db.initialise(pool_id="a" * 32, name="lab", k=2, n=3, stripe_size=4096)
    yield db
    db.close()


def stripe(idx, version, length, stores=("s0", "s1", "s2"), state="ok"):
    return NewStripe(idx=idx, version=version, length=length, coded_length=length, k=2, n=3,
                     shards=tuple(ShardLoc(shard=i, store_id=s, state=state) for i, s in enumerate(stores)))


def test_durability_settings(c, monkeypatch):
    # A commit that acknowledges data must survive power loss: in WAL mode,
    # synchronous=FULL (2) fsyncs the WAL at every COMMIT, NORMAL (1) does not
    # (SQLite documentation, PRAGMA synchronous). Record the level in force
    # at each COMMIT.
    assert c.db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    levels = []
    real = cat.Catalog._Tx.__exit__

    def spy(self, et, ev, tb):
        levels.append(self.db.execute("PRAGMA synchronous").fetchone()[0])
        return real(self, et, ev, tb)

    monkeypatch.setattr(cat.Catalog._Tx, "__exit__", spy)
    f = c.create(cat.ROOT, b"a", mode=FILE, uid=0, gid=0)
    c.add_intents("b" * 32, [(0, 1, "s0")])
    assert levels == [1, 1]  # namespace change and intent: no fsync
    c.commit_file(f.ino, size=10, mtime_ns=None, stripes=[stripe(0, 1, 10)], stripe_size=4096)
    c.reserve_versions(10)
    c.sync()
    assert levels[2:] == [2, 2, 2]  # data commit, version reservation, explicit sync: fsync
    assert c.db.execute("PRAGMA synchronous").fetchone()[0] == 1


def test_schema_versioned(tmp_path, c):
    assert c.db.execute("PRAGMA user_version").fetchone()[0] == cat.SCHEMA_VERSION
    path = tmp_path / "new.sqlite"
    raw = sqlite3.connect(path)
    raw.execute(f"PRAGMA user_version={cat.SCHEMA_VERSION + 1}")
    raw.close()
    with pytest.raises(CatalogError, match="newer than this Shoal"):
        Catalog(path)
    with pytest.raises(CatalogError, match="shoal init"):
        Catalog(tmp_path / "absent.sqlite")


def test_initialise_once(c):
    assert c.initialise(pool_id="b" * 32, name="x", k=1, n=1, stripe_size=4096) is False
    assert c.pool_id == "a" * 32


def test_namespace(c):
    d = c.create(cat.ROOT, b"runs", mode=DIR, uid=0, gid=0)
    f = c.create(d.ino, b"run-0001.csv", mode=FILE, uid=1, gid=2)
    assert c.lookup(d.ino, b"run-0001.csv").ino == f.ino
    assert c.get_inode(cat.ROOT).nlink == 3  # ., .., and runs/..
    with pytest.raises(Exists):
        c.create(d.ino, b"run-0001.csv", mode=FILE, uid=0, gid=0)
    with pytest.raises(NameTooLong):
        c.create(d.ino, b"x" * 256, mode=FILE, uid=0, gid=0)
    c.create(d.ino, b"y" * 255, mode=FILE, uid=0, gid=0)
    with pytest.raises(InvalidArgument):
        c.create(d.ino, b"a/b", mode=FILE, uid=0, gid=0)
    with pytest.raises(NotEmpty):
        c.rmdir(cat.ROOT, b"runs")
    with pytest.raises(NotADirectory):
        c.create(f.ino, b"z", mode=FILE, uid=0, gid=0)
    with pytest.raises(IsADirectory):
        c.unlink(cat.ROOT, b"runs")
    odd = bytes(range(1, 47)) + bytes(range(48, 256))[:100]  # any bytes but '/' and NUL
    c.create(d.ino, odd, mode=FILE, uid=0, gid=0)
    assert c.lookup(d.ino, odd)


def test_links_and_unlink(c):
    f = c.create(cat.ROOT, b"a", mode=FILE, uid=0, gid=0)
    assert c.link(f.ino, cat.ROOT, b"b").nlink == 2
    assert c.unlink(cat.ROOT, b"a").nlink == 1
    c.commit_file(f.ino, size=10, mtime_ns=None, stripes=[stripe(0, 1, 10)], stripe_size=4096)
    node = c.unlink(cat.ROOT, b"b")
    assert node.nlink == 0 and c.unlinked_inodes() == [f.ino]
    c.purge(f.ino)
    with pytest.raises(NotFound):
        c.get_inode(f.ino)
    assert len(c.garbage()) == 3  # its shards are queued for deletion


def test_rename_rules(c):
    a = c.create(cat.ROOT, b"a", mode=FILE, uid=0, gid=0)
    b = c.create(cat.ROOT, b"b", mode=FILE, uid=0, gid=0)
    with pytest.raises(Exists):
        c.rename(cat.ROOT, b"a", cat.ROOT, b"b", noreplace=True)
    c.rename(cat.ROOT, b"a", cat.ROOT, b"b", exchange=True)
    assert c.lookup(cat.ROOT, b"a").ino == b.ino and c.lookup(cat.ROOT, b"b").ino == a.ino
    replaced = c.rename(cat.ROOT, b"a", cat.ROOT, b"b")
    assert replaced.ino == a.ino and replaced.nlink == 0  # "b" named a after the exchange
    d = c.create(cat.ROOT, b"d", mode=DIR, uid=0, gid=0)
    sub = c.create(d.ino, b"sub", mode=DIR, uid=0, gid=0)
    with pytest.raises(InvalidArgument):
        c.rename(cat.ROOT, b"d", sub.ino, b"loop")
    with pytest.raises(IsADirectory):
        c.rename(cat.ROOT, b"b", cat.ROOT, b"d")


def test_readdir_offsets_stable(c):
    for i in range(10):
        c.create(cat.ROOT, f"f{i}".encode(), mode=FILE, uid=0, gid=0)
    first = c.readdir(cat.ROOT, 0, 4)
    c.unlink(cat.ROOT, b"f0")  # already listed
    c.unlink(cat.ROOT, b"f7")  # not yet listed
    c.create(cat.ROOT, b"late", mode=FILE, uid=0, gid=0)
    rest = c.readdir(cat.ROOT, first[-1][0], 100)
    names = [n for _, n, _ in first + rest]
    assert names == [b"f0", b"f1", b"f2", b"f3", b"f4", b"f5", b"f6", b"f8", b"f9", b"late"]


def test_xattrs(c):
    f = c.create(cat.ROOT, b"a", mode=FILE, uid=0, gid=0)
    c.setxattr(f.ino, b"user.instrument", b"spectrometer-2")
    assert c.getxattr(f.ino, b"user.instrument") == b"spectrometer-2"
    with pytest.raises(Exists):
        c.setxattr(f.ino, b"user.instrument", b"x", create=True)
    with pytest.raises(NoAttribute):
        c.setxattr(f.ino, b"user.other", b"x", replace=True)
    assert c.listxattr(f.ino) == [b"user.instrument"]
    c.removexattr(f.ino, b"user.instrument")
    with pytest.raises(NoAttribute):
        c.getxattr(f.ino, b"user.instrument")


def test_commit_swaps_versions_and_trims(c):
    f = c.create(cat.ROOT, b"a", mode=FILE, uid=0, gid=0)
    c.commit_file(f.ino, size=9000, mtime_ns=None, stripes=[stripe(0, 1, 4096), stripe(1, 2, 4096), stripe(2, 3, 808)],
                  stripe_size=4096)
    c.commit_file(f.ino, size=9000, mtime_ns=None, stripes=[stripe(1, 4, 4096)], stripe_size=4096)
    recs = c.stripes(f.ino)
    assert [recs[i].version for i in range(3)] == [1, 4, 3]
    assert {(g.idx, g.version) for g in c.garbage()} == {(1, 2)}  # copy-on-write: old shards to delete
    c.commit_file(f.ino, size=5000, mtime_ns=None, stripes=[], stripe_size=4096)
    recs = c.stripes(f.ino)
    assert sorted(recs) == [0, 1] and recs[1].length == 5000 - 4096 and recs[1].coded_length == 4096
    assert c.get_inode(f.ino).size == 5000


def test_health_counts(c):
    f = c.create(cat.ROOT, b"a", mode=FILE, uid=0, gid=0)
    c.commit_file(f.ino, size=8192, mtime_ns=None, stripes=[stripe(0, 1, 4096), stripe(1, 2, 4096)], stripe_size=4096)
    c.set_shard_states([(f.ino, 1, 2, 2, None, "missing")])
    assert c.stripe_health(["s0", "s1", "s2"]) == {"intact": 1, "degraded": 0, "critical": 1, "lost": 0}
    assert c.stripe_health(["s0"]) == {"intact": 0, "degraded": 0, "critical": 0, "lost": 2}
    c.set_shard_states([(f.ino, 1, 99, 1, None, "missing")])  # a stale version is ignored
    assert c.stripe_health(["s0", "s1", "s2"])["critical"] == 1

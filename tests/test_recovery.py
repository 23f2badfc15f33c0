"""recover and export against real stores (tmpfs) and a real SQLite catalog.

Files are written through the pool API; the catalog is then lost (state_dir
deleted), damaged or left in place, stores are pulled (unmounted), mirrors
corrupted. Exported files are compared with their originals by `cmp`, the
general-purpose reference tool for byte comparison.

The helpers at the top are shared with test_mirror.py and test_check.py.
"""
from __future__ import annotations

import json
import os
import shutil
import stat
import subprocess
from pathlib import Path

import pytest
import trio

import mounting
from gateway import admin, config, recovery
from gateway.catalog import ROOT, Catalog
from gateway.cli import main as cli_main
from gateway.errors import NotFound, StripeLost
from gateway.mirror import Mirror, mirror_names
from gateway.pool import open_pool
from gateway.store import LABEL_NAME, Label

pytestmark = mounting.requires_root

STRIPE = 64 * 1024


# -- helpers (also used by test_mirror.py and test_check.py) -------------------------------

def make_pool(pool_config, k: int, n: int, **kw):
    """A labelled pool with a small stripe size; returns its PoolConfig."""
    cfg = config.load(pool_config(k, n, stripe_size=STRIPE, **kw))
    admin.init_pool(cfg)
    return cfg


def instrument_data(seed: int, size: int) -> bytes:
    """Deterministic bytes that look like a lab instrument's sample log."""
    line = f"run {seed:04d} sensor=spectrometer channel={seed % 7} counts="
    out = bytearray()
    i = 0
    while len(out) < size:
        out += f"{line}{(i * 2654435761 + seed) % 99991:05d}\n".encode()
        i += 1
    return bytes(out[:size])


async def make_dirs(pool, path: str) -> int:
    ino = ROOT
    for part in [p for p in path.split("/") if p]:
        try:
            node = await pool.lookup(ino, part.encode())
        except NotFound:
            node = await pool.create(ino, part.encode(), mode=stat.S_IFDIR | 0o755, uid=0, gid=0)
        ino = node.ino
    return ino


async def write_file(pool, path: str, data: bytes, *, offset: int = 0, mode: int = 0o644):
    """Write data at offset into the pool file at path (created, with parents, if missing)."""
    parent, name = path.rstrip("/").rsplit("/", 1)
    pino = await make_dirs(pool, parent)
    try:
        node = await pool.lookup(pino, name.encode())
    except NotFound:
        node = await pool.create(pino, name.encode(), mode=stat.S_IFREG | mode, uid=0, gid=0)
    fh = await pool.open(node.ino, write=True)
    try:
        await pool.write(fh, offset, data)
        await pool.flush(fh)
    finally:
        await pool.release(fh)
    return await pool.getattr(node.ino)


async def lookup_path(pool, path: str):
    node = await pool.getattr(ROOT)
    for part in [p for p in path.split("/") if p]:
        node = await pool.lookup(node.ino, part.encode())
    return node


async def read_file(pool, path: str) -> bytes:
    node = await lookup_path(pool, path)
    fh = await pool.open(node.ino)
    try:
        return await pool.read(fh, 0, node.size + 1)
    finally:
        await pool.release(fh)


async def take_mirror(cfg) -> int:
    async with open_pool(cfg) as pool:
        return await Mirror(cfg, pool.catalog, pool.slots).snapshot()


def cmp_files(a: Path, b: Path) -> None:
    """Byte-for-byte comparison with `cmp`, the reference tool."""
    r = subprocess.run(["cmp", str(a), str(b)], capture_output=True, text=True)
    assert r.returncode == 0, f"cmp {a} {b}: {r.stdout}{r.stderr}"


def lose_state_dir(cfg) -> None:
    shutil.rmtree(cfg.state_dir)


def pull(cfg, *indices: int) -> None:
    """Unmount stores, as when disks are pulled: their directories stay, empty."""
    for i in indices:
        mounting.umount(cfg.stores[i].path)


def shard_files(store: Path) -> list[Path]:
    return sorted((store / "shards").rglob("*.shd"))


# -- recover -------------------------------------------------------------------------------

async def test_recover_after_state_dir_lost(pool_config):
    cfg = make_pool(pool_config, 2, 3)
    a, b, c = instrument_data(1, 200_000), instrument_data(2, 70_000), instrument_data(3, 150_000)
    async with open_pool(cfg) as pool:
        await write_file(pool, "/runs/day1/a.log", a)
        await write_file(pool, "/runs/b.log", b)
        gen = await Mirror(cfg, pool.catalog, pool.slots).snapshot()
        # After the mirror: an overwrite, an append, and a file the mirror never saw.
        await write_file(pool, "/runs/day1/a.log", b"OVERWRITTEN" * 100, offset=100_000)
        await write_file(pool, "/runs/b.log", b"appended line\n" * 5000, offset=len(b))
        late = await write_file(pool, "/runs/late.log", c)
    a2 = bytearray(a)
    a2[100_000:101_100] = b"OVERWRITTEN" * 100
    b2 = b + b"appended line\n" * 5000
    lose_state_dir(cfg)

    report = await recovery.recover(cfg)

    assert report.mirror_generation == gen and report.mirror_majority
    assert report.files_from_mirror == 2
    assert report.stripes_from_headers >= 3 + 2  # late.log's 3 stripes, a's overwrite, b's tail
    assert report.files_in_lost_and_found == [f"/lost+found/{late.file_id}"]
    assert report.complete and not report.unrecoverable and not report.stale
    async with open_pool(cfg) as pool:
        assert await read_file(pool, "/runs/day1/a.log") == bytes(a2)
        assert await read_file(pool, "/runs/b.log") == b2
        assert await read_file(pool, f"/lost+found/{late.file_id}") == c
        node = await lookup_path(pool, f"/lost+found/{late.file_id}")
        assert stat.S_IMODE(node.mode) == 0o600 and node.size == len(c)
        # New writes after recovery take versions above everything found on the stores.
        await write_file(pool, "/runs/after.log", a)
        assert await read_file(pool, "/runs/after.log") == a
        assert await read_file(pool, "/runs/b.log") == b2


async def test_recover_with_two_stores_gone(pool_config):
    cfg = make_pool(pool_config, 4, 6)
    files = {f"/lab/sample{i}.dat": instrument_data(i, 40_000 + i * 30_000) for i in range(4)}
    async with open_pool(cfg) as pool:
        for path, data in files.items():
            await write_file(pool, path, data)
        await Mirror(cfg, pool.catalog, pool.slots).snapshot()
    lose_state_dir(cfg)
    pull(cfg, 1, 4)

    report = await recovery.recover(cfg)

    assert report.complete
    assert len(report.stores_scanned) == 4
    assert report.shards_marked_missing == 0  # absent stores are not "missing": they may come back
    assert any(str(cfg.stores[1].path) in w for w in report.warnings)
    async with open_pool(cfg) as pool:
        for path, data in files.items():
            assert await read_file(pool, path) == data


async def test_recover_majority_wins_over_a_corrupt_newest_mirror(pool_config):
    cfg = make_pool(pool_config, 2, 4)
    data = instrument_data(5, 100_000)
    async with open_pool(cfg) as pool:
        await write_file(pool, "/old.dat", data)
        mirror = Mirror(cfg, pool.catalog, pool.slots)
        older = await mirror.snapshot()
        await write_file(pool, "/new.dat", data[::-1])
        newest = await mirror.snapshot()
    assert newest > older
    db_name, _ = mirror_names(newest)
    bad = cfg.stores[0].path / "catalog" / db_name
    raw = bytearray(bad.read_bytes())
    raw[5000:5100] = b"\xff" * 100
    bad.write_bytes(bytes(raw))
    lose_state_dir(cfg)

    report = await recovery.recover(cfg)

    assert report.mirror_generation == newest and report.mirror_majority
    assert len(report.mirror_holders) == 3
    assert any(str(cfg.stores[0].path) in r and "checksum" in r for r in report.mirrors_rejected)
    assert report.files_in_lost_and_found == []  # new.dat came from the mirror, under its name
    async with open_pool(cfg) as pool:
        assert await read_file(pool, "/new.dat") == data[::-1]


async def test_newer_mirror_on_a_minority_is_passed_over_and_named(pool_config):
    cfg = make_pool(pool_config, 2, 4)
    async with open_pool(cfg) as pool:
        await write_file(pool, "/x.dat", instrument_data(6, 10_000))
        mirror = Mirror(cfg, pool.catalog, pool.slots)
        agreed = await mirror.snapshot()
        await write_file(pool, "/y.dat", instrument_data(7, 10_000))
        newest = await mirror.snapshot()
    for i in (1, 2, 3):  # only store 0 keeps the newest mirror
        for name in mirror_names(newest):
            (cfg.stores[i].path / "catalog" / name).unlink()
    lose_state_dir(cfg)

    report = await recovery.recover(cfg)

    assert report.mirror_generation == agreed
    assert any(f"generation {newest}" in w and "--generation" in w for w in report.warnings)
    # y.dat was created after the agreed mirror: its data comes back from headers, by file id.
    assert len(report.files_in_lost_and_found) == 1

    report = await recovery.recover(cfg, force=True, generation=newest)
    assert report.mirror_generation == newest and not report.mirror_majority
    async with open_pool(cfg) as pool:
        assert await read_file(pool, "/y.dat") == instrument_data(7, 10_000)


async def test_mirrors_and_stores_of_another_pool_are_ignored(pool_config):
    cfg = make_pool(pool_config, 2, 3, name="alpha")
    other = make_pool(pool_config, 2, 3, name="beta")
    async with open_pool(other) as pool:
        for i in range(30):  # push beta's generation past alpha's
            await write_file(pool, f"/b{i}", b"beta")
        beta_gen = await Mirror(other, pool.catalog, pool.slots).snapshot()
    data = instrument_data(8, 90_000)
    async with open_pool(cfg) as pool:
        await write_file(pool, "/alpha.dat", data)
        alpha_gen = await Mirror(cfg, pool.catalog, pool.slots).snapshot()
    assert beta_gen > alpha_gen
    for name in mirror_names(beta_gen):  # someone copied beta's mirror onto alpha's store
        shutil.copy(other.stores[0].path / "catalog" / name, cfg.stores[0].path / "catalog" / name)
    lose_state_dir(cfg)

    report = await recovery.recover(cfg)

    assert report.mirror_generation == alpha_gen
    beta_id = Catalog.inspect(other.catalog_path)["pool_id"]
    assert any("belongs to another pool" in w and beta_id in w for w in report.warnings)
    async with open_pool(cfg) as pool:
        assert await read_file(pool, "/alpha.dat") == data


async def test_a_store_labelled_for_another_pool_is_ignored(pool_config):
    cfg = make_pool(pool_config, 2, 4)
    data = instrument_data(9, 150_000)
    async with open_pool(cfg) as pool:
        await write_file(pool, "/d.dat", data)
        await Mirror(cfg, pool.catalog, pool.slots).snapshot()
    swapped = cfg.stores[3].path  # a disk from another pool ends up at this path
    label = Label.new(pool_id="ab" * 16, pool_name="elsewhere")
    (swapped / LABEL_NAME).write_bytes(label.to_json())
    lose_state_dir(cfg)

    report = await recovery.recover(cfg)

    assert report.complete and len(report.stores_scanned) == 3
    assert any(str(swapped) in w and "another pool" in w for w in report.warnings)
    assert (swapped / LABEL_NAME).read_bytes() == label.to_json()  # never written


async def test_fewer_than_k_stores_names_the_stripes_that_cannot_come_back(pool_config):
    cfg = make_pool(pool_config, 2, 3)
    async with open_pool(cfg) as pool:
        await write_file(pool, "/lab/readings.csv", instrument_data(10, 3 * STRIPE))
        await Mirror(cfg, pool.catalog, pool.slots).snapshot()
    lose_state_dir(cfg)
    pull(cfg, 0, 1)

    report = await recovery.recover(cfg)

    assert not report.complete
    lost = sorted((ls.path, ls.idx) for ls in report.unrecoverable)
    assert lost == [("/lab/readings.csv", i) for i in range(3)]
    assert all(ls.found <= 1 and ls.k == 2 and "not reachable" in ls.note for ls in report.unrecoverable)


async def test_recover_refuses_a_healthy_catalog_without_force(pool_config):
    cfg = make_pool(pool_config, 2, 3)
    data = instrument_data(11, 50_000)
    async with open_pool(cfg) as pool:
        await write_file(pool, "/keep.dat", data)
        await Mirror(cfg, pool.catalog, pool.slots).snapshot()
    before = cfg.catalog_path.read_bytes()
    with pytest.raises(recovery.RecoveryRefused, match="--force"):
        await recovery.recover(cfg)
    assert cfg.catalog_path.read_bytes() == before

    report = await recovery.recover(cfg, force=True)
    assert report.moved_aside and ".replaced-" in report.moved_aside
    assert Path(report.moved_aside).read_bytes() == before  # moved, never deleted
    async with open_pool(cfg) as pool:
        assert await read_file(pool, "/keep.dat") == data


async def test_a_corrupt_catalog_is_moved_aside_without_force(pool_config):
    cfg = make_pool(pool_config, 2, 3)
    data = instrument_data(12, 50_000)
    async with open_pool(cfg) as pool:
        await write_file(pool, "/keep.dat", data)
        await Mirror(cfg, pool.catalog, pool.slots).snapshot()
    cfg.catalog_path.write_bytes(b"this is not a database" * 100)

    report = await recovery.recover(cfg)

    assert ".corrupt-" in report.moved_aside
    assert any("moved aside" in w for w in report.warnings)
    async with open_pool(cfg) as pool:
        assert await read_file(pool, "/keep.dat") == data


async def test_recover_without_any_mirror_puts_everything_in_lost_and_found(pool_config):
    cfg = make_pool(pool_config, 2, 3)
    data = instrument_data(13, 130_000)
    async with open_pool(cfg) as pool:
        node = await write_file(pool, "/deep/inside/x.dat", data)
    lose_state_dir(cfg)

    report = await recovery.recover(cfg)

    assert report.mirror_generation is None
    assert report.files_in_lost_and_found == [f"/lost+found/{node.file_id}"]
    assert any("namespace is lost" in w for w in report.warnings)
    async with open_pool(cfg) as pool:
        assert await read_file(pool, f"/lost+found/{node.file_id}") == data


# -- export --------------------------------------------------------------------------------

async def _lab_tree(pool, local: Path) -> dict[str, bytes]:
    files = {"/lab/raw/run1.bin": instrument_data(20, 3 * STRIPE + 123),
             "/lab/raw/run2.bin": instrument_data(21, 10),
             "/lab/notes.txt": b"calibrated on monday\n",
             "/lab/empty": b""}
    for path, data in files.items():
        await write_file(pool, path, data, mode=0o640)
        (local / path.lstrip("/")).parent.mkdir(parents=True, exist_ok=True)
        (local / path.lstrip("/")).write_bytes(data)
    lab = await lookup_path(pool, "/lab")
    await pool.create(lab.ino, b"latest", mode=stat.S_IFLNK | 0o777, uid=0, gid=0, target=b"raw/run1.bin")
    run1 = await lookup_path(pool, "/lab/raw/run1.bin")
    await pool.setattr(run1.ino, mtime_ns=1_600_000_000_123_456_789)
    await pool.setxattr(run1.ino, b"user.instrument", b"spectrometer-7")
    raw = await lookup_path(pool, "/lab/raw")
    await pool.link(run1.ino, raw.ino, b"run1-again.bin")
    await pool.create(lab.ino, b"pipe", mode=stat.S_IFIFO | 0o600, uid=0, gid=0)
    await pool.setattr(raw.ino, mode=stat.S_IFDIR | 0o750)
    return files


async def test_export_tree_with_n_minus_k_stores_gone(pool_config, tmp_path):
    cfg = make_pool(pool_config, 4, 6)
    originals = tmp_path / "originals"
    async with open_pool(cfg) as pool:
        files = await _lab_tree(pool, originals)
    pull(cfg, 0, 5)
    out = tmp_path / "out"

    report = await recovery.export(cfg, "/lab", out)

    assert report.complete and report.files == 4 and report.symlinks == 1
    assert report.degraded_stripes > 0  # stripes with data shards on the pulled stores were decoded
    for path in files:
        cmp_files(originals / path.lstrip("/"), out / path[len("/lab/"):])
    run1 = out / "raw" / "run1.bin"
    assert stat.S_IMODE(run1.stat().st_mode) == 0o640
    assert run1.stat().st_mtime_ns == 1_600_000_000_123_456_789
    assert os.getxattr(run1, "user.instrument") == b"spectrometer-7"
    assert os.readlink(out / "latest") == "raw/run1.bin"
    assert report.hard_links == 1 and os.path.samefile(run1, out / "raw" / "run1-again.bin")
    assert report.special == 1 and stat.S_ISFIFO(os.lstat(out / "pipe").st_mode)
    assert stat.S_IMODE((out / "raw").stat().st_mode) == 0o750
    assert not list(out.rglob(".shoal-export-*"))


async def test_export_refuses_an_existing_file_without_force(pool_config, tmp_path):
    cfg = make_pool(pool_config, 2, 3)
    data = instrument_data(22, 100_000)
    async with open_pool(cfg) as pool:
        await write_file(pool, "/one.dat", data)
    dest = tmp_path / "one.dat"
    dest.write_bytes(b"precious local copy")
    with pytest.raises(recovery.RecoveryRefused, match="--force"):
        await recovery.export(cfg, "/one.dat", dest)
    assert dest.read_bytes() == b"precious local copy"

    report = await recovery.export(cfg, "/one.dat", dest, force=True)
    assert report.complete
    (tmp_path / "ref.dat").write_bytes(data)
    cmp_files(tmp_path / "ref.dat", dest)


async def test_export_while_the_pool_is_open(pool_config, tmp_path):
    cfg = make_pool(pool_config, 2, 3)
    data = instrument_data(23, 200_000)
    (tmp_path / "ref.dat").write_bytes(data)
    async with open_pool(cfg) as pool:
        await write_file(pool, "/busy.dat", data)
        report = await recovery.export(cfg, "/busy.dat", tmp_path / "busy.dat")
        await write_file(pool, "/busy2.dat", data)  # the pool still works: export took no lock
    assert report.complete
    cmp_files(tmp_path / "ref.dat", tmp_path / "busy.dat")


async def test_export_from_mirror_without_a_catalog(pool_config, tmp_path):
    cfg = make_pool(pool_config, 2, 3)
    originals = tmp_path / "originals"
    async with open_pool(cfg) as pool:
        files = await _lab_tree(pool, originals)
        await Mirror(cfg, pool.catalog, pool.slots).snapshot()
    lose_state_dir(cfg)

    report = await recovery.export(cfg, "/", tmp_path / "out", from_mirror=True)

    assert report.complete and report.source.startswith("catalog mirror generation")
    for path in files:
        cmp_files(originals / path.lstrip("/"), tmp_path / "out" / path.lstrip("/"))
    assert not cfg.state_dir.exists()  # export wrote nothing there


async def test_export_leaves_no_file_when_a_stripe_cannot_be_read(pool_config, tmp_path):
    cfg = make_pool(pool_config, 2, 3)
    async with open_pool(cfg) as pool:
        node = await write_file(pool, "/broken.dat", instrument_data(24, 3 * STRIPE))
        await write_file(pool, "/fine.dat", b"fine")
    for store in cfg.stores[:2]:  # stripe 1 loses two of its three shards
        for f in shard_files(store.path):
            if f.name.startswith(f"{node.file_id}.1."):
                f.unlink()
    out = tmp_path / "out"

    report = await recovery.export(cfg, "/", out)

    assert not report.complete
    assert [(f.path, [s[0] for s in f.stripes]) for f in report.failed] == [("/broken.dat", [1])]
    assert report.failed[0].stripes[0][1:3] == (STRIPE, 2 * STRIPE)
    assert not (out / "broken.dat").exists()
    assert (out / "fine.dat").read_bytes() == b"fine"
    assert sorted(p.name for p in out.iterdir()) == ["fine.dat"]  # no partial file left behind


# -- command line --------------------------------------------------------------------------

def test_cli_recover_and_export(pool_config, tmp_path, capsys):
    cfg = make_pool(pool_config, 2, 3)
    data = instrument_data(25, 80_000)

    async def setup():
        async with open_pool(cfg) as pool:
            await write_file(pool, "/cli.dat", data)
            await Mirror(cfg, pool.catalog, pool.slots).snapshot()

    trio.run(setup)
    assert cli_main(["recover", str(cfg.source)]) == 1  # a healthy catalog: refused
    assert "--force" in capsys.readouterr().err
    lose_state_dir(cfg)
    assert cli_main(["recover", str(cfg.source), "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    assert rep["complete"] and rep["files_from_mirror"] == 1
    assert cli_main(["export", str(cfg.source), "/cli.dat", str(tmp_path / "cli.dat")]) == 0
    assert "exported 1 files" in capsys.readouterr().out
    (tmp_path / "ref.dat").write_bytes(data)
    cmp_files(tmp_path / "ref.dat", tmp_path / "cli.dat")
    assert cli_main(["export", str(cfg.source), "/cli.dat", str(tmp_path / "cli.dat")]) == 1


async def test_a_file_deleted_after_the_mirror_is_named_as_such(pool_config):
    cfg = make_pool(pool_config, 2, 3)
    async with open_pool(cfg) as pool:
        await write_file(pool, "/kept.dat", b"kept")
        await write_file(pool, "/gone.dat", instrument_data(26, 2 * STRIPE))
        await Mirror(cfg, pool.catalog, pool.slots).snapshot()
        await pool.unlink(ROOT, b"gone.dat")
        await pool.flush_news()
        await pool.collect_garbage()
    lose_state_dir(cfg)

    report = await recovery.recover(cfg)

    assert sorted((ls.path, ls.idx) for ls in report.unrecoverable) == [("/gone.dat", 0), ("/gone.dat", 1)]
    assert all("deleted after the mirror" in ls.note for ls in report.unrecoverable)
    async with open_pool(cfg) as pool:
        assert await read_file(pool, "/kept.dat") == b"kept"
        with pytest.raises(StripeLost):  # an honest error, never zeros
            await read_file(pool, "/gone.dat")


async def test_recover_and_repair_refuse_while_a_daemon_holds_the_pool(pool_config):
    from gateway.daemon import PoolLock  # the lock the mount takes: the protocol must stay shared

    cfg = make_pool(pool_config, 2, 3)
    async with open_pool(cfg) as pool:
        await write_file(pool, "/a", b"a")
        await Mirror(cfg, pool.catalog, pool.slots).snapshot()
    lose_state_dir(cfg)
    cfg.state_dir.mkdir()
    with PoolLock(cfg):
        with pytest.raises(recovery.RecoveryRefused, match="in use"):
            await recovery.recover(cfg)
    assert not cfg.catalog_path.exists()
    report = await recovery.recover(cfg)
    assert report.complete
    with PoolLock(cfg):
        with pytest.raises(recovery.RecoveryRefused, match="unmount it before repairing"):
            await recovery.check(cfg, repair=True)
        assert (await recovery.check(cfg)).clean  # a read-only check is fine beside a daemon


def test_progress_bar_draws_only_on_a_terminal():
    import io

    from gateway.cli.recovery import ProgressBar

    class Terminal(io.StringIO):
        def isatty(self):
            return True

    term, pipe = Terminal(), io.StringIO()
    for stream in (term, pipe):
        bar = ProgressBar(stream)
        bar("reading shard headers", 0, 10)
        bar("reading shard headers", 10, 10)
        bar("rebuilding the catalog", 0, None)
        bar.close()
    assert pipe.getvalue() == ""
    lines = term.getvalue().split("\n")
    assert "100.0%" in lines[0] and "#" * 30 in lines[0]
    assert lines[1].strip().startswith("rebuilding the catalog") and lines[-1] == ""

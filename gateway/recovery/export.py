"""export: copy files out of the pool with no daemon and no mount, from the
catalog or a mirror of it; it only reads the stores, so it is safe beside a
mounted pool. A stripe it cannot read fails its file, which is removed and
reported; the other files go on."""
from __future__ import annotations

import os
import secrets
import shutil
import stat
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import trio

from ..catalog import ROOT, Catalog, Inode, StripeRecord
from ..config import PoolConfig
from ..errors import CatalogError, NotFound, PoolUnavailable, StripeLost
from ..ids import FileId, PoolId
from ..stripeio import StripeIO, StripeRef
from .common import (
    ExportFailed, Progress, RecoveryRefused, StoreView, _Serial, _fsync_dir, _noop, _slots, _unlink_quietly, survey_stores,
)
from .sources import choose_mirror

# ---------------------------------------------------------------- export

@dataclass(frozen=True, kw_only=True)
class FailedFile:
    path: str  # in the pool
    dest: str
    stripes: tuple[tuple[int, int, int, str], ...]  # (stripe, first byte, end byte, why)


@dataclass(kw_only=True)
class ExportReport:
    source: str  # "the live catalog" or "catalog mirror generation G"
    files: int = 0
    bytes: int = 0
    directories: int = 0
    symlinks: int = 0
    hard_links: int = 0
    special: int = 0
    failed: list[FailedFile] = field(default_factory=list)
    skipped: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    bad_shards: int = 0  # missing or corrupt shards met on reachable stores
    degraded_stripes: int = 0  # stripes rebuilt from parity (some data shard missing, corrupt or away)

    @property
    def complete(self) -> bool:
        return not self.failed


def _resolve(catalog: Catalog, pool_path: str) -> Inode:
    node = catalog.get_inode(ROOT)
    for part in [p for p in os.fsencode(pool_path).split(b"/") if p and p != b"."]:
        if part == b"..":
            node = catalog.get_inode(catalog.parent_of(node.ino))
            continue
        if not node.is_dir:
            raise NotFound(f"{pool_path}: {part.decode(errors='replace')} is below a non-directory")
        node = catalog.lookup(node.ino, part)
    return node


def _walk(catalog: Catalog, top: Inode, dest: Path) -> list[tuple[str, Inode, Path]]:
    """Blocking: (pool path, inode, destination) of everything under top, parents first."""
    base = (catalog.path_of(top.ino) or b"/").decode(errors="replace")
    out = [(base, top, dest)]
    stack = [(top, base, dest)] if top.is_dir else []
    while stack:
        node, ppath, dpath = stack.pop()
        after = 0
        while True:
            rows = catalog.readdir(node.ino, after, 1000)
            if not rows:
                break
            for eid, name, child in rows:
                after = eid
                cp, cd = f"{ppath.rstrip('/')}/{name.decode(errors='replace')}", dpath / os.fsdecode(name)
                out.append((cp, child, cd))
                if child.is_dir:
                    stack.append((child, cp, cd))
    return out


async def export(cfg: PoolConfig, pool_path: str, dest: str | os.PathLike, *, from_mirror: bool = False,
                 force: bool = False, generation: int | None = None, progress: Progress | None = None) -> ExportReport:
    """Copy a file or a directory tree out of the pool to dest, using only the
    stores and a catalog: the live one opened read-only, or (from_mirror)
    the mirror recover would choose. No daemon, no mount; nothing is written
    to the stores or the catalog, so it is safe while the pool is mounted.

    dest names the copy itself. An existing destination file (or symlink) is
    refused unless force; an existing directory is merged into. Every stripe
    is verified (checksums; decoding around missing or corrupt shards). A
    file with a stripe that cannot be read is not written at all: it is
    read to the end to list every bad stripe, then its temporary file
    (".shoal-export-*" beside dest) is removed, and the report names it.
    Modes, owners (when run as root), times, symlinks, hard links within the
    tree and extended attributes are kept.

    Raises RecoveryRefused (existing destinations), NotFound (pool_path),
    PoolUnavailable (fewer than k stores answer), CatalogError.
    """
    progress = progress or _noop
    dest = Path(os.path.abspath(dest))
    if not await trio.to_thread.run_sync(dest.parent.is_dir):
        raise RecoveryRefused(f"{dest.parent} is not a directory: create it first")
    tmpdir = None
    try:
        if from_mirror:
            pool_id, views, warnings = await survey_stores(cfg)
            if pool_id is None:
                raise PoolUnavailable("no configured store carries a Shoal label")
            tmpdir = Path(await trio.to_thread.run_sync(lambda: tempfile.mkdtemp(prefix="shoal-export-")))
            choice, more, rejected = await choose_mirror(views, pool_id, tmpdir, generation=generation,
                                                         progress=progress)
            warnings += more + [f"mirror copy rejected: {r}" for r in rejected]
            if choice is None:
                raise CatalogError("no valid catalog mirror was found on the stores")
            catalog = await trio.to_thread.run_sync(Catalog.open_read_only, choice.local_path)
            source = f"catalog mirror generation {choice.generation}"
        else:
            catalog = await trio.to_thread.run_sync(Catalog.open_read_only, cfg.catalog_path)
            try:
                pool_id = catalog.pool_id
            except CatalogError:
                catalog.close()
                raise
            _, views, warnings = await survey_stores(cfg, pool_id)
            source = "the live catalog"
        try:
            report = ExportReport(source=source, warnings=warnings)
            try:
                await _export(cfg, _Serial(catalog), PoolId(pool_id), views, pool_path, dest, force, report, progress)
            except OSError as e:
                raise ExportFailed(f"writing {e.filename or dest} failed: {e.strerror or e} "
                                   f"({report.files} files were exported before)") from e
            return report
        finally:
            await trio.to_thread.run_sync(catalog.close)
    finally:
        if tmpdir is not None:
            await trio.to_thread.run_sync(shutil.rmtree, tmpdir, True)


async def _export(cfg: PoolConfig, db: _Serial, pool_id: PoolId, views: list[StoreView], pool_path: str,
                  dest: Path, force: bool, report: ExportReport, progress: Progress) -> None:
    slots = _slots(views)
    if len(slots) < cfg.k:
        raise PoolUnavailable(f"only {len(slots)} of {len(views)} stores answer, k = {cfg.k}: "
                              + "; ".join(f"{v.path}: {v.problem}" for v in views if v.store is None))
    bad = [0]

    def on_bad(ref, shard, why):
        bad[0] += 1

    io = StripeIO(pool_id=pool_id, slots=slots, on_bad_shard=on_bad)
    cat = db.catalog
    stripe_size = int(await db(cat.get_meta, "stripe_size", cfg.stripe_size))
    top = await db(_resolve, cat, pool_path)
    items = await db(_walk, cat, top, dest)
    conflicts = await trio.to_thread.run_sync(_conflicts, items, force)
    if conflicts:
        raise RecoveryRefused("nothing was written; these destinations exist"
                              + (" (use --force to replace files)" if not force else "") + ":\n  "
                              + "\n  ".join(conflicts[:10]) + (f"\n  ... and {len(conflicts) - 10} more" if len(conflicts) > 10 else ""))
    total = sum(n.size for _, n, _ in items if n.is_reg)
    done = [0]
    linked: dict[int, Path] = {}
    dirs: list[tuple[Inode, Path]] = []
    for ppath, node, dpath in items:
        xattrs = await db(_xattrs, cat, node.ino)
        if node.is_dir:
            await trio.to_thread.run_sync(_mkdir, dpath)
            dirs.append((node, dpath))
            report.directories += 1
        elif node.is_reg:
            if node.nlink > 1 and node.ino in linked:
                ok = await trio.to_thread.run_sync(_hard_link, linked[node.ino], dpath)
                if ok:
                    report.hard_links += 1
                    continue
            failed = await _export_file(db, io, node, ppath, dpath, stripe_size, xattrs, report, done, total, progress)
            if failed is None:
                linked[node.ino] = dpath
                report.files += 1
                report.bytes += node.size
            else:
                report.failed.append(failed)
        elif stat.S_ISLNK(node.mode):
            await trio.to_thread.run_sync(_symlink, node, dpath, xattrs)
            report.symlinks += 1
        elif stat.S_ISFIFO(node.mode) or (os.geteuid() == 0 and (stat.S_ISCHR(node.mode) or stat.S_ISBLK(node.mode))):
            await trio.to_thread.run_sync(_special, node, dpath)
            report.special += 1
        else:
            report.skipped.append(f"{ppath}: {_kind(node.mode)} not exported")
    for node, dpath in reversed(dirs):  # children first: writing into a directory changes its mtime
        report.warnings += await trio.to_thread.run_sync(_finish, node, dpath, await db(_xattrs, cat, node.ino), False)
        await trio.to_thread.run_sync(_fsync_dir, dpath)
    if not top.is_dir:
        await trio.to_thread.run_sync(_fsync_dir, dest.parent)
    report.bad_shards = bad[0]
    report.degraded_stripes = io.stats.degraded_reads


def _kind(mode: int) -> str:
    return ("a socket" if stat.S_ISSOCK(mode) else "a device" if stat.S_ISCHR(mode) or stat.S_ISBLK(mode)
            else f"type {stat.S_IFMT(mode):o}")


def _xattrs(catalog: Catalog, ino: int) -> list[tuple[bytes, bytes]]:
    return sorted(catalog.xattrs_of(ino).items())


def _conflicts(items: list[tuple[str, Inode, Path]], force: bool) -> list[str]:
    out = []
    for _, node, dpath in items:
        try:
            st = os.lstat(dpath)
        except FileNotFoundError:
            continue
        if node.is_dir:
            if not stat.S_ISDIR(st.st_mode):
                out.append(f"{dpath} (not a directory)")
        elif stat.S_ISDIR(st.st_mode):
            out.append(f"{dpath} (a directory)")
        elif not force:
            out.append(str(dpath))
    return out


def _mkdir(path: Path) -> None:
    try:
        os.mkdir(path, 0o700)  # opened up to its real mode once its content is in
    except FileExistsError:
        if not path.is_dir():
            raise


def _hard_link(src: Path, dest: Path) -> bool:
    tmp = dest.with_name(f".shoal-export-{secrets.token_hex(6)}")
    try:
        os.link(src, tmp)
    except OSError:
        return False
    os.rename(tmp, dest)
    return True


def _finish(node: Inode, path: Path, xattrs: list, is_link: bool) -> list[str]:
    """Owner, mode, extended attributes and times; returns warnings."""
    warnings = []
    follow = not is_link
    if os.geteuid() == 0:
        os.chown(path, node.uid, node.gid, follow_symlinks=follow)
    if not is_link:
        os.chmod(path, stat.S_IMODE(node.mode))
    for name, value in xattrs:
        try:
            os.setxattr(path, name, value, follow_symlinks=follow)
        except OSError as e:
            warnings.append(f"{path}: extended attribute {name.decode(errors='replace')} not kept: {e.strerror}")
    os.utime(path, ns=(node.atime_ns, node.mtime_ns), follow_symlinks=follow)
    return warnings


def _symlink(node: Inode, dest: Path, xattrs: list) -> None:
    tmp = dest.with_name(f".shoal-export-{secrets.token_hex(6)}")
    os.symlink(node.target or b"", os.fsencode(tmp))
    try:
        _finish(node, tmp, [], True)
        os.rename(tmp, dest)
    except BaseException:
        _unlink_quietly(tmp)
        raise


def _special(node: Inode, dest: Path) -> None:
    tmp = dest.with_name(f".shoal-export-{secrets.token_hex(6)}")
    os.mknod(tmp, node.mode, node.rdev)
    _finish(node, tmp, [], False)
    os.rename(tmp, dest)


async def _export_file(db: _Serial, io: StripeIO, node: Inode, ppath: str, dest: Path, stripe_size: int,
                       xattrs: list, report: ExportReport, done: list[int], total: int,
                       progress: Progress) -> FailedFile | None:
    cat = db.catalog
    tmp = dest.with_name(f".shoal-export-{secrets.token_hex(6)}")
    fd = await trio.to_thread.run_sync(os.open, tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_CLOEXEC, 0o600)
    bad: list[tuple[int, int, int, str]] = []
    try:
        count = -(-node.size // stripe_size)
        for lo in range(0, count, 64):
            recs = await db(cat.stripes, node.ino, lo, min(count, lo + 64))
            for idx in range(lo, min(count, lo + 64)):
                start = idx * stripe_size
                want = min(stripe_size, node.size - start)
                rec = recs.get(idx)
                if rec is not None:  # no record: a hole, left sparse
                    try:
                        data = await _read_stripe(db, io, node, rec)
                    except StripeLost as e:
                        bad.append((idx, start, start + want, str(e)))
                        data = b""
                    if data:
                        await trio.to_thread.run_sync(_pwrite_all, fd, memoryview(data)[:want], start)
                done[0] += want
                progress("exporting", done[0], total)
        await trio.to_thread.run_sync(_close_file, fd, node.size)
        fd = None
        if bad:
            await trio.to_thread.run_sync(_unlink_quietly, tmp)
            return FailedFile(path=ppath, dest=str(dest), stripes=tuple(bad))
        report.warnings += await trio.to_thread.run_sync(_finish, node, tmp, xattrs, False)
        await trio.to_thread.run_sync(os.rename, tmp, dest)
        return None
    except BaseException:
        if fd is not None:
            os.close(fd)
        await trio.to_thread.run_sync(_unlink_quietly, tmp)
        raise


def _ref(node: Inode, rec: StripeRecord) -> StripeRef:
    return StripeRef(ino=rec.ino, file_id=FileId(node.file_id), idx=rec.idx, version=rec.version, length=rec.length,
                     coded_length=rec.coded_length, k=rec.k, n=rec.n,
                     shards=tuple((s.shard, s.store_id, s.state) for s in rec.shards))


async def _read_stripe(db: _Serial, io: StripeIO, node: Inode, rec: StripeRecord) -> bytes:
    ref = _ref(node, rec)
    try:
        return await io.read(ref)
    except StripeLost:
        # A mounted pool may have replaced this stripe meanwhile: look once more.
        again = await db(db.catalog.stripe, rec.ino, rec.idx)
        if again is None or again.version == rec.version:
            raise
        return await io.read(_ref(node, again))


def _pwrite_all(fd: int, data: memoryview, offset: int) -> None:
    while data:
        n = os.pwrite(fd, data, offset)
        data, offset = data[n:], offset + n


def _close_file(fd: int, size: int) -> None:
    try:
        os.ftruncate(fd, size)
        os.fsync(fd)
    finally:
        os.close(fd)

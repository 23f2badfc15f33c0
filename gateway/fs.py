"""The FUSE edge: pyfuse3 Operations over the pool.

Thin on purpose: each handler decodes its arguments, calls the pool and
turns the answer into pyfuse3's types. Errors become errno values here and
nowhere else (``ERRNO``). Every handler is wrapped so that an unexpected
exception is logged and answered with EIO: an exception escaping a handler
would end pyfuse3's main loop and leave a dead mount behind.

Durability: ``flush`` (every close) and ``fsync`` run the pool's commit, so
close() returns only once every stripe of the file is durable on at least w
stores; a quorum failure makes close() and fsync() fail with EIO.
``release`` errors cannot reach anyone and are only logged by the pool.
"""
from __future__ import annotations

import errno
import functools
import logging
import os
import stat

import pyfuse3
import trio

from . import errors as E
from .catalog import Inode
from .pool import Pool

log = logging.getLogger(__name__)

# ShoalError class -> errno; the most specific class wins (checked in MRO order).
ERRNO: dict[type, int] = {
    E.NotFound: errno.ENOENT,
    E.Exists: errno.EEXIST,
    E.NotEmpty: errno.ENOTEMPTY,
    E.NotADirectory: errno.ENOTDIR,
    E.IsADirectory: errno.EISDIR,
    E.NameTooLong: errno.ENAMETOOLONG,
    E.InvalidArgument: errno.EINVAL,
    E.NoAttribute: errno.ENODATA,
    E.NoSpace: errno.ENOSPC,
    E.ReadOnly: errno.EROFS,
    E.QuorumError: errno.EIO,
    E.StripeLost: errno.EIO,
    E.PoolUnavailable: errno.EIO,
    E.StoreError: errno.EIO,
    E.ShoalError: errno.EIO,
}

ENTRY_TIMEOUT = 1.0  # seconds the kernel may cache a name -> inode answer
ATTR_TIMEOUT = 1.0  # seconds it may cache attributes (this mount is their only writer)


def errno_of(exc: BaseException) -> int:
    for cls in type(exc).__mro__:
        if cls in ERRNO:
            return ERRNO[cls]
    return errno.EIO


def handler(fn):
    """Map pool errors to FUSEError; log and answer EIO for anything else."""
    @functools.wraps(fn)
    async def wrapper(self, *args, **kwargs):
        try:
            return await fn(self, *args, **kwargs)
        except pyfuse3.FUSEError:
            raise
        except E.ShoalError as e:
            code = errno_of(e)
            if code == errno.EIO:
                log.error("%s: %s", fn.__name__, e)
            else:
                log.debug("%s: %s -> %s", fn.__name__, e, errno.errorcode.get(code, code))
            raise pyfuse3.FUSEError(code) from None
        except Exception:
            log.exception("unexpected error in %s; answering EIO", fn.__name__)
            raise pyfuse3.FUSEError(errno.EIO) from None
    return wrapper


class ShoalFS(pyfuse3.Operations):
    supports_dot_lookup = True
    enable_writeback_cache = False  # measured: see docs/performance.md; keeps close() = durable

    def __init__(self, pool: Pool):
        super().__init__()
        self.pool = pool
        self._dirs: dict[int, int] = {}
        self._next_dir = 1
        self.unexpected = 0

    # -- attributes -----------------------------------------------------------
    def _attr(self, node: Inode) -> pyfuse3.EntryAttributes:
        a = pyfuse3.EntryAttributes()
        a.st_ino = node.ino
        a.generation = 0
        a.entry_timeout = ENTRY_TIMEOUT
        a.attr_timeout = ATTR_TIMEOUT
        a.st_mode = node.mode
        a.st_nlink = node.nlink
        a.st_uid = node.uid
        a.st_gid = node.gid
        a.st_rdev = node.rdev
        a.st_size = node.size
        a.st_blksize = 1 << 20  # cp and friends size their buffers by it: 1 MiB = the largest FUSE write
        a.st_blocks = -(-node.size // 512)
        a.st_atime_ns = node.atime_ns
        a.st_mtime_ns = node.mtime_ns
        a.st_ctime_ns = node.ctime_ns
        return a

    @handler
    async def lookup(self, parent_inode, name, ctx=None):
        return self._attr(await self.pool.lookup(parent_inode, bytes(name)))

    @handler
    async def getattr(self, inode, ctx=None):
        return self._attr(await self.pool.getattr(inode))

    @handler
    async def setattr(self, inode, attr, fields, fh, ctx):
        changes = {}
        if fields.update_mode:
            changes["mode"] = (attr.st_mode & 0o7777) | (stat.S_IFMT((await self.pool.getattr(inode)).mode))
        if fields.update_uid:
            changes["uid"] = attr.st_uid
        if fields.update_gid:
            changes["gid"] = attr.st_gid
        if fields.update_atime:
            changes["atime_ns"] = attr.st_atime_ns
        if fields.update_mtime:
            changes["mtime_ns"] = attr.st_mtime_ns
        if fields.update_ctime:
            changes["ctime_ns"] = attr.st_ctime_ns
        size = attr.st_size if fields.update_size else None
        return self._attr(await self.pool.setattr(inode, size=size, **changes))

    # -- namespace --------------------------------------------------------------
    @handler
    async def mknod(self, parent_inode, name, mode, rdev, ctx):
        node = await self.pool.create(parent_inode, bytes(name), mode=mode, uid=ctx.uid, gid=ctx.gid, rdev=rdev)
        return self._attr(node)

    @handler
    async def mkdir(self, parent_inode, name, mode, ctx):
        node = await self.pool.create(parent_inode, bytes(name), mode=(mode & 0o7777) | stat.S_IFDIR,
                                      uid=ctx.uid, gid=ctx.gid)
        return self._attr(node)

    @handler
    async def symlink(self, parent_inode, name, target, ctx):
        node = await self.pool.create(parent_inode, bytes(name), mode=stat.S_IFLNK | 0o777, uid=ctx.uid, gid=ctx.gid,
                                      target=bytes(target))
        return self._attr(node)

    @handler
    async def readlink(self, inode, ctx):
        return await self.pool.readlink(inode)

    @handler
    async def link(self, inode, new_parent_inode, new_name, ctx):
        return self._attr(await self.pool.link(inode, new_parent_inode, bytes(new_name)))

    @handler
    async def unlink(self, parent_inode, name, ctx):
        await self.pool.unlink(parent_inode, bytes(name))

    @handler
    async def rmdir(self, parent_inode, name, ctx):
        await self.pool.rmdir(parent_inode, bytes(name))

    @handler
    async def rename(self, parent_inode_old, name_old, parent_inode_new, name_new, flags, ctx):
        if flags & ~(pyfuse3.RENAME_EXCHANGE | pyfuse3.RENAME_NOREPLACE):
            raise pyfuse3.FUSEError(errno.EINVAL)
        await self.pool.rename(parent_inode_old, bytes(name_old), parent_inode_new, bytes(name_new),
                               noreplace=bool(flags & pyfuse3.RENAME_NOREPLACE),
                               exchange=bool(flags & pyfuse3.RENAME_EXCHANGE))

    @handler
    async def opendir(self, inode, ctx):
        node = await self.pool.getattr(inode)
        if not node.is_dir:
            raise pyfuse3.FUSEError(errno.ENOTDIR)
        fh = self._next_dir
        self._next_dir += 1
        self._dirs[fh] = inode
        return fh

    @handler
    async def readdir(self, fh, start_id, token):
        # Offsets are catalog entry ids: fixed for an entry's life and growing
        # for new entries, so a listing interleaved with changes neither skips
        # nor repeats the entries that stay.
        ino = self._dirs[fh]
        after = start_id
        while True:
            rows = await self.pool.readdir(ino, after, 256)
            if not rows:
                return
            for entry_id, name, node in rows:
                if not pyfuse3.readdir_reply(token, name, self._attr(node), entry_id):
                    return
                after = entry_id

    @handler
    async def releasedir(self, fh):
        self._dirs.pop(fh, None)

    @handler
    async def fsyncdir(self, fh, datasync):
        await self.pool.sync()  # namespace changes become durable (they are already safe from a killed daemon)

    @handler
    async def statfs(self, ctx):
        st = self.pool.statfs()
        s = pyfuse3.StatvfsData()
        s.f_bsize = s.f_frsize = st.block_size
        s.f_blocks = st.total_bytes // st.block_size
        s.f_bfree = s.f_bavail = st.free_bytes // st.block_size
        s.f_files = 1 << 32
        s.f_ffree = s.f_favail = (1 << 32) - 1
        s.f_namemax = 255
        return s

    # -- extended attributes ------------------------------------------------
    @handler
    async def getxattr(self, inode, name, ctx):
        return await self.pool.getxattr(inode, bytes(name))

    @handler
    async def setxattr(self, inode, name, value, ctx):
        await self.pool.setxattr(inode, bytes(name), bytes(value))

    @handler
    async def listxattr(self, inode, ctx):
        return await self.pool.listxattr(inode)

    @handler
    async def removexattr(self, inode, name, ctx):
        await self.pool.removexattr(inode, bytes(name))

    # -- files ------------------------------------------------------------------
    @staticmethod
    def _wants_write(flags: int) -> bool:
        return (flags & os.O_ACCMODE) in (os.O_WRONLY, os.O_RDWR)

    @handler
    async def open(self, inode, flags, ctx):
        fh = await self.pool.open(inode, truncate=bool(flags & os.O_TRUNC), append=bool(flags & os.O_APPEND),
                                  write=self._wants_write(flags))
        # keep_cache off: each open drops the kernel's cached pages of the
        # file, which keeps close-to-open consistency simple to reason about.
        return pyfuse3.FileInfo(fh=fh, keep_cache=False)

    @handler
    async def create(self, parent_inode, name, mode, flags, ctx):
        node = await self.pool.create(parent_inode, bytes(name), mode=(mode & 0o7777) | stat.S_IFREG,
                                      uid=ctx.uid, gid=ctx.gid)
        fh = await self.pool.open(node.ino, append=bool(flags & os.O_APPEND), write=True)
        return pyfuse3.FileInfo(fh=fh, keep_cache=False), self._attr(node)

    @handler
    async def read(self, fh, off, size):
        return await self.pool.read(fh, off, size)

    @handler
    async def write(self, fh, off, buf):
        return await self.pool.write(fh, off, buf)

    @handler
    async def flush(self, fh):
        await self.pool.flush(fh)

    @handler
    async def fsync(self, fh, datasync):
        await self.pool.fsync(fh)

    @handler
    async def release(self, fh):
        await self.pool.release(fh)

    async def forget(self, inode_list):
        pass  # inodes live in the catalog; unlinked ones go when their last handle closes

    @handler
    async def access(self, inode, mode, ctx):
        await self.pool.getattr(inode)  # default_permissions makes the kernel check modes
        return True


def mount_options(*, name: str, allow_other: bool) -> set[str]:
    opts = set(pyfuse3.default_options)  # default_permissions: the kernel checks modes
    opts |= {f"fsname=shoal-{name}", "subtype=shoal"}
    if allow_other:
        opts.add("allow_other")
    return opts


async def serve_fuse(ops: ShoalFS, mountpoint: str, options: set[str]) -> None:
    """Mount and run pyfuse3's loop until unmounted or terminated."""
    pyfuse3.init(ops, mountpoint, options)
    try:
        await pyfuse3.main()
    finally:
        with trio.CancelScope(shield=True):
            pyfuse3.close(unmount=True)

"""hangfs: a passthrough FUSE filesystem that can be made to hang, like a hung remote mount.

It mirrors a backing directory (pyfuse3 on trio; every backing syscall runs
in a worker thread). While the control file given by --hang-file exists,
every request that reaches it waits, polling the control file, until the
file is removed; then it carries on as if nothing happened. The callers
block meanwhile (ordinary signals do not free them; interrupts are ignored),
as with a hard NFS mount whose server hangs. The control file must live
outside the mount.

Caches are off by default (entry and attribute timeouts 0, no writeback
cache), so every system call on the mount reaches the filesystem and hangs
with it. Data read through the mount may still come from the page cache.

Enough operations to host a Shoal store: lookup, getattr, setattr, readdir,
opendir, releasedir, mkdir, rmdir, create, open, read, write, fsync,
fsyncdir, flush, release, rename, unlink, statfs.

Usage: python tests/hangfs.py BACKING MOUNTPOINT [--hang-file PATH]
Runs in the foreground; SIGINT or SIGTERM unmounts and exits 0, also while
hung (waiting requests are answered EIO); so does `fusermount3 -u`.
"""
from __future__ import annotations

import argparse
import ctypes
import ctypes.util
import errno
import functools
import logging
import os
import signal
import stat
import sys
from dataclasses import dataclass

import pyfuse3
import trio

log = logging.getLogger("hangfs")

_libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
_AT_FDCWD = -100


def _renameat2(old: str, new: str, flags: int) -> None:
    if _libc.renameat2(_AT_FDCWD, os.fsencode(old), _AT_FDCWD, os.fsencode(new), ctypes.c_uint(flags)) != 0:
        e = ctypes.get_errno()
        raise OSError(e, os.strerror(e), old, None, new)


def _operation(handler):
    """Gate a handler on the hang state and translate its errors.

    OSError from the backing directory becomes FUSEError with the same errno;
    any other exception is logged and answered EIO (escaping, it would end
    the main loop and leave a dead mount behind).
    """

    @functools.wraps(handler)
    async def wrapper(self, *args, **kwargs):
        try:
            await self.wait_while_hung(handler.__name__)
            return await handler(self, *args, **kwargs)
        except pyfuse3.FUSEError:
            raise
        except OSError as e:
            if e.errno is None:
                log.exception("%s failed; answering EIO", handler.__name__)
            raise pyfuse3.FUSEError(e.errno or errno.EIO) from None
        except Exception:
            log.exception("%s failed; answering EIO", handler.__name__)
            raise pyfuse3.FUSEError(errno.EIO) from None

    return wrapper


async def _sync(fn, *args):
    return await trio.to_thread.run_sync(functools.partial(fn, *args))


@dataclass
class _Dir:
    fd: int
    path: str
    listing: list[tuple[bytes, os.stat_result]] | None = None


class HangFS(pyfuse3.Operations):
    supports_dot_lookup = True
    enable_writeback_cache = False

    def __init__(self, backing: str, *, hang_file: str | None = None, poll: float = 0.02, timeout: float = 0.0):
        super().__init__()
        self._backing = os.path.realpath(backing)
        self._hang_file = hang_file
        self._poll = poll
        self._timeout = timeout
        self._stopping = False
        self._chown = os.geteuid() == 0
        st = os.lstat(self._backing)  # before the loop runs
        self._paths: dict[int, str] = {pyfuse3.ROOT_INODE: self._backing}
        self._by_key: dict[tuple[int, int], int] = {(st.st_dev, st.st_ino): pyfuse3.ROOT_INODE}
        self._keys: dict[int, tuple[int, int]] = {pyfuse3.ROOT_INODE: (st.st_dev, st.st_ino)}
        self._lookups: dict[int, int] = {}
        self._next_inode = pyfuse3.ROOT_INODE + 1
        self._files: dict[int, int] = {}  # fh -> backing fd
        self._dirs: dict[int, _Dir] = {}
        self._next_fh = 1
        self.hung_requests = 0

    # -- hanging ---------------------------------------------------------------

    def stop(self) -> None:
        """Answer EIO to every waiting request from now on, so the main loop can end."""
        self._stopping = True

    async def wait_while_hung(self, what: str) -> None:
        if self._hang_file is None:
            return
        hung = False
        while await _sync(os.path.exists, self._hang_file):
            if self._stopping:
                raise pyfuse3.FUSEError(errno.EIO)
            if not hung:
                hung = True
                self.hung_requests += 1
                log.debug("%s: hung while %s exists", what, self._hang_file)
            await trio.sleep(self._poll)
        if hung:
            log.debug("%s: released", what)

    # -- inode table -------------------------------------------------------------

    def _path(self, inode: int) -> str:
        try:
            return self._paths[inode]
        except KeyError:
            raise pyfuse3.FUSEError(errno.ESTALE) from None

    def _child(self, parent_inode: int, name: bytes) -> str:
        if b"/" in name or name in (b"", b".", b".."):
            raise pyfuse3.FUSEError(errno.EINVAL)
        return os.path.join(self._path(parent_inode), os.fsdecode(name))

    def _remember(self, path: str, st: os.stat_result) -> int:
        """The inode for a backing file, made if new; counts one lookup."""
        key = (st.st_dev, st.st_ino)
        inode = self._by_key.get(key)
        if inode is None:
            inode = self._next_inode
            self._next_inode += 1
            self._by_key[key] = inode
            self._keys[inode] = key
        self._paths[inode] = path
        if inode != pyfuse3.ROOT_INODE:
            self._lookups[inode] = self._lookups.get(inode, 0) + 1
        return inode

    def _forget_key(self, path: str, st: os.stat_result | None) -> None:
        """A backing file is gone: its (dev, ino) may be reused by a new file."""
        if st is None:
            return
        inode = self._by_key.pop((st.st_dev, st.st_ino), None)
        if inode is not None:
            self._keys.pop(inode, None)

    def _moved(self, old: str, new: str) -> None:
        prefix = old + os.sep
        for inode, p in list(self._paths.items()):
            if p == old:
                self._paths[inode] = new
            elif p.startswith(prefix):
                self._paths[inode] = new + p[len(old):]

    def _entry(self, inode: int, st: os.stat_result) -> pyfuse3.EntryAttributes:
        e = pyfuse3.EntryAttributes()
        for name in ("st_mode", "st_nlink", "st_uid", "st_gid", "st_rdev", "st_size", "st_atime_ns",
                     "st_mtime_ns", "st_ctime_ns"):
            setattr(e, name, getattr(st, name))
        e.st_blksize = st.st_blksize
        e.st_blocks = st.st_blocks
        e.st_ino = inode
        e.generation = 0
        e.entry_timeout = self._timeout
        e.attr_timeout = self._timeout
        return e

    # -- handlers -----------------------------------------------------------------

    @_operation
    async def lookup(self, parent_inode, name, ctx):
        if name == b".":
            path = self._path(parent_inode)
        elif name == b"..":
            path = self._path(parent_inode)
            if path != self._backing:
                path = os.path.dirname(path)
        else:
            path = self._child(parent_inode, name)
        st = await _sync(os.lstat, path)
        return self._entry(self._remember(path, st), st)

    async def forget(self, inode_list):
        # Never gated: forget has no reply, so nobody waits for it.
        for inode, count in inode_list:
            left = self._lookups.get(inode, 0) - count
            if left > 0 or inode == pyfuse3.ROOT_INODE:
                self._lookups[inode] = left
                continue
            self._lookups.pop(inode, None)
            self._paths.pop(inode, None)
            key = self._keys.pop(inode, None)
            if key is not None and self._by_key.get(key) == inode:
                del self._by_key[key]

    @_operation
    async def getattr(self, inode, ctx):
        return self._entry(inode, await _sync(os.lstat, self._path(inode)))

    @_operation
    async def setattr(self, inode, attr, fields, fh, ctx):
        path = self._path(inode)
        fd = self._files.get(fh) if fh is not None else None

        def apply() -> os.stat_result:
            target = fd if fd is not None else path
            if fields.update_size:
                os.truncate(target, attr.st_size)
            if fields.update_mode:
                os.chmod(target, stat.S_IMODE(attr.st_mode))
            if fields.update_uid or fields.update_gid:
                os.chown(target, attr.st_uid if fields.update_uid else -1, attr.st_gid if fields.update_gid else -1)
            if fields.update_atime or fields.update_mtime:
                cur = os.stat(target)
                os.utime(target, ns=(attr.st_atime_ns if fields.update_atime else cur.st_atime_ns,
                                     attr.st_mtime_ns if fields.update_mtime else cur.st_mtime_ns))
            return os.fstat(fd) if fd is not None else os.lstat(path)

        return self._entry(inode, await _sync(apply))

    @_operation
    async def opendir(self, inode, ctx):
        path = self._path(inode)
        fd = await _sync(os.open, path, os.O_RDONLY | os.O_DIRECTORY)
        fh = self._next_fh
        self._next_fh += 1
        self._dirs[fh] = _Dir(fd=fd, path=path)
        return fh

    @_operation
    async def readdir(self, fh, start_id, token):
        d = self._dirs[fh]
        if d.listing is None or start_id == 0:
            # One snapshot per pass, so entries added or removed meanwhile
            # shift nothing; next_id is the position in the snapshot.
            def scan() -> list[tuple[bytes, os.stat_result]]:
                out = []
                with os.scandir(d.path) as it:
                    for ent in it:
                        try:
                            out.append((os.fsencode(ent.name), ent.stat(follow_symlinks=False)))
                        except FileNotFoundError:
                            pass
                return sorted(out)

            d.listing = await _sync(scan)
        for i in range(start_id, len(d.listing)):
            name, st = d.listing[i]
            path = os.path.join(d.path, os.fsdecode(name))
            # The inode _remember() will give it; it counts the lookup only
            # once the kernel has taken the entry.
            inode = self._by_key.get((st.st_dev, st.st_ino)) or self._next_inode
            if not pyfuse3.readdir_reply(token, name, self._entry(inode, st), i + 1):
                return
            self._remember(path, st)

    @_operation
    async def releasedir(self, fh):
        d = self._dirs.pop(fh)
        await _sync(os.close, d.fd)

    @_operation
    async def fsyncdir(self, fh, datasync):
        d = self._dirs[fh]
        await _sync(os.fdatasync if datasync else os.fsync, d.fd)

    @_operation
    async def mkdir(self, parent_inode, name, mode, ctx):
        path = self._child(parent_inode, name)

        def make() -> os.stat_result:
            os.mkdir(path, stat.S_IMODE(mode))
            if self._chown:
                os.lchown(path, ctx.uid, ctx.gid)
            return os.lstat(path)

        st = await _sync(make)
        return self._entry(self._remember(path, st), st)

    @_operation
    async def rmdir(self, parent_inode, name, ctx):
        path = self._child(parent_inode, name)

        def remove() -> os.stat_result | None:
            try:
                st = os.lstat(path)
            except FileNotFoundError:
                st = None
            os.rmdir(path)
            return st

        self._forget_key(path, await _sync(remove))

    @_operation
    async def unlink(self, parent_inode, name, ctx):
        path = self._child(parent_inode, name)

        def remove() -> os.stat_result | None:
            st = os.lstat(path)
            os.unlink(path)
            return st if st.st_nlink <= 1 else None

        self._forget_key(path, await _sync(remove))

    @_operation
    async def rename(self, parent_inode_old, name_old, parent_inode_new, name_new, flags, ctx):
        old = self._child(parent_inode_old, name_old)
        new = self._child(parent_inode_new, name_new)

        def move() -> os.stat_result | None:
            try:
                replaced = os.lstat(new)
            except FileNotFoundError:
                replaced = None
            if flags:
                _renameat2(old, new, flags)
            else:
                os.rename(old, new)
            if flags & pyfuse3.RENAME_EXCHANGE:
                return None
            return replaced if replaced is not None and (replaced.st_nlink <= 1 or stat.S_ISDIR(replaced.st_mode)) else None

        replaced = await _sync(move)
        self._forget_key(new, replaced)
        if flags & pyfuse3.RENAME_EXCHANGE:
            tmp = new + "\0"
            self._moved(new, tmp)
            self._moved(old, new)
            self._moved(tmp, old)
        else:
            self._moved(old, new)

    def _open_flags(self, flags: int) -> int:
        # The kernel has done O_DIRECT's job already; the backing file need not be aligned.
        return (flags & ~(os.O_DIRECT | os.O_NOCTTY)) | os.O_CLOEXEC

    def _handle(self, fd: int) -> pyfuse3.FileInfo:
        fh = self._next_fh
        self._next_fh += 1
        self._files[fh] = fd
        return pyfuse3.FileInfo(fh=fh)

    @_operation
    async def create(self, parent_inode, name, mode, flags, ctx):
        path = self._child(parent_inode, name)

        def make() -> tuple[int, os.stat_result]:
            fd = os.open(path, self._open_flags(flags) | os.O_CREAT, stat.S_IMODE(mode))
            try:
                if self._chown:
                    os.fchown(fd, ctx.uid, ctx.gid)
                return fd, os.fstat(fd)
            except BaseException:
                os.close(fd)
                raise

        fd, st = await _sync(make)
        return self._handle(fd), self._entry(self._remember(path, st), st)

    @_operation
    async def open(self, inode, flags, ctx):
        fd = await _sync(os.open, self._path(inode), self._open_flags(flags) & ~os.O_CREAT)
        return self._handle(fd)

    @_operation
    async def read(self, fh, off, size):
        return await _sync(os.pread, self._files[fh], size, off)

    @_operation
    async def write(self, fh, off, buf):
        fd = self._files[fh]

        def write_all() -> int:
            view, done = memoryview(buf), 0
            while done < len(view):
                done += os.pwrite(fd, view[done:], off + done)
            return done

        return await _sync(write_all)

    @_operation
    async def flush(self, fh):
        # Backing writes are synchronous pwrite calls; nothing is buffered here.
        if fh not in self._files:
            raise pyfuse3.FUSEError(errno.EBADF)

    @_operation
    async def fsync(self, fh, datasync):
        await _sync(os.fdatasync if datasync else os.fsync, self._files[fh])

    @_operation
    async def release(self, fh):
        await _sync(os.close, self._files.pop(fh))

    @_operation
    async def statfs(self, ctx):
        v = await _sync(os.statvfs, self._backing)
        s = pyfuse3.StatvfsData()
        for name in ("f_bsize", "f_frsize", "f_blocks", "f_bfree", "f_bavail", "f_files", "f_ffree",
                     "f_favail", "f_namemax"):
            setattr(s, name, getattr(v, name))
        return s


# -- running it ------------------------------------------------------------------


async def serve(fs: HangFS, mountpoint: str, options: set[str]) -> None:
    """Mount fs, serve until a signal or an external unmount, then unmount."""
    pyfuse3.init(fs, mountpoint, options)
    try:
        async with trio.open_nursery() as nursery:
            await nursery.start(_stop_on_signal, fs)
            await pyfuse3.main()
            nursery.cancel_scope.cancel()
    finally:
        pyfuse3.close(unmount=True)


async def _stop_on_signal(fs: HangFS, task_status=trio.TASK_STATUS_IGNORED):
    with trio.open_signal_receiver(signal.SIGINT, signal.SIGTERM) as signals:
        task_status.started()
        async for signum in signals:
            log.info("%s: unmounting", signal.Signals(signum).name)
            fs.stop()
            pyfuse3.terminate()
            return


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description="A passthrough FUSE filesystem that hangs while a control file exists.")
    p.add_argument("backing", help="the directory to mirror")
    p.add_argument("mountpoint")
    p.add_argument("--hang-file", default=None, help="while this file exists, every request waits")
    p.add_argument("--poll", type=float, default=0.02, help="seconds between checks of the hang file")
    p.add_argument("--timeout", type=float, default=0.0, help="entry and attribute cache timeout, seconds")
    p.add_argument("--fsname", default="hangfs")
    p.add_argument("--allow-other", action="store_true")
    p.add_argument("--debug", action="store_true")
    args = p.parse_args(argv)
    logging.basicConfig(level=logging.DEBUG if args.debug else logging.INFO,
                        format="%(asctime)s %(name)s %(levelname)s %(message)s", stream=sys.stderr)
    hang_file = os.path.abspath(args.hang_file) if args.hang_file else None
    mnt = os.path.realpath(args.mountpoint)
    if hang_file and (hang_file == mnt or hang_file.startswith(mnt + os.sep)):
        p.error("--hang-file must lie outside the mount")
    os.umask(0)  # the kernel has applied the caller's umask already
    fs = HangFS(args.backing, hang_file=hang_file, poll=args.poll, timeout=args.timeout)
    options = set(pyfuse3.default_options) | {f"fsname={args.fsname}"}
    if args.allow_other:
        options.add("allow_other")
    trio.run(serve, fs, args.mountpoint, options)
    log.info("exiting; %d requests waited for the hang to end", fs.hung_requests)
    return 0


if __name__ == "__main__":
    sys.exit(main())

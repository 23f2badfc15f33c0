"""nullfs: the ceiling of this FUSE stack (pyfuse3 on trio), for benchmarks.

One root directory holding plain files. Writes are accepted and thrown away
(only each file's size is kept); reads return zeros up to that size. With
the writeback cache on, the kernel may answer reads of recently written data
from its page cache without asking. Nothing
here does I/O, so whatever throughput a mounted nullfs reaches is the most
any pyfuse3 filesystem on this machine can reach with the same kernel
options; the benchmark compares the Shoal mount against it.

The kernel options Shoal chooses between are flags:

  --writeback-cache / --no-writeback-cache   FUSE_CAP_WRITEBACK_CACHE (pyfuse3:
                                             Operations.enable_writeback_cache)
  --max-read BYTES                           the max_read mount option
  --read-ahead-kb KB                         /sys/class/bdi/MAJ:MIN/read_ahead_kb
  --max-background N                         /sys/fs/fuse/connections/MIN/max_background
  --direct-io                                FOPEN_DIRECT_IO on every open
  --max-tasks N                              pyfuse3.main(max_tasks=N)

max_write cannot be chosen through pyfuse3 3.5: libfuse only reads it from
the connection structure inside its init callback, which pyfuse3 does not
expose, and fuse_session_new rejects "-o max_write=". libfuse 3.14 therefore
always negotiates its maximum (1 MiB with max_pages = 256); the largest write
request actually seen is printed on exit.

Usage: python tests/bench/nullfs.py MOUNTPOINT [flags]
Runs in the foreground; SIGINT or SIGTERM unmounts cleanly and exits 0, as
does an external `fusermount3 -u MOUNTPOINT`.
"""
from __future__ import annotations

import argparse
import errno
import functools
import logging
import os
import signal
import stat
import sys
import time
from dataclasses import dataclass, field

import pyfuse3
import trio

log = logging.getLogger("nullfs")

_TIB = 1 << 40


def _guarded(handler):
    """Answer EIO for any exception other than FUSEError.

    Anything else escaping a pyfuse3 handler ends the main loop and leaves a
    dead mount behind.
    """

    @functools.wraps(handler)
    async def wrapper(*args, **kwargs):
        try:
            return await handler(*args, **kwargs)
        except pyfuse3.FUSEError:
            raise
        except Exception:
            log.exception("%s failed; answering EIO", handler.__name__)
            raise pyfuse3.FUSEError(errno.EIO) from None

    return wrapper


@dataclass(kw_only=True, eq=False)
class _Node:
    inode: int
    mode: int
    uid: int
    gid: int
    size: int = 0
    nlink: int = 1
    lookups: int = 0
    atime_ns: int = field(default_factory=time.time_ns)
    mtime_ns: int = field(default_factory=time.time_ns)
    ctime_ns: int = field(default_factory=time.time_ns)


@dataclass
class WriteStatistics:
    requests: int = 0
    bytes: int = 0
    largest: int = 0
    read_requests: int = 0
    read_bytes: int = 0
    largest_read: int = 0


class NullFS(pyfuse3.Operations):
    """Files that remember their size and nothing else."""

    supports_dot_lookup = True

    def __init__(self, *, writeback_cache: bool = False, direct_io: bool = False, timeout: float = 1.0):
        super().__init__()
        self.enable_writeback_cache = writeback_cache
        self._direct_io = direct_io
        self._timeout = timeout
        self._nodes: dict[int, _Node] = {
            pyfuse3.ROOT_INODE: _Node(inode=pyfuse3.ROOT_INODE, mode=stat.S_IFDIR | 0o755,
                                      uid=os.getuid(), gid=os.getgid(), nlink=2),
        }
        self._names: dict[bytes, int] = {}  # entries of the root directory
        self._handles: dict[int, _Node] = {}
        self._next_inode = pyfuse3.ROOT_INODE + 1
        self._next_fh = 1
        self._zeros = b""
        self.stats = WriteStatistics()

    # -- helpers -----------------------------------------------------------

    def _entry(self, node: _Node) -> pyfuse3.EntryAttributes:
        e = pyfuse3.EntryAttributes()
        e.st_ino = node.inode
        e.generation = 0
        e.entry_timeout = self._timeout
        e.attr_timeout = self._timeout
        e.st_mode = node.mode
        e.st_nlink = node.nlink
        e.st_uid = node.uid
        e.st_gid = node.gid
        e.st_rdev = 0
        e.st_size = node.size
        e.st_blksize = 1 << 20
        e.st_blocks = (node.size + 511) // 512
        e.st_atime_ns = node.atime_ns
        e.st_mtime_ns = node.mtime_ns
        e.st_ctime_ns = node.ctime_ns
        return e

    def _node(self, inode: int) -> _Node:
        try:
            return self._nodes[inode]
        except KeyError:
            raise pyfuse3.FUSEError(errno.ENOENT) from None

    def _dir(self, inode: int) -> None:
        if inode != pyfuse3.ROOT_INODE:
            raise pyfuse3.FUSEError(errno.ENOTDIR if inode in self._nodes else errno.ENOENT)

    def _open_handle(self, node: _Node) -> pyfuse3.FileInfo:
        fh = self._next_fh
        self._next_fh += 1
        self._handles[fh] = node
        return pyfuse3.FileInfo(fh=fh, direct_io=self._direct_io)

    def _maybe_drop(self, node: _Node) -> None:
        if node.nlink == 0 and node.lookups <= 0 and node not in self._handles.values():
            self._nodes.pop(node.inode, None)

    # -- handlers ----------------------------------------------------------

    @_guarded
    async def lookup(self, parent_inode, name, ctx):
        self._dir(parent_inode)
        if name in (b".", b".."):
            return self._entry(self._nodes[pyfuse3.ROOT_INODE])
        try:
            node = self._nodes[self._names[name]]
        except KeyError:
            raise pyfuse3.FUSEError(errno.ENOENT) from None
        node.lookups += 1
        return self._entry(node)

    @_guarded
    async def forget(self, inode_list):
        for inode, count in inode_list:
            node = self._nodes.get(inode)
            if node is not None and inode != pyfuse3.ROOT_INODE:
                node.lookups -= count
                self._maybe_drop(node)

    @_guarded
    async def getattr(self, inode, ctx):
        return self._entry(self._node(inode))

    @_guarded
    async def setattr(self, inode, attr, fields, fh, ctx):
        node = self._node(inode)
        now = time.time_ns()
        if fields.update_size:
            if stat.S_ISDIR(node.mode):
                raise pyfuse3.FUSEError(errno.EISDIR)
            node.size = attr.st_size
            node.mtime_ns = now
        if fields.update_mode:
            node.mode = stat.S_IFMT(node.mode) | stat.S_IMODE(attr.st_mode)
        if fields.update_uid:
            node.uid = attr.st_uid
        if fields.update_gid:
            node.gid = attr.st_gid
        if fields.update_atime:
            node.atime_ns = attr.st_atime_ns
        if fields.update_mtime:
            node.mtime_ns = attr.st_mtime_ns
        node.ctime_ns = attr.st_ctime_ns if fields.update_ctime else now
        return self._entry(node)

    @_guarded
    async def opendir(self, inode, ctx):
        self._dir(inode)
        return inode

    @_guarded
    async def readdir(self, fh, start_id, token):
        # next_id is the position after the entry; the listing is sorted by
        # inode so entries added or removed meanwhile shift nothing else.
        entries = sorted((ino, name) for name, ino in self._names.items())
        for ino, name in entries:
            if ino <= start_id:
                continue
            node = self._nodes[ino]
            if not pyfuse3.readdir_reply(token, name, self._entry(node), ino):
                return
            node.lookups += 1

    @_guarded
    async def releasedir(self, fh):
        pass

    @_guarded
    async def fsyncdir(self, fh, datasync):
        pass

    @_guarded
    async def create(self, parent_inode, name, mode, flags, ctx):
        self._dir(parent_inode)
        if name in self._names:
            node = self._nodes[self._names[name]]
            if flags & os.O_EXCL:
                raise pyfuse3.FUSEError(errno.EEXIST)
        else:
            node = _Node(inode=self._next_inode, mode=stat.S_IFREG | stat.S_IMODE(mode),
                         uid=ctx.uid, gid=ctx.gid)
            self._next_inode += 1
            self._nodes[node.inode] = node
            self._names[name] = node.inode
        if flags & os.O_TRUNC:
            node.size = 0
        node.lookups += 1
        return self._open_handle(node), self._entry(node)

    @_guarded
    async def open(self, inode, flags, ctx):
        node = self._node(inode)
        if stat.S_ISDIR(node.mode):
            raise pyfuse3.FUSEError(errno.EISDIR)
        if flags & os.O_TRUNC:
            node.size = 0
        return self._open_handle(node)

    @_guarded
    async def read(self, fh, off, size):
        node = self._handles[fh]
        n = max(0, min(size, node.size - off))
        if n > len(self._zeros):
            self._zeros = bytes(n)
        st = self.stats
        st.read_requests += 1
        st.read_bytes += n
        st.largest_read = max(st.largest_read, size)
        return memoryview(self._zeros)[:n]

    @_guarded
    async def write(self, fh, off, buf):
        node = self._handles[fh]
        n = len(buf)
        node.size = max(node.size, off + n)
        node.mtime_ns = time.time_ns()
        st = self.stats
        st.requests += 1
        st.bytes += n
        st.largest = max(st.largest, n)
        return n

    @_guarded
    async def flush(self, fh):
        pass

    @_guarded
    async def fsync(self, fh, datasync):
        pass

    @_guarded
    async def release(self, fh):
        node = self._handles.pop(fh, None)
        if node is not None:
            self._maybe_drop(node)

    @_guarded
    async def unlink(self, parent_inode, name, ctx):
        self._dir(parent_inode)
        try:
            inode = self._names.pop(name)
        except KeyError:
            raise pyfuse3.FUSEError(errno.ENOENT) from None
        node = self._nodes[inode]
        node.nlink = 0
        node.ctime_ns = time.time_ns()
        self._maybe_drop(node)

    @_guarded
    async def statfs(self, ctx):
        s = pyfuse3.StatvfsData()
        s.f_bsize = s.f_frsize = 4096
        s.f_blocks = s.f_bfree = s.f_bavail = _TIB // 4096
        s.f_files = 1 << 20
        s.f_ffree = s.f_favail = s.f_files - len(self._nodes)
        s.f_namemax = 255
        return s


# -- running it ---------------------------------------------------------------


def _device_of(mountpoint: str) -> tuple[int, int] | None:
    """MAJ:MIN of the mount at mountpoint, read from mountinfo (never touching the mount)."""
    target = os.path.abspath(mountpoint)
    found = None
    with open("/proc/self/mountinfo") as f:
        for line in f:
            parts = line.split()
            mnt = parts[4].encode().decode("unicode_escape")
            if mnt == target:
                major, minor = parts[2].split(":")
                found = (int(major), int(minor))
    return found


def _tune_kernel(mountpoint: str, read_ahead_kb: int | None, max_background: int | None) -> None:
    dev = _device_of(mountpoint)
    if dev is None:
        raise RuntimeError(f"{mountpoint} is not in /proc/self/mountinfo")
    if read_ahead_kb is not None:
        with open(f"/sys/class/bdi/{dev[0]}:{dev[1]}/read_ahead_kb", "w") as f:
            f.write(str(read_ahead_kb))
    if max_background is not None:
        with open(f"/sys/fs/fuse/connections/{dev[1]}/max_background", "w") as f:
            f.write(str(max_background))


def mount_options(args: argparse.Namespace) -> set[str]:
    options = set(pyfuse3.default_options)
    options.add(f"fsname={args.fsname}")
    if args.max_read:
        options.add(f"max_read={args.max_read}")
    if args.allow_other:
        options.add("allow_other")
    if args.fuse_debug:
        options.add("debug")
    return options


async def serve(fs: pyfuse3.Operations, mountpoint: str, options: set[str], *,
                max_tasks: int = 99, after_mount=None) -> None:
    """Mount fs, serve until a signal or an external unmount, then unmount."""
    pyfuse3.init(fs, mountpoint, options)
    try:
        async with trio.open_nursery() as nursery:
            await nursery.start(_stop_on_signal)
            if after_mount is not None:
                nursery.start_soon(trio.to_thread.run_sync, after_mount)
            await pyfuse3.main(max_tasks=max_tasks)
            nursery.cancel_scope.cancel()
    finally:
        pyfuse3.close(unmount=True)


async def _stop_on_signal(task_status=trio.TASK_STATUS_IGNORED):
    with trio.open_signal_receiver(signal.SIGINT, signal.SIGTERM) as signals:
        task_status.started()
        async for signum in signals:
            log.info("%s: unmounting", signal.Signals(signum).name)
            pyfuse3.terminate()
            return


def parse_args(argv: list[str] | None = None) -> argparse.Namespace:
    p = argparse.ArgumentParser(description="A FUSE filesystem that discards writes and reads zeros.")
    p.add_argument("mountpoint")
    p.add_argument("--writeback-cache", action=argparse.BooleanOptionalAction, default=False,
                   help="ask the kernel for the writeback cache (default: off)")
    p.add_argument("--direct-io", action="store_true", help="open every file with FOPEN_DIRECT_IO")
    p.add_argument("--max-read", type=int, default=0, metavar="BYTES", help="max_read mount option")
    p.add_argument("--read-ahead-kb", type=int, default=None, metavar="KB",
                   help="set the mount's read-ahead window after mounting")
    p.add_argument("--max-background", type=int, default=None, metavar="N",
                   help="set the connection's max_background after mounting")
    p.add_argument("--max-tasks", type=int, default=99, help="pyfuse3 worker tasks")
    p.add_argument("--timeout", type=float, default=1.0, help="entry and attribute cache timeout, seconds")
    p.add_argument("--fsname", default="nullfs")
    p.add_argument("--allow-other", action="store_true")
    p.add_argument("--debug", action="store_true", help="debug logging")
    p.add_argument("--fuse-debug", action="store_true", help="libfuse request tracing")
    return p.parse_args(argv)


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    logging.basicConfig(level=logging.DEBUG if args.debug else logging.INFO,
                        format="%(asctime)s %(name)s %(levelname)s %(message)s", stream=sys.stderr)
    fs = NullFS(writeback_cache=args.writeback_cache, direct_io=args.direct_io, timeout=args.timeout)
    after = None
    if args.read_ahead_kb is not None or args.max_background is not None:
        after = functools.partial(_tune_kernel, args.mountpoint, args.read_ahead_kb, args.max_background)
    trio.run(functools.partial(serve, fs, args.mountpoint, mount_options(args),
                               max_tasks=args.max_tasks, after_mount=after))
    st = fs.stats
    log.info("served %d write requests (%d bytes, largest %d), %d read requests (%d bytes, largest asked %d)",
             st.requests, st.bytes, st.largest, st.read_requests, st.read_bytes, st.largest_read)
    return 0


if __name__ == "__main__":
    sys.exit(main())

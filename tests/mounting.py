"""Real mounts for tests and benchmarks: tmpfs stores, bind mounts, FUSE processes.

Plain helpers with no pytest fixtures (those are in conftest.py), so that
benchmark scripts can use them too. Everything here needs root, except
MountProcess with a FUSE filesystem, which needs /dev/fuse and fusermount3.

Every mount made here is remembered in a registry until it is unmounted;
``leftover_mounts()`` lists the ones still mounted, so a test session can
find and clear anything a crashed test left behind.

Mount state is read from /proc/self/mountinfo rather than with stat(): a
stat on a hung or dead FUSE mount blocks or fails with ENOTCONN.
"""
from __future__ import annotations

import contextlib
import errno
import itertools
import math
import os
import re
import shutil
import signal
import stat
import subprocess
import sys
import time
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent

_registry: set[Path] = set()  # mount points this process mounted and has not unmounted


class MountError(RuntimeError):
    """A mount, an unmount or a filesystem process did not do what was asked."""


# -- mount table ---------------------------------------------------------------

_OCTAL = re.compile(rb"\\([0-7]{3})")


def _unescape(field: bytes) -> str:
    return os.fsdecode(_OCTAL.sub(lambda m: bytes([int(m.group(1), 8)]), field))


@dataclass(frozen=True, kw_only=True)
class MountEntry:
    mountpoint: Path
    fstype: str
    source: str
    device: str  # "major:minor"


def mount_table() -> list[MountEntry]:
    """The mounts this process sees, in mount order (later entries stack on earlier ones)."""
    out = []
    with open("/proc/self/mountinfo", "rb") as f:
        for line in f:
            left, _, right = line.partition(b" - ")
            fields, tail = left.split(), right.split()
            out.append(MountEntry(mountpoint=Path(_unescape(fields[4])), fstype=_unescape(tail[0]),
                                  source=_unescape(tail[1]) if len(tail) > 1 else "", device=fields[2].decode()))
    return out


def _canonical(path: str | os.PathLike) -> Path:
    # realpath of the parent only: resolving the path itself would stat it,
    # which blocks on a hung FUSE mount.
    p = Path(os.path.abspath(path))
    return Path(os.path.realpath(p.parent)) / p.name


def is_mounted(path: str | os.PathLike) -> bool:
    """Whether something is mounted exactly at path (never touches the mount itself)."""
    target = _canonical(path)
    return any(m.mountpoint == target for m in mount_table())


def mount_at(path: str | os.PathLike) -> MountEntry | None:
    """The topmost mount at path, or None."""
    target = _canonical(path)
    found = None
    for m in mount_table():
        if m.mountpoint == target:
            found = m
    return found


def leftover_mounts() -> list[Path]:
    """Mount points made by these helpers that are still mounted."""
    return sorted(p for p in _registry if is_mounted(p))


def run_all(steps: Sequence) -> None:
    """Call every step (a cleanup), even when some raise; then raise the first error."""
    first: BaseException | None = None
    for step in steps:
        try:
            step()
        except BaseException as e:  # noqa: BLE001 - re-raised below
            first = first or e
    if first is not None:
        raise first


def _run(argv: Sequence[str], what: str) -> None:
    r = subprocess.run(list(argv), capture_output=True, text=True)
    if r.returncode != 0:
        raise MountError(f"{what}: {' '.join(argv)} exited with {r.returncode}: {r.stderr.strip() or r.stdout.strip()}")


# -- tmpfs and bind mounts --------------------------------------------------------


def mount_tmpfs(path: str | os.PathLike, size: str | int = "64m") -> Path:
    """Mount a fresh tmpfs of the given size at path (created if missing)."""
    p = _canonical(path)
    p.mkdir(parents=True, exist_ok=True)
    _run(["mount", "-t", "tmpfs", "-o", f"size={size},mode=0755", "tmpfs", str(p)], f"mount tmpfs at {p}")
    _registry.add(p)
    return p


def umount(path: str | os.PathLike, lazy: bool = False) -> None:
    """Unmount the topmost mount at path, as when a disk is pulled.

    The mount point directory stays behind, empty (or showing whatever lies
    beneath). lazy=True detaches a busy mount (umount -l). Raises MountError
    if nothing is mounted there or the unmount fails.
    """
    p = _canonical(path)
    if not is_mounted(p):
        raise MountError(f"nothing is mounted at {p}")
    _run(["umount", *(["-l"] if lazy else []), str(p)], f"unmount {p}")
    if not is_mounted(p):
        _registry.discard(p)


def unmount_all(path: str | os.PathLike) -> None:
    """Unmount everything stacked at path, lazily when busy."""
    p = _canonical(path)
    for _ in range(16):
        if not is_mounted(p):
            _registry.discard(p)
            return
        try:
            umount(p)
        except MountError:
            umount(p, lazy=True)
    raise MountError(f"{p} is still mounted after 16 unmounts")


@contextlib.contextmanager
def tmpfs(path: str | os.PathLike, size: str | int = "64m") -> Iterator[Path]:
    """A tmpfs mounted at path for the duration of the block; unmounted (lazily if busy) after.

    A test may pull it early with umount(); whatever is still mounted at
    path is unmounted on exit.
    """
    p = mount_tmpfs(path, size)
    try:
        yield p
    finally:
        unmount_all(p)


def bind_store(src: str | os.PathLike, dst: str | os.PathLike) -> Path:
    """Bind-mount the directory src at dst (both created if missing); returns dst.

    src is where a store's data lives while it is away; dst is the store
    path the pool is configured with. Binding again after unbind() brings the
    same data back, as when the same disk is put back.
    """
    s, d = _canonical(src), _canonical(dst)
    s.mkdir(parents=True, exist_ok=True)
    d.mkdir(parents=True, exist_ok=True)
    _run(["mount", "--bind", str(s), str(d)], f"bind {s} at {d}")
    _registry.add(d)
    return d


def unbind(dst: str | os.PathLike, lazy: bool = False) -> None:
    """Undo bind_store(): dst becomes an empty directory again; the data stays in src."""
    umount(dst, lazy=lazy)


@dataclass(kw_only=True)
class BoundStore:
    """A store directory backed by its own tmpfs "disk", so it can be pulled and put back.

    disk is the tmpfs mount point; backing is the directory on it holding
    the store's data; path is where the pool sees the store.
    """

    path: Path
    backing: Path
    disk: Path

    @property
    def attached(self) -> bool:
        return is_mounted(self.path)

    def pull(self, lazy: bool = False) -> None:
        """Detach the store: path becomes an empty directory; the data survives in backing."""
        unbind(self.path, lazy=lazy)

    def put_back(self) -> None:
        """Attach the same data again at path."""
        bind_store(self.backing, self.path)

    def close(self) -> None:
        run_all([lambda: unmount_all(self.path), lambda: unmount_all(self.disk)])


def make_bound_store(path: str | os.PathLike, disk: str | os.PathLike, size: str | int = "64m") -> BoundStore:
    """Mount a tmpfs at disk and bind its "store" subdirectory at path."""
    d = mount_tmpfs(disk, size)
    try:
        backing = d / "store"
        p = bind_store(backing, path)
    except BaseException:
        unmount_all(d)
        raise
    return BoundStore(path=p, backing=backing, disk=d)


# -- pool configs -------------------------------------------------------------------

_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")


def _toml_key(key: str) -> str:
    return key if _BARE_KEY.fullmatch(key) else _toml_string(key)


def _toml_string(s: str) -> str:
    out = ['"']
    for ch in s:
        if ch == '"':
            out.append('\\"')
        elif ch == "\\":
            out.append("\\\\")
        elif ch == "\n":
            out.append("\\n")
        elif ch == "\t":
            out.append("\\t")
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04X}")
        else:
            out.append(ch)
    out.append('"')
    return "".join(out)


def toml_value(v: object) -> str:
    """One TOML value: str, Path, bool, int, float, list or dict (inline table)."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, os.PathLike):
        return _toml_string(os.fspath(v))
    if isinstance(v, str):
        return _toml_string(v)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    if isinstance(v, Mapping):
        return "{" + ", ".join(f"{_toml_key(str(k))} = {toml_value(x)}" for k, x in v.items()) + "}"
    raise TypeError(f"cannot write {type(v).__name__} {v!r} as TOML")


def _toml_table(header: str, keys: Mapping[str, object]) -> list[str]:
    lines = [header]
    lines += [f"{_toml_key(k)} = {toml_value(v)}" for k, v in keys.items() if v is not None]
    return lines + [""]


def write_pool_config(
    dir: str | os.PathLike,
    *,
    k: int,
    n: int,
    w: int | None = None,
    stores: Sequence[str | os.PathLike],
    domains: Sequence[str] | None = None,
    stripe_size: str | int = "4MiB",
    state_dir: str | os.PathLike,
    name: str = "test",
    extra: Mapping[str, Mapping[str, object]] | None = None,
    filename: str = "pool.toml",
) -> Path:
    """Write a pool config that gateway.config.load accepts; returns its path.

    w=None leaves write_quorum to the config default. domains, when given,
    has one label per store. extra maps a section name ("pool", "store_io",
    "repair", "scrub", "metrics", "catalog") to keys merged into it; a value
    of None removes a key. [metrics] listen = false unless extra says otherwise,
    so tests do not compete for a port.
    """
    if domains is not None and len(domains) != len(stores):
        raise ValueError(f"{len(domains)} domains for {len(stores)} stores")
    sections: dict[str, dict[str, object]] = {
        "pool": {"name": name, "k": k, "n": n, "write_quorum": w, "stripe_size": stripe_size,
                 "state_dir": os.path.abspath(state_dir)},
        "metrics": {"listen": False},
    }
    for section, keys in (extra or {}).items():
        if section == "store":
            raise ValueError("per-store keys go in stores/domains, not extra")
        sections.setdefault(section, {}).update(keys)
    lines: list[str] = []
    lines += _toml_table("[pool]", sections.pop("pool"))
    for i, s in enumerate(stores):
        lines += _toml_table("[[store]]", {"path": os.path.abspath(s), "domain": domains[i] if domains else None})
    for section, keys in sections.items():
        lines += _toml_table(f"[{_toml_key(section)}]", keys)
    out = Path(dir) / filename
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text("\n".join(lines))
    return out


# -- FUSE filesystem processes ------------------------------------------------------


def shoal_argv(*args: str | os.PathLike) -> list[str]:
    """The command line of the shoal CLI, run from this checkout."""
    return [sys.executable, "-m", "gateway.cli", *map(os.fspath, args)]


def lazy_unmount_fuse(path: str | os.PathLike) -> bool:
    """Detach a FUSE mount at path (fusermount3 -uz, falling back to umount -l). True if it was mounted."""
    p = _canonical(path)
    if not is_mounted(p):
        return False
    r = subprocess.run(["fusermount3", "-uz", str(p)], capture_output=True, text=True)
    if r.returncode != 0 and is_mounted(p):
        _run(["umount", "-l", str(p)], f"lazy unmount of {p}")
    return True


def clear_stale_mount(path: str | os.PathLike) -> bool:
    """Remove whatever is mounted at path, typically a dead FUSE mount that answers ENOTCONN.

    Returns True if something was unmounted. Afterwards path is a plain directory.
    """
    p = _canonical(path)
    cleared = False
    for _ in range(16):
        if not is_mounted(p):
            _registry.discard(p)
            return cleared
        entry = mount_at(p)
        if entry is not None and entry.fstype.startswith("fuse"):
            lazy_unmount_fuse(p)
        else:
            _run(["umount", "-l", str(p)], f"lazy unmount of {p}")
        cleared = True
    raise MountError(f"{p} is still mounted after 16 unmounts")


def access_errno(path: str | os.PathLike) -> int:
    """0 if path can be stat'ed (and listed, if a directory), else the errno: ENOTCONN for a dead FUSE mount.

    Listing matters: the kernel may answer stat() of a dead mount's root
    from its attribute cache.
    """
    try:
        st = os.stat(path)
        if stat.S_ISDIR(st.st_mode):
            os.listdir(path)
    except OSError as e:
        return e.errno or errno.EIO
    return 0


_log_numbers = itertools.count(1)


class MountProcess:
    """A filesystem command running in a subprocess, mounted at mountpoint.

    The process starts on construction, in its own session (signals meant
    for the test runner do not reach it), with stdout and stderr going to a
    log file under log_dir. env adds variables to os.environ; PYTHONPATH
    gets this checkout so `python -m gateway.cli` and the test filesystems
    import. Use as a context manager, or call cleanup(): it leaves no mount
    behind whatever state the process is in.
    """

    def __init__(self, argv: Sequence[str | os.PathLike], mountpoint: str | os.PathLike, *,
                 env: Mapping[str, str] | None = None, log_dir: str | os.PathLike,
                 cwd: str | os.PathLike | None = None):
        self.argv = [os.fspath(a) for a in argv]
        self.mountpoint = _canonical(mountpoint)
        if is_mounted(self.mountpoint):
            raise MountError(f"{self.mountpoint} is mounted already (clear_stale_mount() removes a dead mount)")
        self.mountpoint.mkdir(parents=True, exist_ok=True)
        log_dir = Path(log_dir)
        log_dir.mkdir(parents=True, exist_ok=True)
        self.log_path = log_dir / f"{self.mountpoint.name}-{os.getpid()}-{next(_log_numbers)}.log"
        full_env = dict(os.environ)
        full_env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO), full_env.get("PYTHONPATH")]))
        full_env.update(env or {})
        with open(self.log_path, "wb") as log:  # the child keeps its own descriptor
            self.proc = subprocess.Popen(self.argv, stdin=subprocess.DEVNULL, stdout=log, stderr=subprocess.STDOUT,
                                         env=full_env, cwd=os.fspath(cwd) if cwd else str(REPO), start_new_session=True)
        _registry.add(self.mountpoint)

    def __enter__(self) -> MountProcess:
        return self

    def __exit__(self, *exc: object) -> None:
        self.cleanup()

    def __repr__(self) -> str:
        return f"<MountProcess pid={self.pid} {self.mountpoint} rc={self.returncode}>"

    @property
    def pid(self) -> int:
        return self.proc.pid

    @property
    def returncode(self) -> int | None:
        return self.proc.poll()

    @property
    def alive(self) -> bool:
        return self.proc.poll() is None

    @property
    def mounted(self) -> bool:
        return is_mounted(self.mountpoint)

    def log_text(self) -> str:
        return self.log_path.read_text(errors="replace")

    def log_tail(self, lines: int = 40) -> str:
        return "\n".join(self.log_text().splitlines()[-lines:])

    def error_lines(self) -> list[str]:
        """Log lines that look like an error report: tracebacks, ERROR or CRITICAL records."""
        return [ln for ln in self.log_text().splitlines() if re.search(r"\b(ERROR|CRITICAL)\b|^Traceback", ln)]

    def _failure(self, what: str) -> MountError:
        return MountError(f"{what}\n--- {' '.join(self.argv)} (log {self.log_path}) ---\n{self.log_tail()}")

    def wait_mounted(self, timeout: float = 10.0) -> None:
        """Return once the mount answers; raise MountError if the process exits first or time runs out."""
        deadline = time.monotonic() + timeout
        while True:
            rc = self.proc.poll()
            if rc is not None:
                raise self._failure(f"filesystem process exited with {rc} before {self.mountpoint} was mounted")
            # mountinfo first: os.path.ismount stats the mount, which waits for the filesystem to answer.
            if is_mounted(self.mountpoint) and os.path.ismount(self.mountpoint):
                return
            if time.monotonic() > deadline:
                raise self._failure(f"{self.mountpoint} not mounted after {timeout} s")
            time.sleep(0.02)

    def wait(self, timeout: float = 30.0) -> int:
        """Wait for the process to exit; its exit code. Raises MountError on timeout."""
        try:
            return self.proc.wait(timeout)
        except subprocess.TimeoutExpired:
            raise self._failure(f"filesystem process still running after {timeout} s") from None

    def stop(self, sig: int = signal.SIGTERM, timeout: float = 30.0) -> int:
        """Send sig and wait for the exit; its exit code (negative: killed by that signal)."""
        if self.alive:
            self.proc.send_signal(sig)
        return self.wait(timeout)

    def unmount(self, timeout: float = 30.0) -> int:
        """`fusermount3 -u` the mount, as a user would, and wait for the process to exit; its exit code."""
        _run(["fusermount3", "-u", str(self.mountpoint)], f"unmount {self.mountpoint}")
        return self.wait(timeout)

    def kill(self) -> int:
        """SIGKILL, as in a crash: the mount stays behind, dead (ENOTCONN), until cleanup()."""
        if self.alive:
            self.proc.kill()
        return self.proc.wait()

    def cleanup(self) -> None:
        """Lazy unmount, then SIGTERM, then SIGKILL; afterwards nothing is mounted at mountpoint."""
        lazy_unmount_fuse(self.mountpoint)
        if self.alive:
            try:
                self.proc.wait(1)  # a detached mount usually ends the process by itself
            except subprocess.TimeoutExpired:
                self.proc.terminate()
                try:
                    self.proc.wait(10)
                except subprocess.TimeoutExpired:
                    self.proc.kill()
                    self.proc.wait()
        clear_stale_mount(self.mountpoint)
        _registry.discard(self.mountpoint)


# -- requirements -------------------------------------------------------------------------


def fuse_available() -> str | None:
    """None if FUSE mounts can be made here, else the reason why not."""
    try:
        fd = os.open("/dev/fuse", os.O_RDWR)
    except OSError as e:
        return f"/dev/fuse cannot be opened: {e.strerror}"
    os.close(fd)
    if shutil.which("fusermount3") is None:
        return "fusermount3 is not installed (apt-get install fuse3)"
    try:
        import pyfuse3  # noqa: F401
    except ImportError as e:
        return f"pyfuse3 does not import: {e}"
    return None


def root_available() -> str | None:
    """None if this process runs as root (needed for tmpfs and bind mounts), else why not."""
    return None if os.geteuid() == 0 else "needs root for tmpfs and bind mounts"


def requirement(reason: str | None) -> pytest.MarkDecorator:
    """A mark that skips when reason is not None, or fails the test when CI is set."""
    # Under CI a missing requirement is a broken install, not a reason to
    # skip: conftest.py fails tests carrying the missing_requirement mark.
    if reason is not None and os.environ.get("CI"):
        return pytest.mark.missing_requirement(reason)
    return pytest.mark.skipif(reason is not None, reason=reason or "")


requires_fuse = requirement(fuse_available())
requires_root = requirement(root_available())


# -- small helpers the mount tests share ------------------------------------------------

def wait_for(pred, what: str, timeout: float = 30.0, step: float = 0.1):
    """Poll until pred() is truthy; its value. A failure says what never happened."""
    deadline = time.monotonic() + timeout
    while True:
        v = pred()
        if v:
            return v
        if time.monotonic() > deadline:
            pytest.fail(f"{what}: not so after {timeout} s (last value {v!r})")
        time.sleep(step)


def drop_kernel_caches() -> None:
    """Make the next read through a mount reach its daemon, not the page cache."""
    os.sync()
    Path("/proc/sys/vm/drop_caches").write_text("3\n")


def sha256sum(path: str | os.PathLike) -> str:
    """The digest as the sha256sum tool (the reference) computes it."""
    r = subprocess.run(["sha256sum", "-b", os.fspath(path)], capture_output=True, text=True, check=True)
    return r.stdout.split()[0]

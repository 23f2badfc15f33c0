"""Shared fixtures: tmpfs stores, pool configs, filesystem processes; error-log policing.

Fixtures (all function-scoped factories; everything they mount is unmounted
at teardown, also when the test fails):

  store_dirs(count, size="64m") -> list[Path]
      count store directories under tmp_path/stores, each its own tmpfs.
  bound_stores(count, size="64m") -> list[BoundStore]
      stores whose data lives on their own tmpfs "disk" and is bind-mounted
      at the store path, so a test can pull() a store and put_back() the same data.
  pool_config(k, n, w=None, *, domains=None, stripe_size="4MiB", extra=None,
              stores=None, store_count=None, store_size="64m", name="test") -> Path
      a config file for gateway.config.load; stores default to store_count
      (default n) fresh store_dirs; state_dir is a fresh directory name under
      tmp_path (not created).
  mount_process(argv, mountpoint=None, *, env=None, wait=True, timeout=10.0) -> MountProcess
      starts a filesystem command; mountpoint defaults to tmp_path/mnt, mnt1, ...;
      waits until mounted unless wait=False. Teardown cleans it up, prints the
      tail of its log (pytest shows it when the test fails) and fails the
      test if the log holds a traceback or an ERROR/CRITICAL line.

Policies:
  - A test fails if it logs a record at ERROR or above through `logging`,
    unless marked @pytest.mark.allow_errors (everything) or
    @pytest.mark.allow_errors("regex", ...) (records whose message or logger
    name matches). The same marker covers mount_process logs.
  - A test that leaves one of the helpers' mounts under its tmp_path fails
    at teardown (the mount is cleared first).
  - mounting.requires_fuse / requires_root skip when the requirement is
    missing, and fail instead when the CI environment variable is set.
"""
from __future__ import annotations

import logging
import re
from collections.abc import Iterator
from pathlib import Path

import pytest

import mounting
from mounting import BoundStore, MountProcess, make_bound_store, mount_tmpfs, run_all, unmount_all, write_pool_config

pytest_plugins = ["pytester"]  # tests/test_mounting.py checks these policies in inner pytest runs


def pytest_configure(config: pytest.Config) -> None:
    config.addinivalue_line(
        "markers",
        "allow_errors(*patterns): the test may log ERROR/CRITICAL records; with patterns, only records "
        "whose message or logger name matches one of these regular expressions",
    )
    config.addinivalue_line(
        "markers", "missing_requirement(reason): set by mounting.requires_* under CI; fails the test with reason"
    )
    config.pluginmanager.register(_Requirements(), "shoal-requirements")


# -- unexpected ERROR records ---------------------------------------------------------


class _ErrorRecords(logging.Handler):
    def __init__(self) -> None:
        super().__init__(logging.ERROR)
        self.records: list[logging.LogRecord] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.records.append(record)

    def take(self) -> list[logging.LogRecord]:
        out, self.records = self.records, []
        return out


_handler_key = pytest.StashKey[_ErrorRecords]()
_tmp_path_key = pytest.StashKey["Path | None"]()


def _allowed_patterns(item: pytest.Item) -> list[re.Pattern[str]] | None:
    """None: no allow_errors mark. []: everything allowed. Else the allowed patterns."""
    marks = list(item.iter_markers("allow_errors"))
    if not marks:
        return None
    if any(not m.args for m in marks):
        return []
    return [re.compile(p) for m in marks for p in m.args]


def _unexpected_lines(item: pytest.Item, lines: list[tuple[str, str]]) -> list[str]:
    """Filter (source, text) pairs by the item's allow_errors marks."""
    pats = _allowed_patterns(item)
    if pats == []:
        return []
    return [text for source, text in lines
            if not (pats and any(p.search(text) or p.search(source) for p in pats))]


def _check_records(item: pytest.Item, phase: str) -> None:
    handler = item.stash.get(_handler_key, None)
    if handler is None:
        return
    records = handler.take()
    lines = []
    for r in records:
        text = f"{r.levelname} {r.name}: {r.getMessage()}"
        if r.exc_info and r.exc_info[1] is not None:
            text += f" [{type(r.exc_info[1]).__name__}: {r.exc_info[1]}]"
        lines.append((r.name, text))
    bad = _unexpected_lines(item, lines)
    if bad:
        pytest.fail(f"logged unexpected error records during {phase} (mark the test allow_errors if intended):\n  "
                    + "\n  ".join(bad), pytrace=False)


class _Requirements:
    """Fails tests marked missing_requirement, where skipif would skip them.

    A plain hook (not a wrapper), like the skipping plugin's, so the other
    plugins' setup wrappers have run and their teardown finds what it expects.
    """

    @pytest.hookimpl(tryfirst=True)
    def pytest_runtest_setup(self, item: pytest.Item) -> None:
        mark = item.get_closest_marker("missing_requirement")
        if mark is not None:
            pytest.fail(f"requirement missing under CI: {mark.args[0]}", pytrace=False)


@pytest.hookimpl(wrapper=True, tryfirst=True)
def pytest_runtest_setup(item: pytest.Item):
    handler = _ErrorRecords()
    item.stash[_handler_key] = handler
    logging.getLogger().addHandler(handler)
    result = yield
    item.stash[_tmp_path_key] = getattr(item, "funcargs", {}).get("tmp_path")
    _check_records(item, "setup")
    return result


@pytest.hookimpl(wrapper=True, tryfirst=True)
def pytest_runtest_call(item: pytest.Item):
    try:
        result = yield
    except BaseException:
        # The test failed already; its captured log shows the records.
        handler = item.stash.get(_handler_key, None)
        if handler is not None:
            handler.take()
        raise
    _check_records(item, "call")
    return result


@pytest.hookimpl(wrapper=True, tryfirst=True)
def pytest_runtest_teardown(item: pytest.Item, nextitem: pytest.Item | None):
    try:
        result = yield
    finally:
        handler = item.stash.get(_handler_key, None)
        if handler is not None:
            logging.getLogger().removeHandler(handler)
    _check_records(item, "teardown")
    _check_leftover_mounts(item)
    return result


def _check_leftover_mounts(item: pytest.Item) -> None:
    tmp = item.stash.get(_tmp_path_key, None)
    if tmp is None:
        return
    tmp = Path(tmp).resolve()
    left = [p for p in mounting.leftover_mounts() if p == tmp or tmp in p.parents]
    for p in left:
        mounting.clear_stale_mount(p)
    if left:
        pytest.fail("test left mounts behind (now cleared): " + ", ".join(map(str, left)), pytrace=False)


# -- fixtures -----------------------------------------------------------------------------


@pytest.fixture
def store_dirs(tmp_path: Path) -> Iterator:
    made: list[Path] = []

    def make(count: int, size: str | int = "64m") -> list[Path]:
        out = []
        for _ in range(count):
            p = mount_tmpfs(tmp_path / "stores" / f"store{len(made)}", size)
            made.append(p)
            out.append(p)
        return out

    try:
        yield make
    finally:
        run_all([lambda p=p: unmount_all(p) for p in reversed(made)])


@pytest.fixture
def bound_stores(tmp_path: Path) -> Iterator:
    made: list[BoundStore] = []

    def make(count: int, size: str | int = "64m") -> list[BoundStore]:
        out = []
        for _ in range(count):
            i = len(made)
            s = make_bound_store(tmp_path / "stores" / f"bound{i}", tmp_path / "disks" / f"disk{i}", size)
            made.append(s)
            out.append(s)
        return out

    try:
        yield make
    finally:
        run_all([s.close for s in reversed(made)])


@pytest.fixture
def pool_config(tmp_path: Path, store_dirs) -> Iterator:
    count = 0

    def make(k: int, n: int, w: int | None = None, *, domains: list[str] | None = None,
             stripe_size: str | int = "4MiB", extra: dict | None = None, stores: list[Path] | None = None,
             store_count: int | None = None, store_size: str | int = "64m", name: str = "test") -> Path:
        nonlocal count
        if stores is None:
            stores = store_dirs(store_count if store_count is not None else n, store_size)
        suffix = str(count) if count else ""
        count += 1
        return write_pool_config(tmp_path / f"config{suffix}", k=k, n=n, w=w, stores=stores, domains=domains,
                                 stripe_size=stripe_size, state_dir=tmp_path / f"state{suffix}", name=name,
                                 extra=extra)

    yield make


@pytest.fixture
def mount_process(request: pytest.FixtureRequest, tmp_path: Path, store_dirs, bound_stores) -> Iterator:
    # Depending on the store fixtures makes them tear down after the
    # filesystem processes that use them.
    procs: list[MountProcess] = []

    def start(argv, mountpoint: Path | None = None, *, env: dict[str, str] | None = None,
              wait: bool = True, timeout: float = 10.0) -> MountProcess:
        if mountpoint is None:
            mountpoint = tmp_path / (f"mnt{len(procs)}" if procs else "mnt")
        mp = MountProcess(argv, mountpoint, env=env, log_dir=tmp_path / "logs")
        procs.append(mp)
        if wait:
            mp.wait_mounted(timeout)
        return mp

    def finish(mp: MountProcess) -> None:
        try:
            mp.cleanup()
        finally:
            print(f"--- {' '.join(mp.argv)} exited {mp.returncode}; log {mp.log_path} ---")
            print(mp.log_tail(80))

    try:
        yield start
    finally:
        run_all([lambda mp=mp: finish(mp) for mp in reversed(procs)])
        bad: list[str] = []
        for mp in procs:
            bad += _unexpected_lines(request.node, [(mp.argv[-1], ln) for ln in mp.error_lines()])
        if bad:
            pytest.fail("filesystem process logged errors (mark the test allow_errors if intended):\n  "
                        + "\n  ".join(bad[:20]), pytrace=False)

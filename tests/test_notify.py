"""gateway.notify against real AF_UNIX datagram sockets.

The receiving side stands in for the service manager: a SOCK_DGRAM socket
bound where $NOTIFY_SOCKET points, as described in sd_notify(3) (a path, or
an abstract name written with a leading '@'). The kernel delivers what
Notifier sends, so these tests check the wire format and the addressing,
not a mock.
"""
from __future__ import annotations

import logging
import os
import socket
import struct
import tempfile
import uuid
from pathlib import Path

import pytest

from gateway.notify import MESSAGE_MAX, STATUS_MAX, Notifier, watchdog_interval

# sun_path holds 108 bytes including the terminating NUL (unix(7)).
_SUN_PATH_MAX = 107


@pytest.fixture
def sock_dir(tmp_path):
    """tmp_path, or a shorter directory if tmp_path is too long for an AF_UNIX path."""
    if len(str(tmp_path / "notify.sock")) <= _SUN_PATH_MAX:
        yield tmp_path
        return
    with tempfile.TemporaryDirectory(prefix="shoal-n-") as d:
        yield Path(d)


@pytest.fixture
def manager(sock_dir):
    """A bound datagram socket at a path: (path, socket)."""
    path = sock_dir / "notify.sock"
    s = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    s.bind(str(path))
    s.settimeout(5)  # a safety net against a hang, not an assertion
    with s:
        yield str(path), s


@pytest.fixture
def abstract_manager():
    """A bound datagram socket in the abstract namespace: ('@name', socket)."""
    name = f"shoal-test-{uuid.uuid4().hex}"
    s = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    s.bind(b"\0" + name.encode())
    s.settimeout(5)
    with s:
        yield "@" + name, s


def _fields(datagram: bytes) -> dict[str, str]:
    """Parse a notification the way the manager does: newline-separated KEY=value."""
    out = {}
    for line in datagram.decode().split("\n"):
        key, sep, value = line.partition("=")
        assert sep, f"line without '=': {line!r}"
        out[key] = value
    return out


def test_ready_arrives_on_a_path_socket(manager):
    path, s = manager
    n = Notifier(environ={"NOTIFY_SOCKET": path})
    assert n.enabled
    assert n.ready() is True
    assert s.recv(MESSAGE_MAX) == b"READY=1"


def test_each_message_type_arrives(manager):
    path, s = manager
    n = Notifier(path)
    assert n.status("lab: 6/6 stores online, 0 stripes degraded")
    assert n.watchdog()
    assert n.stopping()
    assert n.ready(status="lab mounted at /srv/shoal/lab")
    assert n.extend_timeout(90)
    got = [_fields(s.recv(MESSAGE_MAX)) for _ in range(5)]
    assert got == [
        {"STATUS": "lab: 6/6 stores online, 0 stripes degraded"},
        {"WATCHDOG": "1"},
        {"STOPPING": "1"},
        {"READY": "1", "STATUS": "lab mounted at /srv/shoal/lab"},
        {"EXTEND_TIMEOUT_USEC": "90000000"},
    ]


def test_abstract_socket(abstract_manager):
    name, s = abstract_manager
    n = Notifier(environ={"NOTIFY_SOCKET": name})
    assert n.ready()
    assert n.status("lab: degraded, repairing")
    assert n.stopping()
    assert n.watchdog()
    assert [s.recv(MESSAGE_MAX) for _ in range(4)] == [
        b"READY=1", b"STATUS=lab: degraded, repairing", b"STOPPING=1", b"WATCHDOG=1",
    ]


def test_sender_credentials_are_this_process(manager):
    # NotifyAccess=main makes systemd accept a message only if the kernel's
    # SCM_CREDENTIALS name the main pid. Ask the kernel what it attaches.
    path, s = manager
    s.setsockopt(socket.SOL_SOCKET, socket.SO_PASSCRED, 1)
    assert Notifier(path).ready()
    data, ancdata, _flags, _addr = s.recvmsg(MESSAGE_MAX, socket.CMSG_SPACE(struct.calcsize("3i")))
    assert data == b"READY=1"
    creds = [struct.unpack("3i", d[: struct.calcsize("3i")]) for level, kind, d in ancdata
             if level == socket.SOL_SOCKET and kind == socket.SCM_CREDENTIALS]
    assert creds == [(os.getpid(), os.getuid(), os.getgid())]


def test_notify_with_fields(manager):
    path, s = manager
    n = Notifier(path)
    assert n.notify(status="scrubbing 40%", ready=True)
    assert _fields(s.recv(MESSAGE_MAX)) == {"STATUS": "scrubbing 40%", "READY": "1"}


def test_status_is_folded_onto_one_line(manager):
    # A newline inside STATUS would start a new assignment, e.g. a stray READY=1.
    path, s = manager
    assert Notifier(path).status("store /srv/disk3 failed:\nREADY=1\r\n\ttry again")
    assert _fields(s.recv(MESSAGE_MAX)) == {"STATUS": "store /srv/disk3 failed: READY=1 try again"}


def test_long_status_is_capped_to_fit(manager):
    path, s = manager
    assert Notifier(path).status("é" * 5000)  # two bytes each in UTF-8
    status = _fields(s.recv(MESSAGE_MAX))["STATUS"]
    assert len(status.encode()) <= STATUS_MAX
    assert status.endswith("…") and set(status[:-1]) == {"é"}


def test_caller_mistakes_raise():
    n = Notifier("/nonexistent/notify.sock")
    with pytest.raises(ValueError):
        n.notify()
    with pytest.raises(ValueError):
        n.notify(**{"BAD-KEY": 1})
    with pytest.raises(ValueError):
        n.notify(STATUS="two\nlines")
    with pytest.raises(ValueError):
        n.notify(STATUS="x" * MESSAGE_MAX)
    with pytest.raises(ValueError):
        n.extend_timeout(0)


def test_unset_socket_is_a_noop(monkeypatch, manager):
    monkeypatch.delenv("NOTIFY_SOCKET", raising=False)
    _path, s = manager
    n = Notifier()
    assert not n.enabled
    assert n.ready() is False
    assert n.status("lab ok") is False
    assert n.stopping() is False
    assert n.watchdog() is False
    s.setblocking(False)
    with pytest.raises(BlockingIOError):
        s.recv(MESSAGE_MAX)  # nothing was sent anywhere


def test_reads_the_environment(monkeypatch, manager):
    path, s = manager
    monkeypatch.setenv("NOTIFY_SOCKET", path)
    assert Notifier().watchdog()
    assert s.recv(MESSAGE_MAX) == b"WATCHDOG=1"


@pytest.mark.parametrize("value", ["", "relative/notify.sock", "vsock:2:1234"])
def test_unusable_address_disables(value):
    n = Notifier(environ={"NOTIFY_SOCKET": value})
    assert not n.enabled
    assert n.ready() is False


def test_socket_that_went_away_does_not_raise(sock_dir, caplog):
    path = sock_dir / "gone.sock"
    s = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    s.bind(str(path))
    n = Notifier(str(path))
    s.close()  # the file stays, nobody listens: ECONNREFUSED
    with caplog.at_level(logging.DEBUG, logger="gateway.notify"):
        assert n.ready() is False
        path.unlink()  # now the file is gone too: ENOENT
        assert n.stopping() is False
    assert [r.levelno for r in caplog.records] == [logging.DEBUG, logging.DEBUG]


def test_full_queue_drops_instead_of_blocking(manager):
    # Nobody reads: the receive queue fills (net.unix.max_dgram_qlen) and a
    # blocking sender would hang here. Non-blocking sends drop instead.
    path, s = manager
    n = Notifier(path)
    results = [n.watchdog() for _ in range(5000)]
    assert results[0] is True
    assert False in results
    assert s.recv(MESSAGE_MAX) == b"WATCHDOG=1"


def test_watchdog_interval_is_half_the_timeout():
    assert watchdog_interval({"WATCHDOG_USEC": "30000000"}) == 15.0
    assert watchdog_interval({"WATCHDOG_USEC": "30000000", "WATCHDOG_PID": str(os.getpid())}) == 15.0


@pytest.mark.parametrize("env", [
    {},
    {"WATCHDOG_USEC": ""},
    {"WATCHDOG_USEC": "0"},
    {"WATCHDOG_USEC": "-5"},
    {"WATCHDOG_USEC": "thirty"},
    {"WATCHDOG_USEC": "30000000", "WATCHDOG_PID": str(os.getpid() + 1)},
    {"WATCHDOG_USEC": "30000000", "WATCHDOG_PID": "main"},
])
def test_watchdog_interval_none(env):
    assert watchdog_interval(env) is None


def test_watchdog_interval_reads_the_environment(monkeypatch):
    monkeypatch.setenv("WATCHDOG_USEC", "4000000")
    monkeypatch.delenv("WATCHDOG_PID", raising=False)
    assert watchdog_interval() == 2.0

"""A tiny client for the service manager's notification protocol (sd_notify).

Under ``Type=notify`` systemd puts the address of a datagram socket in
``$NOTIFY_SOCKET``; the daemon reports its state by sending newline-separated
``KEY=value`` assignments to it (READY=1, STATUS=..., STOPPING=1, WATCHDOG=1).
The address is a filesystem path, or, when it starts with '@', a Linux
abstract socket name (the '@' stands for a leading NUL byte).

Contract:
- With ``$NOTIFY_SOCKET`` unset (a shell, a test, a container without
  systemd) every method is a no-op that returns False.
- A send never raises into the caller: a socket that went away, a full
  queue or a refused connection is logged at debug level and the method
  returns False. Only a caller's own mistake (a field name that is not
  ``[A-Z0-9_]+``, a value with a newline, a message over the manager's
  4096-byte limit) raises ValueError, so it shows up in tests.
- Each message is one non-blocking ``sendto`` on a fresh AF_UNIX datagram
  socket: a few microseconds and no wait, so it is cheap enough to call
  directly on the trio loop. A full receive queue drops the message
  (watchdog pings are periodic; systemd raises the queue length to 512 at
  boot, so READY=1 finds room in practice).

The watchdog ping should be sent from the trio loop itself, not from a
thread: then a wedged loop stops the pings and systemd restarts the daemon.
No dependencies beyond the standard library.
"""
from __future__ import annotations

import logging
import math
import os
import re
import socket
from collections.abc import Mapping

__all__ = ["MESSAGE_MAX", "Notifier", "watchdog_interval"]

log = logging.getLogger(__name__)

# systemd reads notifications into a buffer of PIPE_BUF (4096) bytes and
# drops longer datagrams, so a longer message could never arrive.
MESSAGE_MAX = 4096
# STATUS= is shown by `systemctl status` on one line; keep it short.
STATUS_MAX = 1024

_FIELD = re.compile(r"[A-Z][A-Z0-9_]*")


def _address(raw: str | None) -> str | bytes | None:
    """The sendto address for a $NOTIFY_SOCKET value, or None if unusable."""
    if not raw:
        return None
    if raw.startswith("@"):
        # Linux abstract namespace: '@' stands for the leading NUL byte.
        return b"\0" + raw[1:].encode()
    if raw.startswith("/"):
        return raw
    # sd_notify accepts only absolute paths and '@' names (newer managers also
    # speak vsock, which a local gateway never runs under).
    log.debug("NOTIFY_SOCKET=%r is neither an absolute path nor an abstract name; notifications are off", raw)
    return None


def _value(value: object) -> str:
    if value is True:
        return "1"
    if value is False:
        return "0"
    return str(value)


def _one_line(text: str, limit: int = STATUS_MAX) -> str:
    """Collapse whitespace (a newline would start a new assignment) and cap the UTF-8 length."""
    line = " ".join(str(text).replace("\0", " ").split())
    raw = line.encode()
    if len(raw) > limit:
        line = raw[: limit - 3].decode(errors="ignore") + "…"
    return line


class Notifier:
    """Sends notifications to the service manager at ``$NOTIFY_SOCKET``.

    ``Notifier()`` reads the environment once, at construction. Pass
    ``address`` (same syntax as the variable) to aim it elsewhere, or
    ``environ`` to read another mapping (tests). Thread-safe: no state is
    kept between messages.
    """

    def __init__(self, address: str | None = None, *, environ: Mapping[str, str] | None = None):
        if address is None:
            address = (os.environ if environ is None else environ).get("NOTIFY_SOCKET")
        self._raw = address
        self._address = _address(address)

    @property
    def enabled(self) -> bool:
        """True when there is a manager to talk to."""
        return self._address is not None

    def __repr__(self) -> str:
        return f"Notifier({self._raw!r})" if self.enabled else "Notifier(disabled)"

    def notify(self, **fields: object) -> bool:
        """Send ``KEY=value`` assignments in one datagram; True if it was sent.

        Keys are upper-cased (``notify(status="ok")`` sends ``STATUS=ok``);
        True becomes "1". Raises ValueError for a bad key, a value containing
        a newline or a message over MESSAGE_MAX bytes; never for a send error.
        """
        if not fields:
            raise ValueError("notify() needs at least one field, e.g. READY=1")
        lines = []
        for key, value in fields.items():
            name = key.upper()
            if not _FIELD.fullmatch(name):
                raise ValueError(f"{key!r} is not a notification field name (use letters, digits and '_')")
            text = _value(value)
            if "\n" in text or "\0" in text:
                raise ValueError(f"the value of {name} contains a newline or NUL byte")
            lines.append(f"{name}={text}")
        message = "\n".join(lines).encode()
        if len(message) > MESSAGE_MAX:
            raise ValueError(f"notification is {len(message)} bytes; the service manager drops more than {MESSAGE_MAX}")
        return self._send(message)

    def ready(self, status: str | None = None) -> bool:
        """READY=1: the pool is mounted and serving. Send it once, after the mount."""
        if status is None:
            return self.notify(READY=1)
        return self.notify(READY=1, STATUS=_one_line(status))

    def status(self, text: str) -> bool:
        """STATUS=text, shown by `systemctl status`. Any text is accepted: it is folded onto one line and capped."""
        return self.notify(STATUS=_one_line(text))

    def stopping(self, status: str | None = None) -> bool:
        """STOPPING=1: shutdown has begun (in-flight commits are finishing)."""
        if status is None:
            return self.notify(STOPPING=1)
        return self.notify(STOPPING=1, STATUS=_one_line(status))

    def watchdog(self) -> bool:
        """WATCHDOG=1: a keep-alive ping; send one every watchdog_interval() seconds."""
        return self.notify(WATCHDOG=1)

    def extend_timeout(self, seconds: float) -> bool:
        """EXTEND_TIMEOUT_USEC: ask for `seconds` more to finish starting or stopping.

        For long work the manager would otherwise cut short, such as a catalog
        migration at start or a slow commit during stop. Repeat before it runs out.
        """
        if not (seconds > 0 and math.isfinite(seconds)):
            raise ValueError(f"extend_timeout needs a positive number of seconds, got {seconds!r}")
        return self.notify(EXTEND_TIMEOUT_USEC=int(seconds * 1_000_000))

    def _send(self, message: bytes) -> bool:
        if self._address is None:
            return False
        try:
            with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC | socket.SOCK_NONBLOCK) as s:
                s.sendto(message, self._address)
        except OSError as e:
            # ENOENT/ECONNREFUSED: the manager's socket went away; EAGAIN: its
            # queue is full. Telling the manager is best effort by design.
            log.debug("notification to %s not sent: %s", self._raw, e)
            return False
        return True


def watchdog_interval(environ: Mapping[str, str] | None = None) -> float | None:
    """Seconds between watchdog pings, or None if the manager expects none.

    Reads ``$WATCHDOG_USEC`` (the manager's timeout, set by WatchdogSec=) and
    returns half of it, the period systemd recommends. If ``$WATCHDOG_PID``
    is set it must be this process's pid: the variables may have been
    inherited from a parent that is the one being watched.
    """
    env = os.environ if environ is None else environ
    usec = env.get("WATCHDOG_USEC")
    if not usec:
        return None
    pid = env.get("WATCHDOG_PID")
    if pid:
        try:
            if int(pid) != os.getpid():
                return None
        except ValueError:
            log.debug("WATCHDOG_PID=%r is not a pid; ignoring the watchdog", pid)
            return None
    try:
        timeout = int(usec)
    except ValueError:
        log.debug("WATCHDOG_USEC=%r is not a number of microseconds; ignoring the watchdog", usec)
        return None
    if timeout <= 0:
        return None
    return timeout / 2 / 1_000_000

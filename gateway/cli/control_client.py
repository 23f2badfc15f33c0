"""Talk to a running daemon over its control socket (msgpack over a Unix socket)."""
from __future__ import annotations

import socket
import struct

import msgpack

from ..errors import ControlError

MAX_MESSAGE = 64 << 20


def request(cfg, op: str, *, timeout: float | None = 30.0, **args) -> dict:
    """Send one request and return the daemon's reply. Raises ControlError."""
    path = str(cfg.control_socket)
    try:
        with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as s:
            s.settimeout(timeout)
            s.connect(path)
            body = msgpack.packb({"op": op, "args": args}, use_bin_type=True)
            s.sendall(struct.pack(">I", len(body)) + body)
            head = _recv(s, 4)
            (size,) = struct.unpack(">I", head)
            if size > MAX_MESSAGE:
                raise ControlError(f"daemon reply of {size} bytes is too large")
            reply = msgpack.unpackb(_recv(s, size), raw=False)
    except (FileNotFoundError, ConnectionRefusedError) as e:
        raise ControlError(f"no daemon is running for pool {cfg.name} (no socket at {path})") from e
    except OSError as e:
        raise ControlError(f"control socket {path}: {e}") from e
    if not reply.get("ok"):
        raise ControlError(reply.get("error", "the daemon refused the request"))
    return reply.get("result")


def try_request(cfg, op: str, **args):
    """Like request, but None when no daemon is running."""
    if not cfg.control_socket.exists():
        return None
    try:
        return request(cfg, op, **args)
    except ControlError as e:
        if isinstance(e.__cause__, (FileNotFoundError, ConnectionRefusedError)):
            return None
        raise


def _recv(s: socket.socket, n: int) -> bytes:
    buf = bytearray()
    while len(buf) < n:
        chunk = s.recv(n - len(buf))
        if not chunk:
            raise ControlError("the daemon closed the connection")
        buf += chunk
    return bytes(buf)

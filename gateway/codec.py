"""Codec: stripe bytes <-> shards, the shard file header, checksums. Pure.

Coding is a systematic Reed-Solomon code over GF(2^8) (polynomial 0x11d):
a stripe is zero-padded to k * shard_length bytes and cut into k data
shards; shard i holds, byte by byte, P(x_i) for the one polynomial P of
degree < k that takes the data bytes at x_0..x_{k-1}, with evaluation
points x_0 = 0 and x_i = a^(i-1) (a = the field's generator x). Any k of
the n shards rebuild the stripe. This is the code zfec computes, and the
first shards Shoal wrote were zfec's.

Any shard is a linear combination of any k others, with Lagrange
coefficients of the points (``_matrix``, cached). The combining is done by
gateway._gf (C; byte shuffles with SSSE3 or AVX2), which computes only the
shards asked for; without that extension the codec falls back to zfec for
the same bytes (tests/test_codec.py checks both, and both against the
polynomial definition).

Thread safety: encode, rebuild and decode may be called from many threads
at once. The coefficient cache and zfec's cached Encoder/Decoder objects
are read-only once built (zfec keeps per-call scratch on the C stack), and
both gateway._gf and zfec release the GIL while they compute.

Shard file format, version 1 (all of it is written by ``pack``)::

    b"SHOALSH1"                 magic, 8 bytes
    u32 big-endian              length L of the msgpack header, 1..4096
    msgpack map, L bytes        every ShardHeader field, short string keys
    16 bytes                    BLAKE3 of the msgpack bytes (first 16 bytes)
    payload                     payload_length bytes; BLAKE3-256 in the header

``parse`` trusts nothing: every failure is a ShardCorrupt with a reason.
"""
from __future__ import annotations

import functools
import re
import struct
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, fields
from typing import Union

import blake3
import msgpack
import zfec

from .errors import ShardCorrupt

try:
    from . import _gf
except ImportError:  # installed without the C extension: zfec does the coding
    _gf = None
from .ids import FileId, PoolId

__all__ = [
    "FORMAT_VERSION",
    "MAGIC",
    "MAX_HEADER_LENGTH",
    "MAX_HEADER_SIZE",
    "MAX_N",
    "MAX_STRIPE_LENGTH",
    "ShardHeader",
    "checksum",
    "decode",
    "encode",
    "make_header",
    "pack",
    "parse",
    "parse_header",
    "shard_length",
    "verify",
]

Buffer = Union[bytes, bytearray, memoryview]

MAGIC = b"SHOALSH1"
FORMAT_VERSION = 1
MAX_HEADER_LENGTH = 4096  # bytes of msgpack; real headers are about 150
_PREFIX = struct.Struct(">8sI")  # magic, header length
_HEADER_SUM_LENGTH = 16
# Bytes a scan must read to be sure of holding the whole header.
MAX_HEADER_SIZE = _PREFIX.size + MAX_HEADER_LENGTH + _HEADER_SUM_LENGTH
MAX_STRIPE_LENGTH = 1 << 30
MAX_N = 255  # shard indices are one byte in zfec
_INT63 = (1 << 63) - 1  # ids and versions must fit SQLite's INTEGER
_HEX_ID = re.compile(r"[0-9a-f]{32}")


# ---------------------------------------------------------------- coding

def checksum(data: Buffer) -> bytes:
    """BLAKE3-256 of data (32 bytes)."""
    return blake3.blake3(data).digest()


def shard_length(stripe_length: int, k: int) -> int:
    """Payload bytes per shard: ceil(stripe_length / k)."""
    return -(-stripe_length // k)


def _check_kn(k: int, n: int) -> None:
    if not (isinstance(k, int) and isinstance(n, int)) or isinstance(k, bool) or isinstance(n, bool):
        raise ValueError(f"k and n must be ints, got {k!r}, {n!r}")
    if not 1 <= k <= n <= MAX_N:
        raise ValueError(f"need 1 <= k <= n <= {MAX_N}, got k={k}, n={n}")


@functools.lru_cache(maxsize=64)
def _encoder(k: int, n: int) -> zfec.Encoder:
    return zfec.Encoder(k, n)


@functools.lru_cache(maxsize=64)
def _decoder(k: int, n: int) -> zfec.Decoder:
    return zfec.Decoder(k, n)


# GF(2^8) with x^8 + x^4 + x^3 + x^2 + 1 (0x11d), generator x: log tables.
_EXP = [0] * 510
_LOG = [0] * 256
_v = 1
for _i in range(255):
    _EXP[_i], _LOG[_v] = _v, _i
    _v = (_v << 1) ^ (0x11D if _v & 0x80 else 0)
for _i in range(255, 510):
    _EXP[_i] = _EXP[_i - 255]
del _i, _v


def _point(i: int) -> int:
    """The evaluation point of shard i: 0 for shard 0, a^(i-1) after it."""
    return 0 if i == 0 else _EXP[i - 1]


def _gf_mul(a: int, b: int) -> int:
    return 0 if a == 0 or b == 0 else _EXP[_LOG[a] + _LOG[b]]


def _gf_div(a: int, b: int) -> int:
    return 0 if a == 0 else _EXP[_LOG[a] - _LOG[b] + 255]


@functools.lru_cache(maxsize=4096)
def _matrix(known: tuple[int, ...], wanted: tuple[int, ...]) -> bytes:
    """Coefficients, row by row, of each wanted shard as a combination of
    the known shards: shard w = sum_j L_j(x_w) * shard known[j], where L_j
    is the Lagrange basis polynomial of the known points (subtraction is
    XOR in GF(2^8))."""
    xs = [_point(i) for i in known]
    out = bytearray()
    for w in wanted:
        xw = _point(w)
        for j, xj in enumerate(xs):
            c = 1
            for m, xm in enumerate(xs):
                if m != j:
                    c = _gf_mul(c, _gf_div(xw ^ xm, xj ^ xm))
            out.append(c)
    return bytes(out)


def _combine(known: dict[int, memoryview], wanted: list[int]) -> list[bytes]:
    """The payloads of the wanted shards from exactly k known ones (gateway._gf)."""
    order = tuple(sorted(known))
    return _gf.combine([known[i] for i in order], _matrix(order, tuple(wanted)))


def _pick(views: Mapping[int, memoryview], k: int, n: int) -> dict[int, memoryview]:
    """k of the given shards, data shards first, then the lowest parity indices."""
    present = [i for i in range(k) if i in views]
    present += [i for i in range(k, n) if i in views][: k - len(present)]
    return {i: views[i] for i in present}


def _bytes_view(data: Buffer) -> memoryview:
    mv = memoryview(data)
    if mv.ndim != 1 or mv.itemsize != 1 or mv.format not in ("B", "b", "c"):
        mv = mv.cast("B")  # raises TypeError if not C-contiguous
    return mv.toreadonly()


def encode(data: Buffer, k: int, n: int) -> list[Buffer]:
    """Code one stripe into n payloads of shard_length(len(data), k) bytes.

    Payloads 0..k-1 are the data, zero-padded at the end: full data shards
    are read-only memoryviews into ``data`` (no copy, so do not change
    ``data`` while they are in use); only a partly or wholly padded data
    shard is a new bytes object. Payloads k..n-1 are parity (bytes).

    Raises ValueError if data is empty or k, n are out of range.
    """
    _check_kn(k, n)
    mv = _bytes_view(data)
    length = len(mv)
    if length == 0:
        raise ValueError("an empty stripe is not encoded")
    if length > MAX_STRIPE_LENGTH:
        raise ValueError(f"stripe of {length} bytes is over the {MAX_STRIPE_LENGTH} byte limit")
    size = shard_length(length, k)
    shards: list[Buffer] = []
    for i in range(k):
        start = i * size
        if start + size <= length:
            shards.append(mv[start:start + size])
        elif start < length:
            shards.append(bytes(mv[start:]) + bytes(start + size - length))
        else:
            shards.append(bytes(size))
    if n > k:
        shards.extend(_parity(shards, k, n))
    return shards


def _parity(data: list, k: int, n: int) -> list[Buffer]:
    """Parity payloads k..n-1 of k data payloads."""
    if _gf is not None:
        return _combine({i: _bytes_view(d) for i, d in enumerate(data)}, list(range(k, n)))
    return _encoder(k, n).encode(list(data), list(range(k, n)))  # zfec computes the parity blocks only


def encode_pieces(pieces: Sequence[Buffer], k: int, n: int) -> list[Buffer]:
    """Like encode, for a stripe already cut into its k data shards (each of
    shard_length bytes, so the stripe is k whole shards): the pieces are the
    data payloads as they are, with no copy. Raises ValueError otherwise."""
    _check_kn(k, n)
    views = [_bytes_view(p) for p in pieces]
    if len(views) != k or not views or any(len(v) != len(views[0]) for v in views) or not len(views[0]):
        raise ValueError(f"encode_pieces needs k={k} non-empty pieces of one length")
    shards: list[Buffer] = list(views)
    if n > k:
        shards.extend(_parity(views, k, n))
    return shards


def rebuild(shards: Mapping[int, Buffer], k: int, n: int, wanted: Iterable[int]) -> dict[int, Buffer]:
    """The payloads of the ``wanted`` shard indices, from at least k verified
    payloads of one stripe (``shards``: index -> payload, all one length).

    Only what is wanted is computed: each missing wanted shard is one
    combination of k given shards (data shards first). Given shards that
    are wanted come back as they are.
    The payloads are assumed verified, as for decode.

    Raises ValueError on a bad index or length, or fewer than k shards.
    """
    _check_kn(k, n)
    wanted = sorted(set(wanted))
    if any(not isinstance(i, int) or not 0 <= i < n for i in wanted):
        raise ValueError(f"wanted shard indices {wanted} are outside 0..{n - 1}")
    views: dict[int, memoryview] = {}
    for i, payload in shards.items():
        if not isinstance(i, int) or not 0 <= i < n:
            raise ValueError(f"shard index {i!r} is outside 0..{n - 1}")
        views[i] = _bytes_view(payload)
    if len(views) < k:
        raise ValueError(f"{len(views)} shards cannot rebuild a stripe that needs k={k}")
    if len({len(v) for v in views.values()}) != 1 or not len(next(iter(views.values()))):
        raise ValueError("shards of one stripe must have one non-zero length")
    out: dict[int, Buffer] = {i: views[i] for i in wanted if i in views}
    missing = [i for i in wanted if i not in views]
    if not missing:
        return out
    if _gf is not None:
        out.update(zip(missing, _combine(_pick(views, k, n), missing)))
        return out
    data: list[Buffer]
    if all(i in views for i in range(k)):
        data = [views[i] for i in range(k)]
    else:
        present = list(_pick(views, k, n))
        # zfec reorders the lists it is given in place, so they are fresh here.
        data = _decoder(k, n).decode([views[i] for i in present], list(present))
    out.update((i, data[i]) for i in missing if i < k)
    parity = [i for i in missing if i >= k]
    if parity:
        out.update(zip(parity, _encoder(k, n).encode(list(data), parity)))
    return out


def decode(shards: Mapping[int, Buffer], k: int, n: int, stripe_length: int) -> bytes:
    """Rebuild a stripe of ``stripe_length`` bytes from its shard payloads.

    ``shards`` maps shard index (0..n-1) to payload. If the data shards
    that cover the stripe are all present they are only concatenated;
    otherwise any k shards are decoded (data shards and then the lowest
    parity indices are preferred). The payloads are assumed verified: a
    wrong payload gives wrong bytes, not an error.

    Raises ValueError on a bad index or payload length, a stripe_length
    outside 1..MAX_STRIPE_LENGTH, or fewer than k shards when decoding is
    needed.
    """
    _check_kn(k, n)
    if not isinstance(stripe_length, int) or not 0 < stripe_length <= MAX_STRIPE_LENGTH:
        raise ValueError(f"stripe length {stripe_length!r} is outside 1..{MAX_STRIPE_LENGTH}")
    size = shard_length(stripe_length, k)
    views: dict[int, memoryview] = {}
    for i, payload in shards.items():
        if not isinstance(i, int) or not 0 <= i < n:
            raise ValueError(f"shard index {i!r} is outside 0..{n - 1}")
        mv = _bytes_view(payload)
        if len(mv) != size:
            raise ValueError(f"shard {i} has {len(mv)} bytes, expected {size}")
        views[i] = mv
    needed = shard_length(stripe_length, size)  # data shards holding real bytes
    if all(i in views for i in range(needed)):
        data = [views[i] for i in range(needed)]
    else:
        if len(views) < k:
            raise ValueError(f"{len(views)} shards cannot rebuild a stripe that needs k={k}")
        if _gf is not None:
            found = rebuild(views, k, n, range(needed))
            data = [found[i] for i in range(needed)]
        else:
            present = list(_pick(views, k, n))
            # zfec reorders the lists it is given in place, so they are fresh here.
            data = _decoder(k, n).decode([views[i] for i in present], list(present))[:needed]
    tail = stripe_length - (needed - 1) * size
    if tail != size:
        data[-1] = memoryview(data[-1])[:tail]
    return b"".join(data)


# ---------------------------------------------------------------- header

def _is_int(v: object) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


@dataclass(frozen=True, kw_only=True)
class ShardHeader:
    """What a shard file says about itself. Validates itself when built.

    Raises ValueError if any field is of the wrong type or out of range:
    ids are 32 lowercase hex digits; 1 <= k <= n <= 255; 0 <= shard_index
    < n; 0 <= stripe_index and 1 <= stripe_version (both < 2**63);
    0 < stripe_length <= 1 GiB; payload_length == shard_length(stripe_length,
    k); payload_checksum is 32 bytes; format_version == 1.
    """

    pool_id: PoolId
    file_id: FileId
    stripe_index: int
    stripe_version: int
    shard_index: int
    k: int
    n: int
    stripe_length: int
    payload_length: int
    payload_checksum: bytes
    format_version: int = FORMAT_VERSION

    def __post_init__(self) -> None:
        problem = self._problem()
        if problem:
            raise ValueError(f"shard header: {problem}")

    def _problem(self) -> str | None:
        for name in ("pool_id", "file_id"):
            v = getattr(self, name)
            if not isinstance(v, str) or not _HEX_ID.fullmatch(v):
                return f"{name} {v!r} is not 32 lowercase hex digits"
        for f in fields(self):
            if f.name not in ("pool_id", "file_id", "payload_checksum") and not _is_int(getattr(self, f.name)):
                return f"{f.name} {getattr(self, f.name)!r} is not an int"
        if self.format_version != FORMAT_VERSION:
            return f"format version {self.format_version} is not {FORMAT_VERSION}"
        if not 1 <= self.k <= self.n <= MAX_N:
            return f"k={self.k}, n={self.n} outside 1 <= k <= n <= {MAX_N}"
        if not 0 <= self.shard_index < self.n:
            return f"shard index {self.shard_index} outside 0..{self.n - 1}"
        if not 0 <= self.stripe_index <= _INT63:
            return f"stripe index {self.stripe_index} outside 0..2**63-1"
        if not 1 <= self.stripe_version <= _INT63:
            return f"stripe version {self.stripe_version} outside 1..2**63-1"
        if not 0 < self.stripe_length <= MAX_STRIPE_LENGTH:
            return f"stripe length {self.stripe_length} outside 1..{MAX_STRIPE_LENGTH}"
        if self.payload_length != shard_length(self.stripe_length, self.k):
            return (f"payload length {self.payload_length} does not match stripe length "
                    f"{self.stripe_length} at k={self.k}")
        if not isinstance(self.payload_checksum, bytes) or len(self.payload_checksum) != 32:
            return "payload checksum is not 32 bytes"
        return None


def make_header(*, pool_id: PoolId, file_id: FileId, stripe_index: int, stripe_version: int,
                shard_index: int, k: int, n: int, stripe_length: int, payload: Buffer) -> ShardHeader:
    """A header for ``payload``, with its length and checksum filled in.

    Raises ValueError like ShardHeader.
    """
    return ShardHeader(
        pool_id=pool_id, file_id=file_id, stripe_index=stripe_index, stripe_version=stripe_version,
        shard_index=shard_index, k=k, n=n, stripe_length=stripe_length,
        payload_length=memoryview(payload).nbytes, payload_checksum=checksum(payload),
    )


# Short msgpack keys; the order is the order in which pack writes them.
_KEYS = {
    "v": "format_version",
    "p": "pool_id",
    "f": "file_id",
    "s": "stripe_index",
    "g": "stripe_version",
    "i": "shard_index",
    "k": "k",
    "n": "n",
    "l": "stripe_length",
    "z": "payload_length",
    "c": "payload_checksum",
}
_TYPES = {"p": str, "f": str, "c": bytes}  # every other field is an int

# Bounds for hostile msgpack: nothing in a header needs more than these.
_UNPACK_LIMITS = dict(
    max_str_len=64, max_bin_len=64, max_array_len=0, max_map_len=len(_KEYS), max_ext_len=0,
)


def pack(header: ShardHeader, payload: Buffer) -> list[Buffer]:
    """The buffers of a shard file, in order: the header block, then payload.

    The payload is passed through as given, not copied. Raises ValueError
    if its length is not header.payload_length (the checksum is the
    caller's: see make_header).
    """
    if memoryview(payload).nbytes != header.payload_length:
        raise ValueError(f"payload has {memoryview(payload).nbytes} bytes, header says {header.payload_length}")
    body = msgpack.packb({key: getattr(header, name) for key, name in _KEYS.items()}, use_bin_type=True)
    head = _PREFIX.pack(MAGIC, len(body)) + body + blake3.blake3(body).digest(length=_HEADER_SUM_LENGTH)
    return [head, payload]


def _pairs(pairs: list) -> list:
    return pairs  # keep duplicates visible instead of letting the last one win


def _decode_fields(body: memoryview) -> ShardHeader:
    try:
        pairs = msgpack.unpackb(body, raw=False, strict_map_key=True, object_pairs_hook=_pairs,
                                use_list=True, **_UNPACK_LIMITS)
    except Exception as e:  # hostile bytes can raise many types; all mean corrupt
        raise ShardCorrupt(f"header is not valid msgpack: {type(e).__name__}: {e}") from None
    if not isinstance(pairs, list) or not all(isinstance(p, tuple) and len(p) == 2 for p in pairs):
        raise ShardCorrupt("header is not a msgpack map")
    values: dict[str, object] = {}
    for key, value in pairs:
        if key not in _KEYS:
            raise ShardCorrupt(f"header has unknown key {key!r}")
        if key in values:
            raise ShardCorrupt(f"header repeats key {key!r}")
        want = _TYPES.get(key)
        ok = isinstance(value, want) if want else _is_int(value)
        if not ok:
            raise ShardCorrupt(f"header field {_KEYS[key]} has type {type(value).__name__}")
        values[key] = value
    missing = [_KEYS[k] for k in _KEYS if k not in values]
    if missing:
        raise ShardCorrupt(f"header lacks {', '.join(missing)}")
    try:
        return ShardHeader(**{_KEYS[k]: v for k, v in values.items()})
    except ValueError as e:
        raise ShardCorrupt(str(e)) from None


def parse_header(prefix: Buffer) -> tuple[ShardHeader, int]:
    """Read the header from the start of a shard file; the payload is not checked.

    ``prefix`` may be the whole file or its first bytes; MAX_HEADER_SIZE
    bytes always suffice. Returns the header and the header's size in
    bytes (the payload's offset). Raises ShardCorrupt if the prefix is too
    short, the magic or checksum is wrong, or a field is bad.
    """
    mv = _bytes_view(prefix)
    if len(mv) < _PREFIX.size:
        raise ShardCorrupt(f"truncated: {len(mv)} bytes, shorter than the {_PREFIX.size}-byte prefix")
    magic, length = _PREFIX.unpack_from(mv)
    if magic != MAGIC:
        raise ShardCorrupt(f"bad magic {bytes(magic)!r}, expected {MAGIC!r}")
    if not 0 < length <= MAX_HEADER_LENGTH:
        raise ShardCorrupt(f"header length {length} outside 1..{MAX_HEADER_LENGTH}")
    end = _PREFIX.size + length
    size = end + _HEADER_SUM_LENGTH
    if len(mv) < size:
        raise ShardCorrupt(f"truncated: {len(mv)} bytes, header needs {size}")
    body = mv[_PREFIX.size:end]
    if blake3.blake3(body).digest(length=_HEADER_SUM_LENGTH) != mv[end:size]:
        raise ShardCorrupt("header checksum mismatch")
    return _decode_fields(body), size


def parse(blob: Buffer, *, pool_id: PoolId | None = None) -> tuple[ShardHeader, memoryview]:
    """Check a whole shard file and return its header and payload.

    Verifies the magic, the bounded header length, the header checksum,
    every field, that the payload has exactly payload_length bytes (the
    rest of the blob), the payload checksum and, if given, the pool id.
    The payload is a read-only memoryview into ``blob``. Raises
    ShardCorrupt with the reason on any failure (TypeError only if blob
    is not a bytes-like object).
    """
    header, size = parse_header(blob)
    payload = _bytes_view(blob)[size:]
    if len(payload) != header.payload_length:
        raise ShardCorrupt(f"payload has {len(payload)} bytes, header says {header.payload_length}")
    if pool_id is not None and header.pool_id != pool_id:  # before hashing: cheap and decisive
        raise ShardCorrupt(f"shard belongs to pool {header.pool_id}, not {pool_id}")
    if checksum(payload) != header.payload_checksum:
        raise ShardCorrupt("payload checksum mismatch")
    return header, payload


def verify(header: ShardHeader, payload: Buffer) -> bool:
    """True if payload has the header's length and checksum."""
    return memoryview(payload).nbytes == header.payload_length and checksum(payload) == header.payload_checksum

"""Tests for gateway.codec: coding, checksums, the shard file format.

Outside references used here:
- BLAKE3 test vectors: test_vectors/test_vectors.json in the BLAKE3 team's
  reference repository (github.com/BLAKE3-team/BLAKE3).
- Reed-Solomon as polynomial evaluation (Reed and Solomon, "Polynomial codes
  over certain finite fields", 1960; common practice), with the evaluation
  points 0, 1, a, a^2, ... and the field polynomial x^8+x^4+x^3+x^2+1 of the
  Vandermonde construction in Rizzo, "Effective erasure codes for reliable
  computer communication protocols", ACM CCR 1997 (from memory; zfec's
  fec.c names the same polynomial).
"""
from __future__ import annotations

import itertools
import os
import struct
import threading

import blake3
import msgpack
import random

import pytest
import zfec
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from gateway import codec
from gateway.codec import ShardHeader
from gateway.errors import ShardCorrupt

FAST = settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
POOL = "0123456789abcdef0123456789abcdef"
FILE = "fedcba9876543210fedcba9876543210"


# ---------------------------------------------------------------- checksum

# Source: BLAKE3-team/BLAKE3, test_vectors/test_vectors.json, field "hash",
# first 32 bytes (the default output length). Input: bytes i % 251.
BLAKE3_VECTORS = [
    (0, "af1349b9f5f9a1a6a0404dea36dcc9499bcb25c9adc112b7cc9a93cae41f3262"),
    (1, "2d3adedff11b61f14c886e35afa036736dcd87a74d27b5c1510225d0f592e213"),
    (1023, "10108970eeda3eb932baac1428c7a2163b0e924c9a9e25b35bba72b28f70bd11"),
    (1024, "42214739f095a406f3fc83deb889744ac00df831c10daa55189b5d121c855af7"),
    (1025, "d00278ae47eb27b34faecf67b4fe263f82d5412916c1ffd97c8cb7fb814b8444"),
    (2049, "5f4d72f40d7a5f82b15ca2b2e44b1de3c2ef86c426c95c1af0b6879522563030"),
    (4097, "9b4052b38f1c5fc8b1f9ff7ac7b27cd242487b3d890d15c96a1c25b8aa0fb995"),
    (7169, "a003fc7a51754a9b3c7fae0367ab3d782dccf28855a03d435f8cfe74605e7817"),
]


@pytest.mark.parametrize(("length", "expected"), BLAKE3_VECTORS)
def test_checksum_matches_blake3_published_vectors(length, expected):
    data = bytes(i % 251 for i in range(length))
    assert codec.checksum(data).hex() == expected
    # The same digest for every buffer type the pool hands in.
    assert codec.checksum(memoryview(bytearray(data))).hex() == expected


# ---------------------------------------------------------------- coding

# (k, n) layouts: edge cases (k == n, k == 1) and common ones.
LAYOUTS = [(1, 1), (1, 3), (2, 2), (2, 3), (3, 5), (4, 6), (5, 9), (6, 6), (8, 12), (10, 14)]


def _split(data: bytes, k: int) -> list[bytes]:
    """The data shards, computed here independently of codec: pad, then cut."""
    size = -(-len(data) // k)
    padded = data + bytes(size * k - len(data))
    return [padded[i * size:(i + 1) * size] for i in range(k)]


@pytest.mark.parametrize(("k", "n"), LAYOUTS)
@FAST
@given(data=st.binary(min_size=1, max_size=97))
def test_every_k_subset_rebuilds_the_stripe(k, n, data):
    # Checks the MDS property of the code: every one of the C(n, k) subsets
    # of k shards decodes to the original bytes, whatever the padding.
    shards = codec.encode(data, k, n)
    assert len(shards) == n
    assert all(len(s) == codec.shard_length(len(data), k) for s in shards)
    for subset in itertools.combinations(range(n), k):
        assert codec.decode({i: shards[i] for i in subset}, k, n, len(data)) == data


@pytest.mark.parametrize(("k", "n"), LAYOUTS)
@FAST
@given(data=st.binary(min_size=1, max_size=200))
def test_data_shards_are_the_data(k, n, data):
    # Checks that the code is systematic: shards 0..k-1 are the padded data
    # cut in k, so a healthy read never needs zfec.
    shards = codec.encode(data, k, n)
    assert [bytes(s) for s in shards[:k]] == _split(data, k)


@pytest.mark.parametrize(("k", "n"), [(1, 3), (2, 4), (2, 6), (3, 6), (4, 8), (5, 10)])
def test_parity_only_subsets_rebuild_the_stripe(k, n):
    # Checks the hardest decode: no data shard at all, only parity.
    data = os.urandom(1000 * k + 3)
    shards = codec.encode(data, k, n)
    for subset in itertools.combinations(range(k, n), k):
        assert codec.decode({i: shards[i] for i in subset}, k, n, len(data)) == data


# GF(2^8) with x^8+x^4+x^3+x^2+1 (0x11d) and a = x; tables built here.
_EXP = [0] * 510
_LOG = [0] * 256
_v = 1
for _i in range(255):
    _EXP[_i] = _v
    _LOG[_v] = _i
    _v <<= 1
    if _v & 0x100:
        _v ^= 0x11D
for _i in range(255, 510):
    _EXP[_i] = _EXP[_i - 255]


def _mul(a: int, b: int) -> int:
    return 0 if a == 0 or b == 0 else _EXP[_LOG[a] + _LOG[b]]


def _div(a: int, b: int) -> int:
    return 0 if a == 0 else _EXP[_LOG[a] - _LOG[b] + 255]


def _interpolate(xs: list[int], ys: list[int], x: int) -> int:
    """Lagrange: the value at x of the polynomial of degree < len(xs) through (xs, ys)."""
    total = 0
    for j, (xj, yj) in enumerate(zip(xs, ys)):
        term = yj
        for m, xm in enumerate(xs):
            if m != j:
                term = _mul(term, _div(x ^ xm, xj ^ xm))  # subtraction is XOR
        total ^= term
    return total


@pytest.mark.parametrize(("k", "n"), [(1, 3), (2, 3), (3, 5), (4, 6), (5, 9)])
def test_parity_is_reed_solomon_polynomial_evaluation(k, n):
    # Checks the code against the textbook definition, computed without zfec:
    # shard i holds P(x_i) for the one polynomial P of degree < k that takes
    # the data values at x_0..x_{k-1}; points x_0 = 0, x_i = a^(i-1). This
    # also pins the on-disk meaning of parity shards to a fixed code.
    data = os.urandom(7 * k)
    shards = codec.encode(data, k, n)
    points = [0] + [_EXP[i] for i in range(n - 1)]
    for b in range(len(shards[0])):
        ys = [shards[i][b] for i in range(k)]
        for j in range(k, n):
            assert shards[j][b] == _interpolate(points[:k], ys, points[j])


@pytest.mark.parametrize(("k", "n"), [(1, 3), (2, 3), (3, 5), (4, 6), (5, 9)])
def test_rebuilt_shards_match_reed_solomon_polynomial_evaluation(k, n):
    # Checks repair's regeneration against the textbook definition above,
    # without zfec: from every subset of k shards, each missing shard i is
    # P(x_i) of the polynomial through the given shards' points.
    data = os.urandom(5 * k)
    shards = codec.encode(data, k, n)
    points = [0] + [_EXP[i] for i in range(n - 1)]
    for subset in itertools.combinations(range(n), k):
        missing = [i for i in range(n) if i not in subset]
        got = codec.rebuild({i: shards[i] for i in subset}, k, n, missing)
        assert sorted(got) == missing
        for i in missing:
            expect = bytes(_interpolate([points[j] for j in subset], [shards[j][b] for j in subset], points[i])
                           for b in range(len(shards[0])))
            assert bytes(got[i]) == expect


@pytest.mark.parametrize(("k", "n"), LAYOUTS)
@FAST
@given(data=st.binary(min_size=1, max_size=97), pick=st.randoms(use_true_random=False))
def test_rebuild_gives_the_encoded_shards_from_any_k(k, n, data, pick):
    # Any k shards (and sometimes more) regenerate any wanted set byte for
    # byte as encode made it: the property repair relies on to put a shard
    # back under its old name.
    shards = [bytes(s) for s in codec.encode(data, k, n)]
    given_ = pick.sample(range(n), pick.randint(k, n))
    wanted = pick.sample(range(n), pick.randint(1, n))
    got = codec.rebuild({i: shards[i] for i in given_}, k, n, wanted)
    assert {i: bytes(v) for i, v in got.items()} == {i: shards[i] for i in wanted}


def test_rebuild_rejects_bad_arguments():
    s = codec.encode(os.urandom(100), 4, 6)
    with pytest.raises(ValueError, match="needs k=4"):
        codec.rebuild({1: s[1], 4: s[4], 5: s[5]}, 4, 6, [0])
    with pytest.raises(ValueError, match="outside"):
        codec.rebuild({i: s[i] for i in range(4)}, 4, 6, [6])
    with pytest.raises(ValueError, match="one non-zero length"):
        codec.rebuild({0: s[0], 1: s[1], 2: s[2], 3: bytes(s[3])[:-1]}, 4, 6, [4])


BACKENDS = ([f"gf-{name}" for name in codec._gf.kernels()] if codec._gf else []) + ["zfec"]


@pytest.fixture(params=BACKENDS)
def backend(request, monkeypatch):
    """Each way the codec can compute: every gateway._gf kernel this CPU
    runs, and the zfec fallback used when the extension is missing."""
    if request.param == "zfec":
        monkeypatch.setattr(codec, "_gf", None)
    else:
        before = codec._gf.kernel()
        codec._gf.set_kernel(request.param[3:])
        request.addfinalizer(lambda: codec._gf.set_kernel(before))
    return request.param


@pytest.mark.parametrize(("k", "n"), [(1, 2), (2, 3), (3, 5), (4, 6), (5, 9), (10, 14), (17, 20), (20, 255)])
@pytest.mark.parametrize("size", [1, 15, 16, 17, 31, 33, 1000, 16384 + 7])
def test_every_backend_codes_the_bytes_zfec_codes(backend, k, n, size):
    # Checks against zfec 1.6 called directly (an independent implementation
    # of this code, and the library Shoal's first shards were written with):
    # parity, single-shard rebuilds and degraded decodes are byte-identical,
    # at lengths around the SIMD widths (16 and 32 bytes) and the C module's
    # 16 KiB block.
    rnd = random.Random(k * 1000 + n + size)
    data = rnd.randbytes(size * k)
    pieces = [data[i * size:(i + 1) * size] for i in range(k)]
    expect = pieces + list(zfec.Encoder(k, n).encode(pieces, list(range(k, n))))
    shards = codec.encode(data, k, n)
    assert [bytes(s) for s in shards] == [bytes(e) for e in expect]
    for _ in range(3):
        given_ = rnd.sample(range(n), k)
        wanted = rnd.sample([i for i in range(n) if i not in given_], min(3, n - k)) or [given_[0]]
        got = codec.rebuild({i: expect[i] for i in given_}, k, n, wanted)
        assert {i: bytes(v) for i, v in got.items()} == {i: bytes(expect[i]) for i in wanted}
        assert codec.decode({i: expect[i] for i in given_}, k, n, len(data)) == data


@pytest.mark.skipif(codec._gf is None, reason="gateway._gf is not built")
def test_combine_refuses_bad_buffers():
    gf = codec._gf
    with pytest.raises(ValueError, match="not a multiple"):
        gf.combine([b"x" * 8, b"y" * 8], b"\x01")
    with pytest.raises(ValueError, match="differ in length"):
        gf.combine([b"x" * 8, b"y" * 9], b"\x01\x01")
    with pytest.raises(TypeError):
        gf.combine([b"x" * 8, "text"], b"\x01\x01")
    with pytest.raises(ValueError, match="not available"):
        gf.set_kernel("no-such-kernel")
    # Coefficient 0 gives zeros, 1 the input, 2 doubles it (x * x = x^2 = 4, with 0x11d's wrap at 0x80).
    assert gf.combine([b"\x01\x02\x80" * 3], b"\x00\x01\x02") == [bytes(9), b"\x01\x02\x80" * 3, b"\x02\x04\x1d" * 3]
    assert gf.combine([b"", b""], b"\x01\x01") == [b""]


def test_encode_shares_full_data_shards_with_the_input():
    # Checks the no-copy contract: full data shards are views of the input.
    data = bytearray(os.urandom(4096))
    shards = codec.encode(data, 4, 6)
    assert all(isinstance(s, memoryview) and s.obj is data and s.readonly for s in shards[:4])
    assert all(isinstance(s, bytes) for s in shards[4:])


def test_encode_pads_only_the_tail():
    # 5 bytes at k=4: shard length 2; shard 2 holds 1 byte + padding; shard 3 is all padding.
    shards = codec.encode(b"abcde", 4, 6)
    assert [bytes(s) for s in shards[:4]] == [b"ab", b"cd", b"e\x00", b"\x00\x00"]
    assert codec.decode({0: shards[0], 1: shards[1], 2: shards[2]}, 4, 6, 5) == b"abcde"


@pytest.mark.parametrize("kind", [bytes, bytearray, memoryview])
def test_buffer_types(kind):
    data = os.urandom(1001)
    shards = codec.encode(kind(data), 4, 6)
    assert codec.decode({i: kind(bytes(shards[i])) for i in (1, 3, 4, 5)}, 4, 6, 1001) == data


def test_decode_does_not_disturb_the_callers_shards():
    data = os.urandom(999)
    shards = codec.encode(data, 3, 5)
    given_ = {4: shards[4], 0: shards[0], 3: shards[3]}
    before = dict(given_)
    assert codec.decode(given_, 3, 5, 999) == data
    assert given_ == before


def test_encode_rejects_bad_arguments():
    with pytest.raises(ValueError):
        codec.encode(b"", 4, 6)
    for k, n in [(0, 3), (4, 3), (1, 256), (True, 2)]:
        with pytest.raises(ValueError):
            codec.encode(b"abc", k, n)


def test_decode_rejects_bad_arguments():
    data = os.urandom(100)
    s = codec.encode(data, 4, 6)
    with pytest.raises(ValueError, match="k=4"):
        codec.decode({1: s[1], 4: s[4], 5: s[5]}, 4, 6, 100)  # 3 of 4 needed
    with pytest.raises(ValueError, match="index"):
        codec.decode({0: s[0], 1: s[1], 2: s[2], 6: s[5]}, 4, 6, 100)
    with pytest.raises(ValueError, match="bytes"):
        codec.decode({0: s[0], 1: s[1], 2: s[2], 3: bytes(s[3])[:-1]}, 4, 6, 100)
    with pytest.raises(ValueError):
        codec.decode({i: s[i] for i in range(4)}, 4, 6, 0)


def test_encode_and_decode_from_many_threads():
    # The pool codes from several worker threads at once with the shared
    # cached zfec objects; every thread must get the single-threaded answer.
    k, n = 5, 9
    stripes = [os.urandom(50_000 + i) for i in range(8)]
    expected = [[bytes(s) for s in codec.encode(d, k, n)] for d in stripes]
    failures: list[str] = []

    def work(t: int) -> None:
        for r in range(20):
            i = (t + r) % len(stripes)
            shards = codec.encode(stripes[i], k, n)
            if [bytes(s) for s in shards] != expected[i]:
                failures.append(f"encode {i}")
            subset = [(t + r + j) % n for j in range(k)]
            if codec.decode({j: shards[j] for j in subset}, k, n, len(stripes[i])) != stripes[i]:
                failures.append(f"decode {i} {subset}")

    threads = [threading.Thread(target=work, args=(t,)) for t in range(6)]
    for th in threads:
        th.start()
    for th in threads:
        th.join()
    assert failures == []


# ---------------------------------------------------------------- header

def _header(**over) -> ShardHeader:
    fields = dict(pool_id=POOL, file_id=FILE, stripe_index=7, stripe_version=3, shard_index=2,
                  k=4, n=6, stripe_length=1000, payload_length=250, payload_checksum=bytes(32))
    fields.update(over)
    return ShardHeader(**fields)


def _shard(payload: bytes = b"p" * 250, **over) -> bytes:
    """A valid shard file for payload (stripe_length 1000 at k=4 by default)."""
    h = _header(payload_checksum=codec.checksum(payload), payload_length=len(payload), **over)
    return b"".join(codec.pack(h, payload))


def _forge(body: bytes, payload: bytes = b"", *, length: int | None = None) -> bytes:
    """A shard with an arbitrary msgpack body and a correct header checksum."""
    n = len(body) if length is None else length
    return codec.MAGIC + struct.pack(">I", n) + body + blake3.blake3(body).digest(length=16) + payload


def _fields_map(h: ShardHeader) -> dict:
    return {"v": h.format_version, "p": h.pool_id, "f": h.file_id, "s": h.stripe_index,
            "g": h.stripe_version, "i": h.shard_index, "k": h.k, "n": h.n, "l": h.stripe_length,
            "z": h.payload_length, "c": h.payload_checksum}


headers = st.builds(
    lambda pool, file, si, sv, k, extra, idx, length: dict(
        pool_id=pool, file_id=file, stripe_index=si, stripe_version=sv, k=k, n=k + extra,
        shard_index=idx % (k + extra), stripe_length=length,
    ),
    st.text("0123456789abcdef", min_size=32, max_size=32),
    st.text("0123456789abcdef", min_size=32, max_size=32),
    st.integers(0, 2**63 - 1), st.integers(1, 2**63 - 1),
    st.integers(1, 200), st.integers(0, 55), st.integers(0, 254), st.integers(1, 3000),
)


@FAST
@given(fields=headers, seed=st.binary(min_size=1, max_size=8))
def test_header_round_trip(fields, seed):
    payload = (seed * 3000)[: codec.shard_length(fields["stripe_length"], fields["k"])]
    h = codec.make_header(payload=payload, **fields)
    bufs = codec.pack(h, payload)
    assert bufs[-1] is payload  # the payload is passed through, not copied
    blob = b"".join(bufs)
    got, view = codec.parse(blob, pool_id=fields["pool_id"])
    assert got == h and bytes(view) == payload
    assert codec.parse_header(blob[: codec.MAX_HEADER_SIZE]) == (h, len(bufs[0]))
    assert codec.verify(got, view)
    assert not codec.verify(got, bytes(len(payload)) if payload != bytes(len(payload)) else b"x" * len(payload))


def test_header_checksum_is_blake3_of_the_msgpack_bytes():
    blob = _shard()
    (length,) = struct.unpack(">I", blob[8:12])
    body = blob[12:12 + length]
    assert msgpack.unpackb(body) == _fields_map(codec.parse(blob)[0])
    assert blob[12 + length:28 + length] == codec.checksum(body)[:16]


@pytest.mark.parametrize(("field", "value"), [
    ("pool_id", "0123456789ABCDEF0123456789ABCDEF"), ("pool_id", "0" * 31), ("file_id", 5),
    ("k", 0), ("k", 7), ("n", 256), ("k", True), ("shard_index", 6), ("shard_index", -1),
    ("stripe_index", -1), ("stripe_index", 2**63), ("stripe_version", 0), ("stripe_length", 0),
    ("stripe_length", (1 << 30) + 1), ("payload_length", 251), ("payload_checksum", bytes(31)),
    ("payload_checksum", bytearray(32)), ("format_version", 2), ("stripe_length", 1000.0),
])
def test_header_validates_itself(field, value):
    with pytest.raises(ValueError):
        _header(**{field: value})


def test_header_is_frozen():
    with pytest.raises(AttributeError):
        _header().k = 5  # type: ignore[misc]


def test_pack_refuses_a_payload_of_the_wrong_length():
    with pytest.raises(ValueError):
        codec.pack(_header(), b"x" * 249)


# ---------------------------------------------------------------- parse: bad shards

def test_every_truncation_is_corrupt():
    blob = _shard(b"q" * 25, stripe_length=100)
    for cut in range(len(blob)):
        with pytest.raises(ShardCorrupt):
            codec.parse(blob[:cut])


def test_every_bit_flip_is_corrupt():
    # One flipped bit anywhere (magic, length, msgpack, header sum, payload)
    # must be caught by one of the checks.
    blob = bytearray(_shard(b"r" * 10, stripe_length=40))
    for bit in range(len(blob) * 8):
        blob[bit // 8] ^= 1 << (bit % 8)
        with pytest.raises(ShardCorrupt):
            codec.parse(bytes(blob))
        blob[bit // 8] ^= 1 << (bit % 8)
    codec.parse(bytes(blob))  # restored


def test_trailing_bytes_are_corrupt():
    with pytest.raises(ShardCorrupt, match="payload has"):
        codec.parse(_shard() + b"\x00")


def test_foreign_pool_is_rejected():
    blob = _shard()
    with pytest.raises(ShardCorrupt, match="pool"):
        codec.parse(blob, pool_id="f" * 32)
    assert codec.parse(blob, pool_id=POOL)[0].pool_id == POOL


def test_payload_checksum_mismatch():
    h = _header(payload_checksum=codec.checksum(b"a" * 250))
    blob = b"".join(codec.pack(h, b"b" * 250))
    with pytest.raises(ShardCorrupt, match="payload checksum"):
        codec.parse(blob)
    # parse_header does not look at the payload; scans use it.
    assert codec.parse_header(blob)[0] == h


def _valid_map() -> dict:
    return _fields_map(_header(payload_checksum=codec.checksum(b"p" * 250)))


def _with(**over) -> dict:
    m = _valid_map()
    for key, value in over.items():
        if value is _DROP:
            del m[key]
        else:
            m[key] = value
    return m


_DROP = object()

def _renamed(old: str, new: str) -> dict:
    """The valid map with one key renamed, keeping the same number of entries."""
    return {(new if key == old else key): value for key, value in _valid_map().items()}


def _dup_key_body() -> bytes:
    # Eleven entries, "k" twice and no "n"; msgpack alone would keep the last "k".
    pairs = [(key, value) for key, value in _valid_map().items() if key != "n"] + [("k", 4)]
    out = bytes([0x80 | len(pairs)])
    for key, value in pairs:
        out += msgpack.packb(key) + msgpack.packb(value, use_bin_type=True)
    return out


# name: (msgpack body, the reason parse must give)
HOSTILE_BODIES = {
    "not a map": (msgpack.packb([1, 2, 3]), "max_array_len"),
    "an int": (msgpack.packb(5), "not a msgpack map"),
    "unknown key": (msgpack.packb(_renamed("g", "x")), "unknown key 'x'"),
    "one key too many": (msgpack.packb(_with(x=1)), "max_map_len"),
    "duplicate key": (_dup_key_body(), "repeats key 'k'"),
    "missing key": (msgpack.packb(_with(c=_DROP)), "lacks payload_checksum"),
    "bool for int": (msgpack.packb(_with(k=True)), "k has type bool"),
    "float for int": (msgpack.packb(_with(s=7.0)), "stripe_index has type float"),
    "str for int": (msgpack.packb(_with(n="6")), "n has type str"),
    "bin for str": (msgpack.packb(_with(p=POOL.encode()), use_bin_type=True), "pool_id has type bytes"),
    "str for bin": (msgpack.packb(_with(c="x" * 32), use_bin_type=True), "payload_checksum has type str"),
    "nested map": (msgpack.packb(_with(f={"a": 1})), "file_id has type"),
    "nested list": (msgpack.packb(_with(s=[[[1]]])), "max_array_len"),
    "ext type": (msgpack.packb(_with(s=msgpack.ExtType(5, b"abc"))), "max_ext_len"),
    "nil value": (msgpack.packb(_with(v=None)), "format_version has type NoneType"),
    "int key": (msgpack.packb({1: 2}), "map key"),
    "long str": (msgpack.packb(_with(p="a" * 65)), "max_str_len"),
    "long bin": (msgpack.packb(_with(c=bytes(65)), use_bin_type=True), "max_bin_len"),
    "negative int": (msgpack.packb(_with(i=-3)), "shard index -3"),
    "huge int": (msgpack.packb(_with(s=2**64 - 1)), "stripe index"),
    "payload length off": (msgpack.packb(_with(z=249)), "payload length 249"),
    "version 2": (msgpack.packb(_with(v=2)), "format version 2"),
    "upper-case id": (msgpack.packb(_with(f=FILE.upper())), "file_id"),
    # Length prefixes that promise far more than is there.
    "str32 of 4 GiB": (b"\x81\xa1p\xdb\xff\xff\xff\xff" + b"a" * 32, "not valid msgpack"),
    "bin32 of 4 GiB": (b"\x81\xa1c\xc6\xff\xff\xff\xff" + b"a" * 32, "not valid msgpack"),
    "array32 of 4 G": (b"\x81\xa1s\xdd\xff\xff\xff\xff", "max_array_len"),
    "map32 of 4 G": (b"\xdf\xff\xff\xff\xff", "max_map_len"),
    "deep nesting": (b"\x91" * 3000 + b"\x00", "not valid msgpack"),
    "deep maps": (b"\x81\xa1a" * 1300 + b"\x00", "not valid msgpack|has type|unknown key"),
    "reserved byte": (b"\xc1", "not valid msgpack"),
    "extra data": (msgpack.packb(_valid_map()) + b"\x00", "not valid msgpack"),
    "truncated map": (msgpack.packb(_valid_map())[:-5], "not valid msgpack"),
}


@pytest.mark.parametrize("name", sorted(HOSTILE_BODIES))
def test_hostile_msgpack_is_corrupt(name):
    # The header checksum is right, so only the field checks stand between
    # these bodies and the pool; each must be stopped by the check named.
    body, reason = HOSTILE_BODIES[name]
    with pytest.raises(ShardCorrupt, match=reason):
        codec.parse(_forge(body, b"p" * 250))


def test_forged_valid_body_parses():
    # The forging helper is right: an honest body passes, so the failures
    # above come from the body, not from the helper.
    h, _ = codec.parse(_forge(msgpack.packb(_valid_map()), b"p" * 250))
    assert h.stripe_index == 7


@pytest.mark.parametrize("length", [0, codec.MAX_HEADER_LENGTH + 1, 2**32 - 1])
def test_header_length_is_bounded(length):
    body = msgpack.packb(_valid_map())
    with pytest.raises(ShardCorrupt, match="header length|truncated"):
        codec.parse(_forge(body, b"p" * 250, length=length))


def test_bad_magic():
    blob = _shard()
    with pytest.raises(ShardCorrupt, match="magic"):
        codec.parse(b"SHOALSH2" + blob[8:])


# ---------------------------------------------------------------- parse: fuzz

@settings(max_examples=300, deadline=None)
@given(blob=st.binary(max_size=400))
def test_fuzz_random_blobs(blob):
    with pytest.raises(ShardCorrupt):
        codec.parse(blob)
    with pytest.raises(ShardCorrupt):
        codec.parse(codec.MAGIC + blob)


@settings(max_examples=300, deadline=None)
@given(data=st.data())
def test_fuzz_mutated_shards(data):
    # Random overwrites, insertions and deletions anywhere in a valid shard.
    blob = bytearray(_shard(b"s" * 10, stripe_length=40))
    for _ in range(data.draw(st.integers(1, 4))):
        at = data.draw(st.integers(0, len(blob) - 1))
        op = data.draw(st.sampled_from(["set", "insert", "delete"]))
        if op == "set":
            blob[at] = data.draw(st.integers(0, 255))
        elif op == "insert":
            blob[at:at] = data.draw(st.binary(min_size=1, max_size=5))
        else:
            del blob[at:at + data.draw(st.integers(1, 5))]
    original = _shard(b"s" * 10, stripe_length=40)
    if bytes(blob) == original:
        return
    with pytest.raises(ShardCorrupt):
        codec.parse(bytes(blob))


@settings(max_examples=300, deadline=None)
@given(data=st.data())
def test_fuzz_resigned_headers(data):
    # Mutate the msgpack body and fix the header checksum, so the parser
    # must rely on its field checks. Any outcome but ShardCorrupt or a
    # fully valid header is a bug.
    body = bytearray(msgpack.packb(_fields_map(_header(
        payload_checksum=codec.checksum(b"t" * 10), payload_length=10, stripe_length=40)), use_bin_type=True))
    for _ in range(data.draw(st.integers(1, 3))):
        at = data.draw(st.integers(0, len(body) - 1))
        if data.draw(st.booleans()):
            body[at] = data.draw(st.integers(0, 255))
        else:
            body[at:at] = data.draw(st.binary(min_size=1, max_size=9))
    try:
        h, payload = codec.parse(_forge(bytes(body), b"t" * 10))
    except ShardCorrupt:
        return
    assert isinstance(h, ShardHeader) and codec.verify(h, payload)


@pytest.mark.parametrize("k, n", [(1, 3), (4, 6), (5, 9), (6, 6)])
def test_encode_pieces_matches_encode(k, n):
    """Data already cut into k shard-sized pieces codes to the same shards."""
    rng = random.Random(k * 100 + n)
    size = 4096 + k
    pieces = [rng.randbytes(size) for _ in range(k)]
    whole = b"".join(pieces)
    assert [bytes(p) for p in codec.encode_pieces(pieces, k, n)] == [bytes(p) for p in codec.encode(whole, k, n)]
    with pytest.raises(ValueError):
        codec.encode_pieces(pieces + [pieces[0]], k, n)  # k + 1 pieces
    if k > 1:
        with pytest.raises(ValueError):
            codec.encode_pieces(pieces[:-1] + [pieces[-1][:-1]], k, n)  # unequal lengths

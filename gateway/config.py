"""Pool configuration: TOML in, frozen dataclasses out, validated once.

Every error names the file, the key and what would fix it (ConfigError).
Relative paths are taken relative to the directory of the config file.
"""
from __future__ import annotations

import math
import os
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import ConfigError

KiB, MiB, GiB, TiB = 1 << 10, 1 << 20, 1 << 30, 1 << 40
_UNITS = {
    "": 1, "b": 1,
    "k": 1000, "kb": 1000, "m": 1000**2, "mb": 1000**2, "g": 1000**3, "gb": 1000**3,
    "t": 1000**4, "tb": 1000**4,
    "kib": KiB, "mib": MiB, "gib": GiB, "tib": TiB,
}
_DURATIONS = {"": 1, "s": 1, "m": 60, "min": 60, "h": 3600, "d": 86400, "w": 7 * 86400}
_SIZE_RE = re.compile(r"^\s*([0-9]+(?:\.[0-9]+)?)\s*([a-zA-Z]*)\s*$")

DEFAULT_STRIPE = 4 * MiB
DEFAULT_MEMORY_CAP = 192 * MiB  # cache + buffered + in-flight data; measured peak RSS stays near 300 MiB
DEFAULT_METRICS_LISTEN = "127.0.0.1:9851"


def parse_size(value: Any, *, what: str = "size") -> int:
    """Parse 4194304, "4MiB", "1.5 GB" into bytes. Raises ValueError."""
    if isinstance(value, bool):
        raise ValueError(f"{what} must be a number of bytes or a string like '4MiB'")
    if isinstance(value, int):
        if value < 0:
            raise ValueError(f"{what} must not be negative")
        return value
    if isinstance(value, str):
        m = _SIZE_RE.match(value)
        if m and m.group(2).lower() in _UNITS:
            return int(float(m.group(1)) * _UNITS[m.group(2).lower()])
    raise ValueError(f"{what} {value!r} is not a size: use bytes (4194304) or a string like '4MiB', '2GB'")


def parse_duration(value: Any, *, what: str = "duration") -> float:
    """Parse 30, "30s", "30m", "7d" into seconds. Raises ValueError."""
    if isinstance(value, bool):
        raise ValueError(f"{what} must be seconds or a string like '30m'")
    if isinstance(value, (int, float)):
        if value < 0:
            raise ValueError(f"{what} must not be negative")
        return float(value)
    if isinstance(value, str):
        m = _SIZE_RE.match(value)
        if m and m.group(2).lower() in _DURATIONS:
            return float(m.group(1)) * _DURATIONS[m.group(2).lower()]
    raise ValueError(f"{what} {value!r} is not a duration: use seconds (30) or a string like '30s', '30m', '7d'")


@dataclass(frozen=True, kw_only=True)
class StoreConfig:
    path: Path
    domain: str


@dataclass(frozen=True, kw_only=True)
class RepairConfig:
    rate: int = 64 * MiB  # bytes of regenerated data per second; 0 = unlimited
    grace: float = 30 * 60.0  # seconds a store may be away and still get back only what it missed


@dataclass(frozen=True, kw_only=True)
class ScrubConfig:
    interval: float = 7 * 86400.0
    rate: int = 32 * MiB  # bytes read per second; 0 = unlimited
    orphan_grace: float = 24 * 3600.0  # unknown shards younger than this are left alone


@dataclass(frozen=True, kw_only=True)
class StoreIOConfig:
    deadline: float = 10.0  # seconds per store operation before the store counts as stalled
    concurrency: int = 4  # worker threads per store
    probe_interval: float = 3.0
    probe_deadline: float = 5.0
    good_probes_to_return: int = 3


@dataclass(frozen=True, kw_only=True)
class MetricsConfig:
    listen: str | None = DEFAULT_METRICS_LISTEN  # None: no HTTP endpoint


@dataclass(frozen=True, kw_only=True)
class CatalogConfig:
    mirror_interval: float = 60.0
    mirrors_kept: int = 3


@dataclass(frozen=True, kw_only=True)
class PoolConfig:
    source: Path  # the file this came from
    name: str
    k: int
    n: int
    write_quorum: int
    stripe_size: int
    state_dir: Path
    stores: tuple[StoreConfig, ...]
    memory_cap: int = DEFAULT_MEMORY_CAP
    allow_other: bool = False
    store_io: StoreIOConfig = field(default_factory=StoreIOConfig)
    repair: RepairConfig = field(default_factory=RepairConfig)
    scrub: ScrubConfig = field(default_factory=ScrubConfig)
    metrics: MetricsConfig = field(default_factory=MetricsConfig)
    catalog: CatalogConfig = field(default_factory=CatalogConfig)

    @property
    def w(self) -> int:
        return self.write_quorum

    @property
    def domains(self) -> dict[str, int]:
        out: dict[str, int] = {}
        for s in self.stores:
            out[s.domain] = out.get(s.domain, 0) + 1
        return out

    @property
    def control_socket(self) -> Path:
        return self.state_dir / "control.sock"

    @property
    def catalog_path(self) -> Path:
        return self.state_dir / "catalog.sqlite"


def spread_cap(n: int, domain_count: int) -> int:
    """The spread rule: no domain holds more than ceil(n / domains) shards of a stripe."""
    return math.ceil(n / max(1, domain_count))


def spread_shortfall(n: int, domains: dict[str, int]) -> int:
    """How many of n shards the domains cannot hold under the spread rule (0 = fine)."""
    cap = spread_cap(n, len(domains))
    return max(0, n - sum(min(cap, c) for c in domains.values()))


class _Reader:
    """Typed access to one TOML table, with errors that name file and key."""

    def __init__(self, path: str, table: dict, prefix: str):
        self.path, self.table, self.prefix = path, table, prefix
        self.seen: set[str] = set()

    def key(self, name: str) -> str:
        return f"{self.prefix}.{name}" if self.prefix else name

    def err(self, name: str, problem: str, fix: str | None = None) -> ConfigError:
        return ConfigError(self.path, self.key(name), problem, fix)

    def get(self, name: str, kinds: tuple[type, ...], default: Any = ..., fix: str | None = None) -> Any:
        self.seen.add(name)
        if name not in self.table:
            if default is ...:
                raise self.err(name, "is required", fix)
            return default
        v = self.table[name]
        if isinstance(v, bool) and bool not in kinds:
            raise self.err(name, f"must be {' or '.join(k.__name__ for k in kinds)}, not a boolean", fix)
        if not isinstance(v, kinds):
            raise self.err(name, f"must be {' or '.join(k.__name__ for k in kinds)}, got {type(v).__name__} {v!r}", fix)
        return v

    def size(self, name: str, default: int) -> int:
        v = self.get(name, (int, str), default)
        try:
            return parse_size(v, what=self.key(name))
        except ValueError as e:
            raise self.err(name, str(e)) from None

    def duration(self, name: str, default: float) -> float:
        v = self.get(name, (int, float, str), default)
        try:
            return parse_duration(v, what=self.key(name))
        except ValueError as e:
            raise self.err(name, str(e)) from None

    def finish(self) -> None:
        unknown = sorted(set(self.table) - self.seen)
        if unknown:
            raise self.err(unknown[0], "is not a known key", f"check the spelling; known keys here: {', '.join(sorted(self.seen))}")


def _resolve(base: Path, value: str) -> Path:
    """Absolute, with symlinks resolved in the parent only: the last component
    may be a hung remote mount, and stat-ing it would block every command."""
    p = Path(os.path.expanduser(value))
    p = p if p.is_absolute() else base / p
    return Path(os.path.realpath(p.parent)) / p.name


def _inside(child: Path, parent: Path) -> bool:
    return child != parent and parent in child.parents


def load(path: str | os.PathLike) -> PoolConfig:
    """Read and validate a pool config file. Raises ConfigError."""
    p = Path(path)
    sp = str(p)
    try:
        raw = p.read_bytes()
    except FileNotFoundError:
        raise ConfigError(sp, "(file)", "does not exist", "give the path of a pool config, e.g. config/six-disks.toml") from None
    except OSError as e:
        raise ConfigError(sp, "(file)", f"cannot be read: {e.strerror}") from e
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as e:
        raise ConfigError(sp, "(syntax)", f"is not valid TOML: {e}") from None
    return from_dict(data, source=p)


def from_dict(data: dict, *, source: Path) -> PoolConfig:
    sp = str(source)
    base = source.resolve().parent
    top = _Reader(sp, data, "")
    pool_t = top.get("pool", (dict,), fix="add a [pool] table with name, k, n and state_dir")

    pr = _Reader(sp, pool_t, "pool")
    name = pr.get("name", (str,), fix='name the pool, e.g. name = "lab"')
    if not name or not re.fullmatch(r"[A-Za-z0-9._-]{1,64}", name):
        raise pr.err("name", f"{name!r} is not a usable name", "use 1-64 letters, digits, '.', '_' or '-'")
    k = pr.get("k", (int,), fix="k is the number of shards needed to read, e.g. k = 4")
    n = pr.get("n", (int,), fix="n is the number of shards written per stripe, e.g. n = 6")
    if k < 1:
        raise pr.err("k", f"is {k}; it must be at least 1")
    if n > 255:
        raise pr.err("n", f"is {n}; the code supports at most 255 shards per stripe", "lower n")
    if n < k:
        raise pr.err("n", f"is {n}, less than k = {k}", "n must be at least k: raise n or lower k")
    w = pr.get("write_quorum", (int,), min(k + 1, n))
    if not k <= w <= n:
        raise pr.err("write_quorum", f"is {w}; it must lie between k = {k} and n = {n}", f"choose a value in {k}..{n}")
    stripe = pr.size("stripe_size", DEFAULT_STRIPE)
    if stripe < 4 * KiB or stripe > 256 * MiB or stripe % 4096:
        raise pr.err("stripe_size", f"is {stripe} bytes", "use a multiple of 4KiB between 4KiB and 256MiB, e.g. '4MiB'")
    state_dir = _resolve(base, pr.get("state_dir", (str,), fix='where the catalog lives, e.g. state_dir = "/var/lib/shoal/lab"'))
    mem = pr.size("memory_cap", DEFAULT_MEMORY_CAP)
    if mem < 2 * stripe:
        raise pr.err("memory_cap", f"is {mem} bytes, less than two stripes ({2 * stripe})", "raise memory_cap or lower stripe_size")
    allow_other = pr.get("allow_other", (bool,), False)
    pr.finish()

    stores_t = top.get("store", (list,), fix="add one [[store]] table per store, each with a path")
    sections = {}
    for section in ("store_io", "repair", "scrub", "metrics", "catalog"):
        sections[section] = _Reader(sp, top.get(section, (dict,), {}), section)
    top.finish()

    stores: list[StoreConfig] = []
    for i, t in enumerate(stores_t):
        if not isinstance(t, dict):
            raise ConfigError(sp, f"store[{i}]", "must be a table", "write it as [[store]] with path = ...")
        sr = _Reader(sp, t, f"store[{i}]")
        spath = _resolve(base, sr.get("path", (str,), fix="the store's directory, e.g. path = \"/srv/disk1/shoal\""))
        dom = sr.get("domain", (str,), None)
        if dom is not None and not dom.strip():
            raise sr.err("domain", "is empty", "name the host, shelf or site, or leave the key out")
        stores.append(StoreConfig(path=spath, domain=dom if dom is not None else f"store-{i}"))
        sr.finish()

    if len(stores) < n:
        raise ConfigError(sp, "store", f"lists {len(stores)} stores, fewer than n = {n}", f"add {n - len(stores)} more [[store]] tables or lower n")
    seen: dict[Path, int] = {}
    for i, s in enumerate(stores):
        if s.path in seen:
            raise ConfigError(sp, f"store[{i}].path", f"{s.path} is already store[{seen[s.path]}]", "give every store its own directory")
        seen[s.path] = i
    for i, a in enumerate(stores):
        if a.path == state_dir or _inside(a.path, state_dir) or _inside(state_dir, a.path):
            raise ConfigError(sp, f"store[{i}].path", f"{a.path} overlaps state_dir {state_dir}", "keep the catalog's state_dir outside every store")
        for j, b in enumerate(stores):
            if i != j and _inside(a.path, b.path):
                raise ConfigError(sp, f"store[{i}].path", f"{a.path} lies inside store[{j}] {b.path}", "stores must not nest; use sibling directories")
    doms: dict[str, int] = {}
    for s in stores:
        doms[s.domain] = doms.get(s.domain, 0) + 1
    short = spread_shortfall(n, doms)
    if short:
        cap = spread_cap(n, len(doms))
        small = ", ".join(f"{d!r} ({c})" for d, c in sorted(doms.items()) if c < cap)
        raise ConfigError(
            sp, "store.domain",
            f"{len(doms)} domains must each take up to {cap} of n = {n} shards, but {small} hold fewer stores, {short} shard(s) short",
            "add stores to the small domains, merge domains, or lower n",
        )

    sio = sections["store_io"]
    store_io = StoreIOConfig(
        deadline=sio.duration("deadline", 10.0),
        concurrency=sio.get("concurrency", (int,), 4),
        probe_interval=sio.duration("probe_interval", 3.0),
        probe_deadline=sio.duration("probe_deadline", 5.0),
        good_probes_to_return=sio.get("good_probes_to_return", (int,), 3),
    )
    if store_io.concurrency < 1:
        raise sio.err("concurrency", "must be at least 1")
    if store_io.deadline <= 0:
        raise sio.err("deadline", "must be positive", "e.g. deadline = '10s'")
    sio.finish()
    rr = sections["repair"]
    repair = RepairConfig(rate=rr.size("rate", 64 * MiB), grace=rr.duration("grace", 1800.0))
    rr.finish()
    sc = sections["scrub"]
    scrub = ScrubConfig(interval=sc.duration("interval", 7 * 86400.0), rate=sc.size("rate", 32 * MiB),
                        orphan_grace=sc.duration("orphan_grace", 86400.0))
    sc.finish()
    mr = sections["metrics"]
    listen = mr.get("listen", (str, bool), DEFAULT_METRICS_LISTEN)
    if listen is True:
        listen = DEFAULT_METRICS_LISTEN
    elif listen is False or listen == "":
        listen = None
    elif not re.fullmatch(r"[^\s:]*:[0-9]{1,5}|\[[0-9a-fA-F:]+\]:[0-9]{1,5}", listen):
        raise mr.err("listen", f"{listen!r} is not host:port", "e.g. listen = '127.0.0.1:9851', or false to turn the endpoint off")
    mr.finish()
    cr = sections["catalog"]
    catalog = CatalogConfig(mirror_interval=cr.duration("mirror_interval", 60.0), mirrors_kept=cr.get("mirrors_kept", (int,), 3))
    if catalog.mirrors_kept < 1:
        raise cr.err("mirrors_kept", "must be at least 1")
    cr.finish()
    return PoolConfig(
        source=source, name=name, k=k, n=n, write_quorum=w, stripe_size=stripe, state_dir=state_dir,
        stores=tuple(stores), memory_cap=mem, allow_other=allow_other, store_io=store_io, repair=repair,
        scrub=scrub, metrics=MetricsConfig(listen=listen), catalog=catalog,
    )

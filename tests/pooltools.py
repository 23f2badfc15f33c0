"""Helpers for engine tests: small pools on plain directories, file I/O
through the pool API (no FUSE)."""
from __future__ import annotations

import stat
from pathlib import Path

from gateway import admin, config

KiB = 1024


def make_config(tmp_path: Path, *, k: int, n: int, w: int | None = None, stores: int | None = None,
                stripe_size: int = 64 * KiB, domains: list[str] | None = None, extra: str = "",
                memory_cap: int | None = None, store_dirs: list[Path] | None = None) -> config.PoolConfig:
    """Write a pool config over plain directories, init it, load it."""
    count = stores or n
    dirs = store_dirs or [tmp_path / f"store-{i}" for i in range(count)]
    for d in dirs:
        d.mkdir(parents=True, exist_ok=True)
    lines = ["[pool]", 'name = "lab"', f"k = {k}", f"n = {n}"]
    if w is not None:
        lines.append(f"write_quorum = {w}")
    lines += [f"stripe_size = {stripe_size}", f'state_dir = "{tmp_path / "state"}"']
    if memory_cap is not None:
        lines.append(f"memory_cap = {memory_cap}")
    for i, d in enumerate(dirs):
        lines += ["[[store]]", f'path = "{d}"']
        if domains:
            lines.append(f'domain = "{domains[i]}"')
    lines += ["[metrics]", "listen = false", extra]
    path = tmp_path / "pool.toml"
    path.write_text("\n".join(lines) + "\n")
    cfg = config.load(path)
    admin.init_pool(cfg)
    return cfg


async def write_file(pool, name: bytes, data: bytes, *, chunk: int = 128 * KiB, parent: int = 1) -> int:
    """Create name and write data through the pool; commit; return the inode."""
    try:
        node = await pool.lookup(parent, name)
    except Exception:
        node = await pool.create(parent, name, mode=stat.S_IFREG | 0o644, uid=0, gid=0)
    fh = await pool.open(node.ino, write=True, truncate=True)
    try:
        for off in range(0, len(data), chunk):
            await pool.write(fh, off, data[off:off + chunk])
        await pool.flush(fh)
    finally:
        await pool.release(fh)
    return node.ino


async def read_file(pool, name: bytes, *, parent: int = 1, chunk: int = 1 << 20) -> bytes:
    node = await pool.lookup(parent, name)
    fh = await pool.open(node.ino)
    try:
        out = bytearray()
        while True:
            part = await pool.read(fh, len(out), chunk)
            if not part:
                return bytes(out)
            out += part
    finally:
        await pool.release(fh)


def shard_files(cfg: config.PoolConfig) -> list[Path]:
    return sorted(p for s in cfg.stores for p in (s.path / "shards").rglob("*.shd"))

"""`shoal init` and `shoal status` through the real console entry point."""
from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from gateway.store import LABEL_NAME

SHOAL = [sys.executable, "-m", "gateway.cli"]


def run(*args, check=True):
    p = subprocess.run([*SHOAL, *map(str, args)], capture_output=True, text=True, timeout=60)
    if check and p.returncode:
        raise AssertionError(f"shoal {args} exited {p.returncode}: {p.stderr}")
    return p


def six_store_config(tmp_path: Path, stores: list[Path] | None = None) -> Path:
    stores = stores or [tmp_path / f"disk-{i}" for i in range(1, 7)]
    for s in stores:
        s.mkdir(parents=True, exist_ok=True)
    body = "".join(f'[[store]]\npath = "{s}"\n' for s in stores)
    cfg = tmp_path / "lab.toml"
    cfg.write_text(f'[pool]\nname = "lab"\nk = 4\nn = 6\nwrite_quorum = 5\nstate_dir = "{tmp_path / "state"}"\n{body}')
    return cfg


def test_init_then_status_json(tmp_path):
    cfg = six_store_config(tmp_path)
    first = run("init", cfg)
    assert first.stdout.count("labelled") == 6
    again = run("init", cfg)  # idempotent
    assert again.stdout.count("ready") == 6
    st = json.loads(run("status", cfg, "--json").stdout)
    assert len(st["stores"]) == 6
    assert all({"path", "state"} <= set(s) and s["state"] == "online" for s in st["stores"])
    assert st["stripes"] == {"intact": 0, "degraded": 0, "critical": 0, "lost": 0}
    assert "repair" in st and st["repair"]["queued_stripes"] == 0


def test_bad_config_exits_non_zero_with_the_message(tmp_path):
    cfg = tmp_path / "bad.toml"
    cfg.write_text('[pool]\nname = "lab"\nk = 5\nn = 4\nstate_dir = "s"\n')
    p = run("status", cfg, check=False)
    assert p.returncode != 0
    assert str(cfg) in p.stderr and "pool.n" in p.stderr and "less than k" in p.stderr


def test_foreign_and_unlabelled_stores_are_refused_and_never_written(tmp_path):
    other = six_store_config(tmp_path / "other")
    run("init", other)
    foreign = tmp_path / "other" / "disk-1"
    not_empty = tmp_path / "junk"
    not_empty.mkdir()
    (not_empty / "holiday-photos.txt").write_text("not Shoal's")
    stores = [foreign, not_empty] + [tmp_path / f"d{i}" for i in range(4)]
    cfg = six_store_config(tmp_path, stores)
    before = {p: sorted(os.listdir(p)) for p in stores}
    p = run("init", cfg, check=False)
    assert p.returncode != 0
    assert "another pool" in p.stderr and "not empty and has no Shoal label" in p.stderr
    assert {p: sorted(os.listdir(p)) for p in stores} == before  # nothing written anywhere
    assert not (tmp_path / "d0" / LABEL_NAME).exists()


def test_unmounted_disk_shows_offline(tmp_path):
    cfg = six_store_config(tmp_path)
    run("init", cfg)
    # A disk that is not mounted leaves an empty mount point behind.
    disk = tmp_path / "disk-3"
    for p in sorted(disk.rglob("*"), reverse=True):
        p.rmdir() if p.is_dir() else p.unlink()
    st = json.loads(run("status", cfg, "--json").stdout)
    states = {Path(s["path"]).name: s["state"] for s in st["stores"]}
    assert states["disk-3"] == "offline" and list(states.values()).count("online") == 5
    assert "not mounted" in next(s["reason"] for s in st["stores"] if s["path"].endswith("disk-3"))


@pytest.mark.skipif(os.geteuid() != 0, reason="needs root to mount a read-only tmpfs")
def test_state_dir_on_read_only_filesystem(tmp_path):
    ro = tmp_path / "ro"
    ro.mkdir()
    subprocess.run(["mount", "-t", "tmpfs", "-o", "size=1m,ro", "tmpfs", str(ro)], check=True)
    try:
        stores = [tmp_path / f"d{i}" for i in range(6)]
        cfg = six_store_config(tmp_path, stores)
        cfg.write_text(cfg.read_text().replace(str(tmp_path / "state"), str(ro / "state")))
        p = run("init", cfg, check=False)
        assert p.returncode != 0 and "not writable" in p.stderr
        assert not (stores[0] / LABEL_NAME).exists()
    finally:
        subprocess.run(["umount", str(ro)], check=True)


def test_init_refuses_a_wiped_store_it_knows(tmp_path):
    cfg = six_store_config(tmp_path)
    run("init", cfg)
    (tmp_path / "disk-2" / LABEL_NAME).unlink()  # the disk was wiped and is empty again
    for p in sorted((tmp_path / "disk-2").rglob("*"), reverse=True):
        p.rmdir()
    p = run("init", cfg, check=False)
    assert p.returncode != 0 and "store replace" in p.stderr and "Traceback" not in p.stderr

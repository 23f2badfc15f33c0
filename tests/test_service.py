"""Running as a service, and surviving the loss of the gateway itself,
through real mounts: sd_notify messages, SIGTERM during a copy, recovery of
a deleted state_dir, export with stores gone."""
from __future__ import annotations

import filecmp
import os
import shutil
import signal
import socket
import subprocess
import threading
import time
from pathlib import Path

import pytest

import mounting
from mounting import shoal_argv

pytestmark = [pytest.mark.fuse, mounting.requires_fuse]

STRIPE = 64 * 1024


def shoal(*args, check=True) -> subprocess.CompletedProcess:
    p = subprocess.run(shoal_argv(*args), capture_output=True, text=True, timeout=120)
    if check and p.returncode:
        raise AssertionError(f"shoal {' '.join(map(str, args))} exited {p.returncode}:\n{p.stdout}\n{p.stderr}")
    return p


def lab_tree(root: Path, seed: int = 5) -> dict[str, bytes]:
    """A small tree of instrument runs: sizes around and across stripe boundaries."""
    import random

    rng = random.Random(seed)
    files = {}
    for i, size in enumerate([0, 1, 4095, STRIPE - 1, STRIPE, STRIPE + 1, 3 * STRIPE + 17, 200_000]):
        rel = f"spectrometer/run-{i:04d}.dat" if i % 2 else f"microscope/tile-{i:04d}.raw"
        files[rel] = rng.randbytes(size)
    for rel, data in files.items():
        p = root / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_bytes(data)
    return files


def test_notify_ready_status_stopping(tmp_path, pool_config, mount_process):
    # systemd's notify protocol, emulated with a real datagram socket (sd_notify(3)).
    cfg = pool_config(4, 6, 5, stripe_size=STRIPE)
    shoal("init", cfg)
    sock_path = tmp_path / "notify.sock"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(str(sock_path))
    sock.settimeout(0.2)
    try:
        env = dict(os.environ, NOTIFY_SOCKET=str(sock_path), WATCHDOG_USEC="2000000")
        mp = mount_process(shoal_argv("mount", cfg, tmp_path / "mnt"), tmp_path / "mnt", env=env)
        got: list[str] = []
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline and not (any("READY=1" in m for m in got)
                                                   and any("WATCHDOG=1" in m for m in got)):
            try:
                got.append(sock.recv(4096).decode())
            except socket.timeout:
                pass
        assert any("READY=1" in m for m in got), got
        assert os.path.ismount(tmp_path / "mnt")  # READY only once mounted
        assert any(m.startswith("STATUS=") and "stores online" in m for m in got), got
        assert any("WATCHDOG=1" in m for m in got), got
        assert mp.stop(signal.SIGTERM) == 0
        deadline = time.monotonic() + 5
        while time.monotonic() < deadline and not any("STOPPING=1" in m for m in got):
            try:
                got.append(sock.recv(4096).decode())
            except socket.timeout:
                pass
        assert any("STOPPING=1" in m for m in got), got
    finally:
        sock.close()


def test_sigterm_during_copy_is_clean(tmp_path, pool_config, mount_process):
    cfg = pool_config(4, 6, 5, stripe_size=STRIPE)
    shoal("init", cfg)
    mnt = tmp_path / "mnt"
    mp = mount_process(shoal_argv("mount", cfg, mnt), mnt)
    closed: dict[str, bytes] = {}
    stop = threading.Event()

    # Through a descriptor of the mount's root, so that after the unmount the
    # loop fails instead of writing into the bare directory underneath.
    root = os.open(mnt, os.O_RDONLY | os.O_DIRECTORY)

    def copier():
        i = 0
        while not stop.is_set():
            data = os.urandom(3 * STRIPE + i)
            name = f"run-{i:05d}.dat"
            try:
                fd = os.open(name, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644, dir_fd=root)
                try:
                    os.write(fd, data)
                finally:
                    os.close(fd)  # close() returned: the file is acknowledged
            except OSError:
                return  # the mount went away mid-copy: that file was never acknowledged
            closed[name] = data
            i += 1

    t = threading.Thread(target=copier)
    t.start()
    time.sleep(1.5)
    rc = mp.stop(signal.SIGTERM)
    stop.set()
    t.join(10)
    os.close(root)
    assert rc == 0
    assert not os.path.ismount(mnt)
    assert mounting.access_errno(mnt) == 0  # no 'Transport endpoint is not connected' left
    assert closed, "the copy loop made no progress"
    mp2 = mount_process(shoal_argv("mount", cfg, mnt), mnt)
    for name, data in closed.items():
        assert (mnt / name).read_bytes() == data, name
    assert mp2.stop() == 0


def test_recover_after_losing_state_dir(tmp_path, pool_config, mount_process):
    """Delete state_dir, `shoal recover`, mount: every file bit-exact, including
    files written after the last mirror (they come back from shard headers)."""
    cfg = pool_config(4, 6, 5, stripe_size=STRIPE, extra={"catalog": {"mirror_interval": "1h"}})
    shoal("init", cfg)
    src = tmp_path / "src"
    files = lab_tree(src)
    mnt = tmp_path / "mnt"
    mp = mount_process(shoal_argv("mount", cfg, mnt), mnt)
    shutil.copytree(src, mnt, dirs_exist_ok=True)
    assert mp.stop() == 0  # a clean stop takes the final mirror
    mp = mount_process(shoal_argv("mount", cfg, mnt), mnt)
    late = os.urandom(2 * STRIPE + 5)
    (mnt / "late-run.dat").write_bytes(late)  # after the last mirror
    mp.kill()  # the gateway dies: no final mirror
    mounting.clear_stale_mount(mnt)
    from gateway import config as gconfig

    shutil.rmtree(gconfig.load(cfg).state_dir)
    report = shoal("recover", cfg)
    assert "recover" in (report.stdout + report.stderr).lower()
    mp = mount_process(shoal_argv("mount", cfg, mnt), mnt)
    for rel, data in files.items():
        assert (mnt / rel).read_bytes() == data, rel
    found = [p for p in (mnt / "lost+found").iterdir()] if (mnt / "lost+found").exists() else []
    assert (mnt / "late-run.dat").exists() or any(p.read_bytes() == late for p in found)
    assert mp.stop() == 0


def test_export_with_n_minus_k_stores_gone(tmp_path, pool_config, mount_process):
    cfg = pool_config(4, 6, 5, stripe_size=STRIPE)
    shoal("init", cfg)
    src = tmp_path / "src"
    lab_tree(src, seed=9)
    mnt = tmp_path / "mnt"
    mp = mount_process(shoal_argv("mount", cfg, mnt), mnt)
    shutil.copytree(src, mnt / "runs")
    assert mp.stop() == 0
    from gateway import config as gconfig

    stores = [s.path for s in gconfig.load(cfg).stores]
    for s in stores[:2]:
        mounting.umount(s)  # two disks pulled
    dest = tmp_path / "out"
    shoal("export", cfg, "/runs", dest)
    # cmp, the general-purpose reference tool, compares every exported file.
    for p in src.rglob("*"):
        if p.is_file():
            r = subprocess.run(["cmp", p, dest / p.relative_to(src)], capture_output=True)
            assert r.returncode == 0, r.stdout
    again = shoal("export", cfg, "/runs", dest, check=False)
    assert again.returncode != 0 and "exist" in (again.stderr + again.stdout)


def test_stale_mount_is_cleared_at_start(tmp_path, pool_config, mount_process):
    cfg = pool_config(4, 6, 5, stripe_size=STRIPE)
    shoal("init", cfg)
    mnt = tmp_path / "mnt"
    mp = mount_process(shoal_argv("mount", cfg, mnt), mnt)
    mp.kill()
    mp.wait()
    assert mounting.access_errno(mnt) != 0  # the dead mount ('Transport endpoint is not connected')
    # `shoal mount` itself clears it (the test helper refuses a mounted path, so start it by hand).
    log = open(tmp_path / "second.log", "w")
    proc = subprocess.Popen(shoal_argv("mount", cfg, mnt), stdout=log, stderr=subprocess.STDOUT)
    try:
        deadline = time.monotonic() + 15
        while time.monotonic() < deadline and mounting.access_errno(mnt) != 0:
            time.sleep(0.1)
        while time.monotonic() < deadline and not (tmp_path / "second.log").read_text().count("mounted at"):
            time.sleep(0.1)
        (mnt / "ok").write_bytes(b"alive")
        assert (mnt / "ok").read_bytes() == b"alive"
        assert "stale mount" in (tmp_path / "second.log").read_text()
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(30) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        mounting.clear_stale_mount(mnt)
        log.close()

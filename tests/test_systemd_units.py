"""The unit files in systemd/, checked by systemd's own tools.

`systemd-analyze verify` loads unit files offline, without a running
manager (this machine is a container without systemd as PID 1), and prints
what it would complain about at load time: unknown keys, bad values,
commands that do not exist. Unknown keys and bad values are only printed
(the exit status stays 0), so the tests require empty output as well.
`systemd-analyze security --offline=yes` reports, from systemd's own reading
of the file, which sandboxing settings are in effect.

The stale-mount test makes a real FUSE mount whose daemon is gone and runs
the unit's own cleanup command on it.
"""
from __future__ import annotations

import ctypes
import errno
import json
import os
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from mounting import is_mounted, requirement

UNIT_DIR = Path(__file__).resolve().parent.parent / "systemd"
INSTANCE = "lab"
INSTALLED_SHOAL = "/opt/shoal/bin/shoal"
MOUNT_POINT = "/srv/shoal/%i"

ANALYZE = shutil.which("systemd-analyze")
FUSERMOUNT = "/bin/fusermount3"

# Options that give a unit its own mount namespace. Per systemd.exec(5) they
# disconnect mount propagation from the unit to the host, so the gateway's
# FUSE mount would be invisible outside the service. Names as
# `systemd-analyze security` reports them.
NAMESPACE_OPTIONS = [
    "PrivateTmp=", "PrivateDevices=", "PrivateMounts=", "ProtectSystem=", "ProtectHome=",
    "ProtectKernelTunables=", "ProtectKernelModules=", "ProtectKernelLogs=",
    "ProtectControlGroups=", "ProtectProc=", "ProcSubset=", "PrivateUsers=", "PrivateNetwork=",
    "RootDirectory=/RootImage=",
]
# Hardening the gateway does keep (seccomp, capabilities, device cgroup).
GATEWAY_HARDENING = [
    "NoNewPrivileges=", "RestrictSUIDSGID=", "RestrictRealtime=", "LockPersonality=",
    "SystemCallArchitectures=", "ProtectClock=", "NotifyAccess=", "UMask=",
    "RestrictNamespaces=~mnt", "RestrictNamespaces=~user",
    "SystemCallFilter=~@reboot", "SystemCallFilter=~@module", "SystemCallFilter=~@raw-io",
    "RestrictAddressFamilies=~AF_PACKET",
    "CapabilityBoundingSet=~CAP_SYS_MODULE", "CapabilityBoundingSet=~CAP_SYS_PTRACE",
    "CapabilityBoundingSet=~CAP_NET_ADMIN", "CapabilityBoundingSet=~CAP_SYS_RAWIO",
    "CapabilityBoundingSet=~CAP_SET(UID|GID|PCAP)", "CapabilityBoundingSet=~CAP_(CHOWN|FSETID|SETFCAP)",
]


def _units() -> list[Path]:
    return sorted(p for p in UNIT_DIR.iterdir() if p.suffix in (".service", ".timer"))


def _instance_name(template: Path) -> str:
    # shoal@.service -> shoal@lab.service: a template cannot be loaded without an instance.
    return template.name.replace("@.", f"@{INSTANCE}.")


def _shoal_executable() -> str:
    """An existing `shoal` to stand in for /opt/shoal/bin/shoal.

    verify fails on a command that does not exist, and /opt/shoal is where
    an installation puts the venv (docs/operations.md), not where tests run.
    The test venv's console script is the same program, so the copies point
    there; the interpreter itself is the fallback when the project is not
    installed into the venv.
    """
    script = Path(sys.executable).parent / "shoal"
    return str(script) if os.access(script, os.X_OK) else sys.executable


@pytest.fixture(scope="module")
def analyze():
    if ANALYZE is None:
        if os.environ.get("CI"):
            pytest.fail("systemd-analyze is missing on CI: install the 'systemd' package")
        pytest.skip("systemd-analyze is not installed (Debian package 'systemd')")
    return ANALYZE


@pytest.fixture
def unit_copies(tmp_path) -> Path:
    """The units as instances in tmp_path, with the shoal path rewritten in the copies only."""
    exe = _shoal_executable()
    for unit in _units():
        text = unit.read_text()
        (tmp_path / _instance_name(unit)).write_text(text.replace(INSTALLED_SHOAL, exe))
    return tmp_path


def _verify(analyze: str, files: list[Path]) -> subprocess.CompletedProcess:
    # --recursive-errors=no: judge our files, not the host's own units that
    # ours are ordered against (local-fs.target and the like).
    return subprocess.run(
        [analyze, "verify", "--recursive-errors=no", *map(str, files)],
        capture_output=True, text=True, timeout=120,
    )


def test_unit_files_exist():
    names = {p.name for p in _units()}
    assert names == {
        "shoal@.service", "shoal-scrub@.service", "shoal-scrub@.timer",
        "shoal-check@.service", "shoal-check@.timer",
    }


def test_verify_reports_nothing(analyze, unit_copies):
    files = sorted(unit_copies.iterdir())
    r = _verify(analyze, files)
    output = (r.stdout + r.stderr).strip()
    assert r.returncode == 0 and output == "", f"systemd-analyze verify (exit {r.returncode}):\n{output}"


def test_verify_catches_mistakes_here(analyze, unit_copies):
    # The check above only means something if verify, on this machine,
    # reports the kinds of mistakes it is there to catch.
    unit = unit_copies / f"shoal@{INSTANCE}.service"
    good = unit.read_text()
    unit.write_text(good.replace("Type=notify\n", "Type=notfy\nKillSignall=SIGTERM\n"))
    r = _verify(analyze, [unit])
    out = r.stdout + r.stderr
    assert "notfy" in out and "KillSignall" in out
    unit.write_text(good.replace(_shoal_executable(), INSTALLED_SHOAL + "-missing"))
    r = _verify(analyze, [unit])
    assert r.returncode != 0 and "shoal-missing" in r.stdout + r.stderr


def test_real_paths_are_the_documented_ones():
    gateway = (UNIT_DIR / "shoal@.service").read_text()
    assert f"ExecStart={INSTALLED_SHOAL} mount /etc/shoal/%i.toml {MOUNT_POINT}\n" in gateway
    assert "StateDirectory=shoal/%i\n" in gateway
    for job in ("scrub", "check"):
        service = (UNIT_DIR / f"shoal-{job}@.service").read_text()
        assert f"ExecStart={INSTALLED_SHOAL} {job} /etc/shoal/%i.toml\n" in service
    doc = (UNIT_DIR.parent / "docs" / "operations.md").read_text()
    for path in (INSTALLED_SHOAL, "/etc/shoal/lab.toml", "/srv/shoal/lab", "/var/lib/shoal/lab"):
        assert path in doc


def test_every_timer_has_its_service():
    # verify does not complain about a timer whose service is missing.
    for timer in UNIT_DIR.glob("*.timer"):
        assert timer.with_suffix(".service").exists(), timer.name


def _security(analyze: str, unit: Path) -> dict[str, bool]:
    r = subprocess.run(
        [analyze, "security", "--offline=yes", "--json=short", str(unit)],
        capture_output=True, text=True, timeout=120,
    )
    assert r.returncode == 0, r.stderr
    return {check["name"]: check["set"] for check in json.loads(r.stdout)}


def test_gateway_has_no_mount_namespace(analyze, unit_copies):
    checks = _security(analyze, unit_copies / f"shoal@{INSTANCE}.service")
    enabled = [name for name in NAMESPACE_OPTIONS if checks[name]]
    assert enabled == [], f"these would hide the FUSE mount from the host: {enabled}"


def test_gateway_hardening_is_in_effect(analyze, unit_copies):
    checks = _security(analyze, unit_copies / f"shoal@{INSTANCE}.service")
    missing = [name for name in GATEWAY_HARDENING if not checks[name]]
    assert missing == []
    # The one capability a FUSE daemon mounting as root cannot do without.
    assert checks["CapabilityBoundingSet=~CAP_SYS_ADMIN"] is False


@pytest.mark.parametrize("job", ["scrub", "check"])
def test_jobs_are_sandboxed(analyze, unit_copies, job):
    # The scrub and check jobs mount nothing, so they can have the namespaces.
    # (ProtectSystem=full, chosen so stores stay writable, counts as partial
    # in this report, so it is not in the list.)
    checks = _security(analyze, unit_copies / f"shoal-{job}@{INSTANCE}.service")
    wanted = ["PrivateTmp=", "PrivateDevices=", "ProtectKernelTunables=",
              "ProtectKernelModules=", "ProtectKernelLogs=", "ProtectControlGroups=",
              "CapabilityBoundingSet=~CAP_SYS_ADMIN", "RestrictAddressFamilies=~AF_(INET|INET6)",
              *GATEWAY_HARDENING[:4]]
    assert [name for name in wanted if not checks[name]] == []


# --- the stale-mount cleanup, on a real dead FUSE mount ---------------------

def _cleanup_commands() -> list[tuple[str, str]]:
    """(directive, command line) of each stale-mount cleanup in shoal@.service."""
    out = []
    for line in (UNIT_DIR / "shoal@.service").read_text().splitlines():
        key, _, value = line.partition("=")
        if key in ("ExecStartPre", "ExecStopPost") and "fusermount3" in value:
            out.append((key, value))
    return out


def _argv(command: str, mount_point: Path) -> list[str]:
    # systemd's command-line syntax for this line is the shell's quoting plus
    # "$$" for a literal "$" and specifiers such as %i; shlex reads the rest.
    assert command.startswith("-"), "the cleanup must not fail the unit when there is nothing to clean"
    command = command[1:].replace(MOUNT_POINT, str(mount_point)).replace("$$", "$")
    assert "%" not in command
    return shlex.split(command)


def _dead_mount_requirement() -> str | None:
    if os.geteuid() != 0:
        return "needs root to mount FUSE directly"
    if not os.path.exists("/dev/fuse"):
        return "/dev/fuse is missing"
    if not os.access(FUSERMOUNT, os.X_OK):
        return f"{FUSERMOUNT} is missing (apt-get install fuse3)"
    return None


# Skips here; fails under CI, where a missing requirement is a broken install.
requires_dead_mount = requirement(_dead_mount_requirement())


def test_cleanup_runs_before_start_and_after_stop():
    assert [key for key, _ in _cleanup_commands()] == ["ExecStartPre", "ExecStopPost"]
    gateway = (UNIT_DIR / "shoal@.service").read_text()
    # The cleanup comes before mkdir, which would fail on a dead mount point.
    assert gateway.index("fusermount3") < gateway.index(f"ExecStartPre=/bin/mkdir -p -m 0700 {MOUNT_POINT}")


@pytest.fixture
def dead_mount(tmp_path):
    """A FUSE mount whose daemon is gone, as a crash leaves it: stat fails with ENOTCONN."""
    point = tmp_path / "lab"
    point.mkdir()
    libc = ctypes.CDLL(None, use_errno=True)
    libc.mount.argtypes = [ctypes.c_char_p, ctypes.c_char_p, ctypes.c_char_p, ctypes.c_ulong, ctypes.c_char_p]
    fd = os.open("/dev/fuse", os.O_RDWR)
    try:
        # The options the kernel's FUSE needs (fuse(4)): the device fd, the
        # root's file type, and the owner.
        opts = f"fd={fd},rootmode=40000,user_id=0,group_id=0".encode()
        if libc.mount(b"shoal-test", str(point).encode(), b"fuse.shoal-test", 0, opts) != 0:
            reason = f"cannot mount FUSE here: {os.strerror(ctypes.get_errno())}"
            if os.environ.get("CI"):
                pytest.fail(reason)
            pytest.skip(reason)
    finally:
        os.close(fd)  # the "daemon" is gone: the kernel aborts the connection
    try:
        yield point
    finally:
        if is_mounted(point):
            subprocess.run([FUSERMOUNT, "-u", "-z", str(point)], check=False, timeout=60)


@pytest.mark.fuse
@requires_dead_mount
@pytest.mark.parametrize("which", [0, 1], ids=["ExecStartPre", "ExecStopPost"])
def test_cleanup_clears_a_dead_mount(dead_mount, which):
    with pytest.raises(OSError) as e:
        os.stat(dead_mount)
    assert e.value.errno == errno.ENOTCONN  # what the kernel answers on a dead mount
    _key, command = _cleanup_commands()[which]
    r = subprocess.run(_argv(command, dead_mount), capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    assert not is_mounted(dead_mount)
    assert dead_mount.is_dir()


@pytest.mark.fuse
@requires_dead_mount
def test_cleanup_leaves_a_plain_directory_alone(tmp_path):
    point = tmp_path / "lab"
    point.mkdir()
    (point / "keep").write_text("instrument run 17")
    for _key, command in _cleanup_commands():
        r = subprocess.run(_argv(command, point), capture_output=True, text=True, timeout=60)
        assert r.returncode == 0, r.stderr
    assert (point / "keep").read_text() == "instrument run 17"
    assert not is_mounted(point)

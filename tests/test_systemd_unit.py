"""The shipped systemd unit (deploy/clampd.service) is hardened, and stays so.

Two checks, so the suite says something on every machine:

1. ``systemd-analyze security --offline=true`` (systemd ≥ 250 reviews a unit file without a
   running systemd) scores the unit; the test asserts the overall exposure stays at or below
   ``MAX_EXPOSURE`` and that the directives listed below count as set. Skipped where
   systemd-analyze is missing or too old to review offline.
2. Everywhere: the unit file itself is read and each hardening directive is checked for the
   value we rely on, with the reason beside it.

External reference: systemd.exec(5), systemd.resource-control(5) and systemd.service(5)
(systemd 252, Debian 12) for every directive; systemd-analyze(1) for ``security``,
``--offline`` and ``--threshold`` (exposure in tenths: 1.6 is 16).
"""

from __future__ import annotations

import re
import shutil
import subprocess
import tomllib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
UNIT = ROOT / "deploy" / "clampd.service"
# The unit scored 1.6 ("OK") with systemd 252 when this test was written; what is left is
# the network (the daemon talks to the broker), the sound device and the bluetooth group.
# 2.0 leaves room for a point release re-weighting one item, not for a lost directive.
MAX_EXPOSURE = 2.0


def _section(name: str) -> dict[str, list[str]]:
    """Key → every value given in section ``name`` (systemd allows a key more than once)."""
    section = ""
    out: dict[str, list[str]] = {}
    for raw in UNIT.read_text(encoding="utf-8").splitlines():
        line = raw.strip()
        if not line or line.startswith(("#", ";")):
            continue
        if line.startswith("[") and line.endswith("]"):
            section = line[1:-1]
            continue
        if section == name:
            key, _, value = line.partition("=")
            out.setdefault(key.strip(), []).append(value.strip())
    return out


SERVICE = _section("Service")
UNIT_SECTION = _section("Unit")


@pytest.mark.parametrize(
    ("key", "expected", "why"),
    [
        ("NoNewPrivileges", "yes", "no setuid escalation from the daemon or its children"),
        ("ProtectSystem", "strict", "the whole file system is read-only but ReadWritePaths"),
        ("ProtectHome", "yes", "no access to /home, /root, /run/user"),
        ("PrivateTmp", "yes", "its own /tmp"),
        ("ProtectKernelTunables", "yes", "/proc/sys and /sys read-only"),
        ("ProtectKernelModules", "yes", "cannot load modules"),
        ("ProtectKernelLogs", "yes", "cannot read the kernel log"),
        ("ProtectControlGroups", "yes", "cgroup tree read-only"),
        ("ProtectClock", "yes", "cannot set the clock (result times depend on it)"),
        ("ProtectHostname", "yes", "cannot change the host name"),
        ("RestrictNamespaces", "yes", "cannot create namespaces"),
        ("RestrictRealtime", "yes", "cannot starve the board with real-time scheduling"),
        ("RestrictSUIDSGID", "yes", "cannot create setuid files"),
        ("LockPersonality", "yes", "no execution-domain tricks"),
        ("MemoryDenyWriteExecute", "yes", "no writable and executable memory"),
        ("RemoveIPC", "yes", "its IPC objects go when it stops"),
        ("SystemCallArchitectures", "native", "no foreign-ABI system calls"),
        ("DevicePolicy", "closed", "only the devices allowed below"),
        ("CapabilityBoundingSet", "", "no capabilities at all"),
        ("AmbientCapabilities", "", "none handed to the process either"),
        ("Type", "notify", "readiness and watchdog through sd_notify"),
        ("Restart", "on-failure", "a crash or a watchdog kill restarts it"),
        ("ProtectProc", "invisible", "other users' processes are hidden"),
    ],
)
def test_hardening_directive(key: str, expected: str, why: str) -> None:
    assert SERVICE.get(key) == [expected], f"{key}={expected} expected: {why}"


def test_runs_as_its_own_unprivileged_user() -> None:
    assert SERVICE["User"] == ["clampd"]
    assert SERVICE["Group"] == ["clampd"]
    # Only the groups BlueZ (D-Bus policy) and the speaker need.
    assert set(SERVICE["SupplementaryGroups"][0].split()) <= {"bluetooth", "audio"}


def test_writes_only_to_its_state_directory() -> None:
    assert SERVICE["ReadWritePaths"] == ["/var/lib/clampd"]
    assert SERVICE["StateDirectory"] == ["clampd"]
    assert SERVICE["WorkingDirectory"] == ["/var/lib/clampd"]


def test_files_it_creates_are_not_readable_by_others() -> None:
    (umask,) = SERVICE["UMask"]
    assert int(umask, 8) & 0o007 == 0o007, "others get no access to outbox or logs"


def test_only_the_socket_families_it_needs() -> None:
    (families,) = SERVICE["RestrictAddressFamilies"]
    # AF_UNIX: D-Bus to BlueZ and sd_notify; AF_INET/6: the broker. No AF_PACKET/NETLINK.
    assert set(families.split()) <= {"AF_UNIX", "AF_INET", "AF_INET6"}


def test_system_calls_are_an_allow_list_minus_privileged_groups() -> None:
    filters = SERVICE["SystemCallFilter"]
    assert "@system-service" in filters
    denied = {g for f in filters if f.startswith("~") for g in f[1:].split()}
    assert {"@privileged", "@mount", "@module", "@raw-io", "@reboot", "@swap"} <= denied


def test_only_sound_devices_are_allowed() -> None:
    assert all(v.startswith("char-alsa") for v in SERVICE["DeviceAllow"])


def test_watchdog_is_armed() -> None:
    (value,) = SERVICE["WatchdogSec"]
    assert 0 < int(value) <= 60


def _offline_review() -> subprocess.CompletedProcess[str]:
    exe = shutil.which("systemd-analyze")
    if exe is None:
        pytest.skip("systemd-analyze is not installed (the directive checks above still ran)")
    proc = subprocess.run(
        [exe, "security", "--offline=true", "--no-pager", str(UNIT)],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    if "Overall exposure level" not in proc.stdout:
        pytest.skip(f"systemd-analyze cannot review unit files offline here: {proc.stderr[:200]}")
    return proc


def test_systemd_analyze_security_scores_the_unit_low() -> None:
    proc = _offline_review()
    match = re.search(r"Overall exposure level for clampd\.service: (\d+\.\d+)", proc.stdout)
    assert match is not None, proc.stdout[-500:]
    exposure = float(match.group(1))
    assert exposure <= MAX_EXPOSURE, proc.stdout
    # The same bound through systemd-analyze's own gate (tenths, systemd-analyze(1)).
    gate = subprocess.run(
        [
            shutil.which("systemd-analyze") or "systemd-analyze",
            "security",
            "--offline=true",
            f"--threshold={round(MAX_EXPOSURE * 10)}",
            str(UNIT),
        ],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert gate.returncode == 0


@pytest.mark.parametrize(
    "check",
    [
        "NoNewPrivileges=",
        "ProtectSystem=",
        "ProtectHome=",
        "PrivateTmp=",
        "User=/DynamicUser=",
        "CapabilityBoundingSet=~CAP_SYS_ADMIN",
        "RestrictAddressFamilies=~AF_PACKET",
        "SystemCallFilter=~@privileged",
        "MemoryDenyWriteExecute=",
    ],
)
def test_systemd_analyze_counts_the_directive_as_set(check: str) -> None:
    proc = _offline_review()
    lines = [ln for ln in proc.stdout.splitlines() if ln[2:].lstrip().startswith(check)]
    assert lines, f"{check} not reviewed: {proc.stdout[:300]}"
    assert all(ln.startswith("✓") for ln in lines), lines


def test_documentation_points_at_files_the_documented_install_puts_there() -> None:
    # systemd.unit(5): Documentation= takes space-separated URIs of the types http://,
    # https://, file:, info: and man:. Ours are file: URIs into the venv that deploy/BOARD.md
    # creates (the one ExecStart runs from); the wheel installs them there through
    # pyproject.toml's data-files (tests/test_packaging.py installs it and looks).
    uris = [u for value in UNIT_SECTION["Documentation"] for u in value.split()]
    assert uris
    (exec_start,) = SERVICE["ExecStart"]
    venv = exec_start.split()[0].removesuffix("/bin/clampd")
    assert venv == "/opt/clampd/venv"
    assert "/opt/clampd/venv" in (ROOT / "deploy" / "BOARD.md").read_text(encoding="utf-8")
    setuptools_cfg = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    data_files = setuptools_cfg["tool"]["setuptools"]["data-files"]
    installed = {
        f"{venv}/{folder}/{Path(src).name}" for folder, srcs in data_files.items() for src in srcs
    }
    for uri in uris:
        assert uri.startswith(("http://", "https://", "file:", "info:", "man:")), uri
        assert uri.startswith("file://"), f"{uri}: only files shipped with the wheel"
        path = uri.removeprefix("file://")
        assert path in installed, f"{path} is not installed by the wheel ({sorted(installed)})"
    for srcs in data_files.values():
        for src in srcs:
            assert (ROOT / src).is_file(), src


def test_systemd_accepts_the_documentation_uris() -> None:
    # systemd-analyze(1) verify loads the unit as systemd would and reports a Documentation=
    # value it cannot take as "Invalid URL, ignoring" (observed with systemd 252). The missing
    # /opt/clampd executable is reported too on a build machine; only the URI lines matter here.
    exe = shutil.which("systemd-analyze")
    if exe is None:
        pytest.skip("systemd-analyze is not installed (the URI check above still ran)")
    proc = subprocess.run(
        [exe, "verify", "--man=no", str(UNIT)],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    output = proc.stdout + proc.stderr
    assert "clampd.service" in output or proc.returncode == 0, output
    assert "Invalid URL" not in output, output

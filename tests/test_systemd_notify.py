"""sd_notify datagrams reach a real AF_UNIX socket in the format of sd_notify(3)."""

from __future__ import annotations

import os
import socket
from pathlib import Path

from clampd.daemon.runtime._systemd import SystemdNotifier


def test_notifications_arrive_as_sd_notify_datagrams(tmp_path: Path) -> None:
    path = tmp_path / "notify.sock"
    with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as server:
        server.bind(str(path))
        n = SystemdNotifier({"NOTIFY_SOCKET": str(path), "WATCHDOG_USEC": "15000000"})
        assert n.enabled
        assert n.watchdog_interval_s == 5.0
        n.ready("outbox open")
        n.watchdog()
        n.stopping()
        got = [server.recv(4096).decode() for _ in range(3)]
    assert got == ["READY=1\nSTATUS=outbox open", "WATCHDOG=1", "STOPPING=1"]


def test_outside_systemd_every_call_is_a_no_op() -> None:
    n = SystemdNotifier({})
    assert not n.enabled
    assert n.watchdog_interval_s is None
    n.ready()
    n.watchdog()


def test_a_watchdog_meant_for_another_process_is_not_petted() -> None:
    # sd_watchdog_enabled(3): WATCHDOG_PID, when set, names the process the watchdog is for.
    usec = {"NOTIFY_SOCKET": "/run/x", "WATCHDOG_USEC": "15000000"}
    assert SystemdNotifier({**usec, "WATCHDOG_PID": str(os.getpid())}).watchdog_interval_s == 5.0
    assert (
        SystemdNotifier({**usec, "WATCHDOG_PID": str(os.getpid() + 1)}).watchdog_interval_s is None
    )
    assert SystemdNotifier({**usec, "WATCHDOG_PID": "garbage"}).watchdog_interval_s is None

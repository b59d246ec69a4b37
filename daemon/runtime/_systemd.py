"""sd_notify without a dependency: readiness, watchdog pets and status lines for systemd.

systemd passes ``NOTIFY_SOCKET`` (a path, or an abstract socket name starting with ``@``) to
services with ``Type=notify``; a datagram ``READY=1`` / ``WATCHDOG=1`` / ``STATUS=...`` on it is
the whole protocol (sd_notify(3)). Outside systemd the variable is absent and every call is a
no-op, so the daemon runs the same under a terminal, in tests and in the demo.

Sending a datagram to a local socket does not block in practice (the receiver is PID 1), so the
calls are safe inside the event loop.
"""

from __future__ import annotations

import os
import socket

__all__ = ["SystemdNotifier"]


class SystemdNotifier:
    """Talks to systemd when started by it; silent otherwise."""

    def __init__(self, env: dict[str, str] | None = None) -> None:
        environ = os.environ if env is None else env
        address = environ.get("NOTIFY_SOCKET", "")
        if address.startswith("@"):
            address = "\0" + address[1:]
        self._address = address or None
        usec = environ.get("WATCHDOG_USEC", "")
        # sd_watchdog_enabled(3): a WATCHDOG_PID naming another process means the watchdog is
        # that process's (e.g. a shell that started us and handed down its environment).
        pid = environ.get("WATCHDOG_PID", "")
        ours = not pid or (pid.isdigit() and int(pid) == os.getpid())
        self.watchdog_interval_s: float | None = (
            # pet at a third of the timeout: two pets can be missed before systemd acts
            int(usec) / 1e6 / 3 if ours and usec.isdigit() and int(usec) > 0 else None
        )

    @property
    def enabled(self) -> bool:
        """True when started by systemd with a notification socket."""
        return self._address is not None

    def _send(self, message: str) -> None:
        if self._address is None:
            return
        with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as sock:
            sock.setblocking(False)
            try:
                sock.sendto(message.encode(), self._address)
            except OSError:
                # systemd gone (shutdown) or socket full: notifications are best effort
                return

    def ready(self, status: str = "") -> None:
        """The daemon is up (``Type=notify`` units count as started from here)."""
        self._send("READY=1" + (f"\nSTATUS={status}" if status else ""))

    def status(self, status: str) -> None:
        """A one-line status for ``systemctl status``."""
        self._send(f"STATUS={status}")

    def watchdog(self) -> None:
        """Pet the watchdog (every ``watchdog_interval_s``)."""
        self._send("WATCHDOG=1")

    def stopping(self) -> None:
        """Shutdown has begun (systemd stops expecting watchdog pets)."""
        self._send("STOPPING=1")

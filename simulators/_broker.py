"""A local MQTT broker for tests and the demo: mosquitto when it is on PATH, else amqtt.

mosquitto runs as a child process on 127.0.0.1 on a free port with a config written here.
Lines it needs and why (measured, ../shared/NOTES-ble-mqtt.md):

- ``allow_anonymous true`` is required once a ``listener`` line exists;
- ``user root`` when running as root, else it drops to user mosquitto, cannot write its
  persistence file and still exits 0;
- ``max_queued_messages 0``: with the default of 1000 it silently drops QoS 1 messages to
  a slow subscriber (17 139 of 20 000 arrived in one run here);
- ``autosave_on_changes`` with a small interval, so a broker killed with SIGKILL keeps what
  it had queued for persistent sessions.

amqtt (the fallback, in-process, MQTT 3.1.1 only) shares the event loop; it is started
only where mosquitto is missing and ``CLAMPD_REQUIRE_MOSQUITTO`` is not set.
"""

from __future__ import annotations

import asyncio
import contextlib
import os
import shutil
import signal
import socket
import tempfile
from pathlib import Path
from types import TracebackType
from typing import Any, Self

__all__ = ["BrokerUnavailableError", "LocalBroker", "free_port", "mosquitto_path"]


class BrokerUnavailableError(RuntimeError):
    """No broker could be started here (mosquitto missing and required, or failed to start)."""


def free_port() -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        port: int = s.getsockname()[1]
        return port


def mosquitto_path() -> str | None:
    """Where mosquitto lives: PATH, or Debian's /usr/sbin which is not on every PATH."""
    return shutil.which("mosquitto") or shutil.which("mosquitto", path="/usr/sbin:/usr/local/sbin")


class LocalBroker:
    """A broker on 127.0.0.1 that can be stopped, killed and started again on the same port.

    Use as ``async with LocalBroker() as broker: ... broker.port``. ``stop()`` ends it
    (SIGTERM, it saves its persistence), ``kill()`` ends it with SIGKILL, ``start()`` brings
    it back with the same port and persistence folder, ``wipe()`` deletes its persistence.
    """

    def __init__(
        self,
        *,
        port: int | None = None,
        workdir: Path | None = None,
        prefer: str = "auto",
        extra_config: str = "",
    ) -> None:
        self.port = port or free_port()
        self.host = "127.0.0.1"
        self._own_dir = workdir is None
        self.workdir = workdir or Path(tempfile.mkdtemp(prefix="clampd-broker-"))
        self._extra = extra_config
        exe = mosquitto_path()
        required = os.environ.get("CLAMPD_REQUIRE_MOSQUITTO") == "1"
        if prefer == "amqtt" and not required:
            exe = None
        if exe is None and (required or prefer == "mosquitto"):
            raise BrokerUnavailableError(
                "mosquitto is required (CLAMPD_REQUIRE_MOSQUITTO=1) but not installed;"
                " install Debian's mosquitto package"
            )
        self._exe = exe
        self._proc: asyncio.subprocess.Process | None = None
        self._amqtt: Any = None

    @property
    def kind(self) -> str:
        """``mosquitto`` or ``amqtt``."""
        return "mosquitto" if self._exe else "amqtt"

    @property
    def protocol_versions(self) -> tuple[int, ...]:
        """MQTT protocol levels this broker accepts (5 = MQTT 5, 4 = 3.1.1)."""
        return (5, 4) if self._exe else (4,)

    @property
    def url(self) -> str:
        return f"mqtt://{self.host}:{self.port}"

    def _config(self) -> str:
        lines = [
            f"listener {self.port} 127.0.0.1",
            "allow_anonymous true",
            "persistence true",
            f"persistence_location {self.workdir}/",
            "autosave_interval 1",
            "autosave_on_changes true",
            "max_queued_messages 0",
            "max_inflight_messages 0",
            "log_dest stderr",
            "log_type error",
            "log_type warning",
        ]
        if os.geteuid() == 0:
            lines.append("user root")
        return "\n".join(lines) + "\n" + self._extra

    async def start(self) -> None:
        """Start (or restart) the broker and wait until its port accepts connections."""
        if self._exe:
            conf = self.workdir / "mosquitto.conf"
            conf.write_text(self._config())
            with (self.workdir / "mosquitto.log").open("ab") as log:
                # the child keeps its own copy of the descriptor
                self._proc = await asyncio.create_subprocess_exec(
                    self._exe,
                    "-c",
                    str(conf),
                    stdout=asyncio.subprocess.DEVNULL,
                    stderr=log,
                )
        else:
            await self._start_amqtt()
        await self._wait_open()

    async def _start_amqtt(self) -> None:
        try:
            from amqtt.broker import Broker
        except ImportError as exc:
            raise BrokerUnavailableError(
                "no MQTT broker: install mosquitto, or the 'broker' extra (amqtt)"
            ) from exc
        config = {
            "listeners": {"default": {"type": "tcp", "bind": f"127.0.0.1:{self.port}"}},
            "sys_interval": 0,
            "auth": {"allow-anonymous": True, "plugins": ["auth_anonymous"]},
            "topic-check": {"enabled": False},
        }
        self._amqtt = Broker(config)
        await self._amqtt.start()

    async def _wait_open(self, timeout_s: float = 10.0) -> None:
        loop = asyncio.get_running_loop()
        deadline = loop.time() + timeout_s
        while True:
            if self._proc is not None and self._proc.returncode is not None:
                log = (self.workdir / "mosquitto.log").read_text(errors="replace")
                raise BrokerUnavailableError(f"mosquitto exited at start: {log[-500:]}")
            try:
                _, writer = await asyncio.open_connection(self.host, self.port)
            except OSError:
                if loop.time() > deadline:
                    raise BrokerUnavailableError(
                        f"broker did not open port {self.port} in {timeout_s} s"
                    ) from None
                await asyncio.sleep(0.01)
                continue
            writer.close()
            with contextlib.suppress(OSError):
                await writer.wait_closed()
            return

    async def stop(self) -> None:
        """End the broker gracefully (mosquitto saves its persistence on SIGTERM)."""
        await self._end(signal.SIGTERM)

    async def kill(self) -> None:
        """End the broker abruptly, as a power cut or an OOM kill would."""
        await self._end(signal.SIGKILL)

    async def _end(self, sig: signal.Signals) -> None:
        if self._proc is not None:
            if self._proc.returncode is None:
                self._proc.send_signal(sig)
                await self._proc.wait()
            self._proc = None
        if self._amqtt is not None:
            await self._amqtt.shutdown()
            self._amqtt = None

    def wipe(self) -> None:
        """Delete the broker's persistence (only while it is stopped)."""
        for f in self.workdir.glob("*.db"):
            f.unlink()

    async def __aenter__(self) -> Self:
        await self.start()
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        await self.stop()
        if self._own_dir:
            shutil.rmtree(self.workdir, ignore_errors=True)

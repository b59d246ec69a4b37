"""Short version of the kill loop (``deploy/killloop.py``) for every test run.

``clampd run`` runs as a real subprocess against mosquitto and the virtual GATT wrenches and
is ended by SIGKILL five times at seeded random moments, once or more during a broker
outage; the script's own checks must find nothing broken: after every kill the outbox file
passes SQLite's integrity check and stores no id twice, and after the last restart every
stored result reaches the MES, nothing reaches it that was not stored, and a repeat carries
the same bytes. The 50-kill run and its figures are in deploy/SECURITY.md.

References: SQLite "PRAGMA integrity_check" (sqlite.org/pragma.html); MQTT 5.0 §4.3.2 (QoS 1
is at least once: the MES may see repeats, never gaps); POSIX SIGKILL (no handler runs).
The station and joints are the demo scenario's invented data.
"""

from __future__ import annotations

import importlib.util
import signal
import sys
from pathlib import Path
from types import ModuleType

import pytest

from clampd.simulators._broker import mosquitto_path

KILLLOOP = Path(__file__).resolve().parents[1] / "deploy" / "killloop.py"


def _load() -> ModuleType:
    spec = importlib.util.spec_from_file_location("clampd_killloop", KILLLOOP)
    assert spec is not None
    assert spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look their module up by name
    spec.loader.exec_module(module)
    return module


@pytest.mark.slow
@pytest.mark.skipif(mosquitto_path() is None, reason="the kill loop runs mosquitto")
async def test_five_sigkills_of_the_daemon_lose_nothing_judged(tmp_path: Path) -> None:
    killloop = _load()
    # Half the lives with a broker outage before the kill: "stored, not published, killed"
    # is then all but certain to happen in five kills.
    options = killloop.KillLoopOptions(kills=5, seed=3, out=tmp_path, outage_share=0.5)
    report = await killloop.kill_loop(options)
    assert killloop.violations(report) == [], report
    assert report["killed_by_sigkill"] == 5
    assert report["daemon_exit_codes_on_kill"] == [-signal.SIGKILL]
    assert len(report["after_each_kill"]) == 5
    assert all(k["integrity_ok"] for k in report["after_each_kill"])
    assert report["results_stored"] >= 1
    assert report["mes_unique"] == report["results_stored"]
    assert report["mes_missing"] == []
    assert report["results_unsent_at_end"] == 0

"""What a user of the ``clampd`` command meets first: the paths, hints and cautions it prints.

Sources beside the checks:
- README.md ("What the demo shows"): the demo's closing report names a journal that
  ``clampd results --db`` reads, from the folder where the demo ran;
- Python documentation, ``signal`` module, "Note on SIGPIPE": a command whose reader closes
  the pipe should leave quietly, without a traceback (exit status 1 there);
- Python Packaging User Guide, core metadata ``Version`` via ``importlib.metadata``;
- protocol/MQTT.md: ``RundownResult.status`` is ``OK`` or ``NOK``;
- the cautions every output carries (README, "Safety"): the joint designer's
  specification, local codes and licensed practice.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import uuid
from importlib.metadata import version
from pathlib import Path

import pytest

from clampd.daemon.cli import main
from clampd.daemon.runtime import Outbox

CLAMPD = [sys.executable, "-m", "clampd.daemon.cli"]
DATA = Path(__file__).parent / "data"
EXAMPLE = Path(__file__).parent.parent / "deploy" / "station.example.toml"


def _journal(path: Path, statuses: list[str]) -> list[str]:
    """A real outbox file with one stored result per status, oldest first."""
    ids = [str(uuid.UUID(int=i + 1, version=4)) for i in range(len(statuses))]
    with Outbox(path) as ob:
        for i, (rid, status) in enumerate(zip(ids, statuses, strict=True)):
            payload = json.dumps({"id": rid, "status": status}).encode()
            ob.put(
                rid,
                "plant/area/line/st-1/result",
                payload,
                station="st-1",
                wrench="w-1",
                program="p-1",
                part_id=f"P-{i:03d}",
                status=status,
                finished_at=f"2026-05-12T07:41:{i:02d}Z",
            )
    return ids


# -- the demo's report ------------------------------------------------------------------------


@pytest.mark.slow
def test_demo_journal_path_works_when_the_output_folder_is_relative(tmp_path: Path) -> None:
    # `make demo` runs `clampd demo` with the default, relative `demo-output`.
    proc = subprocess.run(
        [*CLAMPD, "demo", "--parts", "1", "--plain"],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        timeout=240,
        env={**os.environ, "PYTHONUNBUFFERED": "1"},
        check=False,
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    match = re.search(r"^journal: (\S+)", proc.stdout, re.MULTILINE)
    assert match, proc.stdout
    journal = Path(match.group(1))
    assert journal.is_absolute()
    # Where the report says, and nowhere else: one journal in the run's folder.
    assert journal.is_file()
    assert journal.parent.parent.parent == tmp_path / "demo-output"
    assert len(list(tmp_path.rglob("outbox.sqlite3"))) == 1
    listed = subprocess.run(
        [*CLAMPD, "results", "--db", str(journal), "--json"],
        cwd=Path(journal.anchor),  # from another directory too
        capture_output=True,
        text=True,
        timeout=60,
        check=True,
    )
    assert len(json.loads(listed.stdout)) >= 7  # one deck: 4 spindle bolts, 3 guard screws
    # The put -> MES latency line needs the journal the report names.
    assert "stored -> MES arrival" in proc.stdout


# -- results ----------------------------------------------------------------------------------


def test_results_status_filter_takes_either_case(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    db = tmp_path / "journal.db"
    ids = _journal(db, ["OK", "NOK", "OK"])
    assert main(["results", "--db", str(db), "--status", "nok", "--json"]) == 0
    assert [r["id"] for r in json.loads(capsys.readouterr().out)] == [ids[1]]


def test_results_status_filter_refuses_a_status_that_cannot_exist(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    db = tmp_path / "journal.db"
    _journal(db, ["OK"])
    with pytest.raises(SystemExit) as exc:
        main(["results", "--db", str(db), "--status", "fail"])
    assert exc.value.code == 2
    assert "invalid choice" in capsys.readouterr().err


def test_results_list_says_when_rows_were_left_out(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    db = tmp_path / "journal.db"
    ids = _journal(db, ["OK", "NOK", "OK", "OK"])
    assert main(["results", "--db", str(db), "--limit", "3"]) == 0
    out, err = capsys.readouterr()
    assert len(out.splitlines()) == 4  # header and three rows
    assert ids[0] not in out
    assert "newest 3 shown" in err
    assert "--limit" in err
    # All of them fit: no hint.
    assert main(["results", "--db", str(db), "--limit", "4"]) == 0
    out, err = capsys.readouterr()
    assert len(out.splitlines()) == 5
    assert err == ""


# -- check-config -----------------------------------------------------------------------------


def test_check_config_points_to_no_file_checks_for_a_missing_tls_file(
    capsys: pytest.CaptureFixture[str],
) -> None:
    # The example names /etc/clampd/tls/... files that exist only on a station board.
    assert main(["check-config", str(EXAMPLE), "--ignore-env"]) == 2
    err = capsys.readouterr().err
    assert "broker.tls_ca: no such file" in err
    assert "hint:" in err
    assert "--no-file-checks" in err
    assert main(["check-config", str(EXAMPLE), "--ignore-env", "--no-file-checks"]) == 0


def test_check_config_names_the_environment_override_behind_an_error(
    capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("CLAMPD__BROKER__KEEPALIVE_S", "thirty")
    assert main(["check-config", str(EXAMPLE), "--no-file-checks"]) == 2
    err = capsys.readouterr().err
    assert "broker.keepalive_s" in err
    assert "CLAMPD__BROKER__KEEPALIVE_S" in err
    assert "--ignore-env" in err
    # The file alone is fine.
    assert main(["check-config", str(EXAMPLE), "--no-file-checks", "--ignore-env"]) == 0


# -- replay -----------------------------------------------------------------------------------


def test_replay_prints_the_whole_caution(capsys: pytest.CaptureFixture[str]) -> None:
    program = DATA / "program_torque_angle.toml"
    assert main(["replay", "--program", str(program), str(DATA / "rundown_demo.csv")]) == 0
    last = capsys.readouterr().out.strip().splitlines()[-1]
    assert "joint designer's specification" in last
    assert "local codes" in last
    assert "licensed practice" in last


# -- plan -------------------------------------------------------------------------------------


def test_plan_help_names_the_default_method_and_what_program_out_needs(
    capsys: pytest.CaptureFixture[str],
) -> None:
    with pytest.raises(SystemExit):
        main(["plan", "--help"])
    out = " ".join(capsys.readouterr().out.split())
    assert "(default torque-angle)" in out
    assert "--program-out: torque-angle or yield" in out
    # And the default is what a plan without --method uses.
    argv = "plan --thread M10 --class 8.8 --grip-mm 30 --mu-thread 0.12 --mu-head 0.12 --json"
    assert main(argv.split()) == 0
    assert json.loads(capsys.readouterr().out)["inputs"]["method"] == "torque-angle"


# -- the command itself -----------------------------------------------------------------------


def test_version_is_the_installed_distribution_version(
    capsys: pytest.CaptureFixture[str],
) -> None:
    with pytest.raises(SystemExit) as exc:
        main(["--version"])
    assert exc.value.code == 0
    assert capsys.readouterr().out.strip() == f"clampd {version('clampd')}"


def test_help_carries_the_caution(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit):
        main(["--help"])
    out = " ".join(capsys.readouterr().out.split())
    assert "never replace, the joint designer's specification" in out


def test_a_reader_that_closes_the_pipe_gets_no_traceback() -> None:
    # The reader is gone before clampd writes its first byte (closed right after the start;
    # the child holds only the write end), so every write meets a closed pipe.
    proc = subprocess.Popen([*CLAMPD, "schema"], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    assert proc.stdout is not None
    assert proc.stderr is not None
    proc.stdout.close()
    err = proc.stderr.read().decode()
    proc.stderr.close()
    assert proc.wait(timeout=60) == 1
    assert "Traceback" not in err
    assert "BrokenPipeError" not in err

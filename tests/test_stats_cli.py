"""``clampd stats``: the report, its JSON and the control chart from a real SQLite journal.

Sources beside the checks: means and standard deviations from numpy (``std(ddof=1)``); the X̄
limit from the published Shewhart table (A2 = 0.577 for n = 5, ASTM MNL 7 / Montgomery
Appendix VI, from memory); the PNG signature and IHDR layout from the PNG specification
(ISO/IEC 15948, W3C PNG 2nd ed. §5.2 and §11.2.2); pixels read back with matplotlib's own
``imread``. Results are the demo scenario's invented data (protocol/examples/RundownResult.json),
built with the protocol's model and stored with the real ``Outbox``.
"""

from __future__ import annotations

import datetime as dt
import json
import struct
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt
import pytest
from matplotlib import image as mpimg

from clampd.daemon.cli import main
from clampd.daemon.runtime import Outbox
from clampd.protocol import RundownResult, new_uuid7

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE: dict[str, Any] = json.loads(
    (ROOT / "protocol" / "examples" / "RundownResult.json").read_text()
)
TOPIC = "brackenfield/deck-assembly/line-3/st-120/result"
T0 = dt.datetime(2026, 5, 12, 6, 0, tzinfo=dt.UTC)
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG spec §5.2
ALARM_ORANGE = np.array([0xD6, 0x89, 0x10]) / 255.0  # the "drift alarm raised" line of _stats.py


def result(i: int, torque: float, angle: float, wrench: str = "wr-07") -> RundownResult:
    d = json.loads(json.dumps(EXAMPLE))
    finished = T0 + dt.timedelta(seconds=40 * i)
    d["id"] = new_uuid7()
    d["wrench"]["wrench_id"] = wrench
    d["joint_position"] = f"spindle-bolt-{1 + i % 2}"
    d["started_at"] = (finished - dt.timedelta(seconds=2)).isoformat()
    d["finished_at"] = finished.isoformat()
    d["final_torque_nm"] = torque
    d["peak_torque_nm"] = torque + 0.01
    d["final_angle_deg"] = angle
    ok = 40.0 <= torque <= 58.0 and 28.0 <= angle <= 34.0
    d["status"] = "OK" if ok else "NOK"
    d["reasons"] = [] if ok else ["torque_high" if torque > 58.0 else "torque_low"]
    return RundownResult.model_validate(d, strict=False)


def journal(path: Path, results: list[RundownResult], garbage: int = 0) -> Path:
    with Outbox(path) as ob:
        for r in results:
            ob.put(
                r.id,
                TOPIC,
                r.to_json_bytes(),
                station=r.station,
                wrench=r.wrench.wrench_id,
                program=r.program.program_id,
                part_id=r.part_id,
                status=r.status.value,
                finished_at=r.finished_at,
            )
        for _ in range(garbage):
            ob.put(new_uuid7(), TOPIC, b'{"kind": "result", "torn": tru')
    return path


def series(seed: int, n: int, drift_from: int | None = None) -> npt.NDArray[np.float64]:
    torques = 47.5 + 0.9 * np.random.default_rng(seed).standard_normal(n)
    if drift_from is not None:
        torques[drift_from:] += 0.05 * 0.9 * np.arange(1, n - drift_from + 1)
    return np.round(torques, 3)


def build(tmp_path: Path, torques: npt.NDArray[np.float64], **kw: int) -> Path:
    angles = np.round(30.2 + 0.4 * np.random.default_rng(99).standard_normal(len(torques)), 3)
    results = [
        result(i, float(t), float(a)) for i, (t, a) in enumerate(zip(torques, angles, strict=True))
    ]
    return journal(tmp_path / "outbox.sqlite3", results, **kw)


def test_table_shows_each_group_with_numpy_figures(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    torques = series(1, 120)
    db = build(tmp_path, torques, garbage=2)
    assert main(["stats", "--db", str(db)]) == 0
    captured = capsys.readouterr()
    assert "skipped 2 journal entries" in captured.err
    lines = captured.out.splitlines()
    assert lines[0].split()[:4] == ["program", "group", "quantity", "n"]
    wrench_torque = next(line for line in lines if "wrench wr-07" in line and "torque" in line)
    cells = wrench_torque.split()
    last = torques[-50:]
    # program, "wrench", id, "torque", "[N·m]", n, ok, nok, mean, s, ...
    assert cells[5:8] == ["50", "50", "0"]
    assert float(cells[8]) == pytest.approx(float(last.mean()), abs=0.0005)
    assert float(cells[9]) == pytest.approx(float(last.std(ddof=1)), abs=0.0005)
    assert wrench_torque.rstrip().endswith("in control")
    assert sum("position spindle-bolt" in line for line in lines) == 4  # 2 positions × 2
    assert "joint designer's specification" in lines[-1]


def test_json_report_and_filters(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    torques = series(2, 110)
    db = build(tmp_path, torques)
    assert main(["stats", "--db", str(db), "--json", "--window", "30"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert (report["window"], report["results"], report["skipped"]) == (30, 110, 0)
    wrench = next(g for g in report["groups"] if g["kind"] == "wrench")
    t = wrench["final_torque_nm"]
    assert t["n"] == 30
    assert t["mean"] == pytest.approx(float(torques[-30:].mean()), rel=1e-12)
    assert t["std"] == pytest.approx(float(torques[-30:].std(ddof=1)), rel=1e-10)
    base = torques[:100].reshape(20, 5)
    rbar = float(np.ptp(base, axis=1).mean())
    assert t["chart"]["xbar_ucl"] == pytest.approx(float(base.mean()) + 0.577 * rbar, rel=1e-12)
    assert len(t["points"]) == 22  # 110 results in subgroups of 5
    assert (t["lsl"], t["usl"]) == (40.0, 58.0)
    assert main(["stats", "--db", str(db), "--json", "--wrench", "wr-99"]) == 0
    assert json.loads(capsys.readouterr().out)["groups"] == []
    assert main(["stats", "--db", str(db), "--wrench", "wr-99"]) == 0
    assert "no results" in capsys.readouterr().out


def _orange_pixels(png: Path) -> int:
    img: npt.NDArray[np.float64] = np.asarray(mpimg.imread(png), dtype=np.float64)
    # 0.15 per channel keeps antialiased edges of the thin line and excludes the red limits.
    return int(np.all(np.abs(img[..., :3] - ALARM_ORANGE) < 0.15, axis=-1).sum())


def test_plot_draws_the_chart_and_marks_the_drift(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    drifting = build(tmp_path / "a", series(3, 300, drift_from=150))
    stable = build(tmp_path / "b", series(4, 300))
    out = tmp_path / "drift.png"
    assert main(["stats", "--db", str(drifting), "--plot", str(out)]) == 0
    printed = capsys.readouterr().out
    assert printed.splitlines()[-1] == f"wrote {out}"
    assert "DRIFT" in printed
    data = out.read_bytes()
    assert data[:8] == PNG_SIGNATURE
    length, kind, width, height = struct.unpack(">I4sII", data[8:24])  # IHDR, spec §11.2.2
    assert (length, kind, width, height) == (13, b"IHDR", 900, 600)
    quiet = tmp_path / "stable.png"
    assert main(["stats", "--db", str(stable), "--plot", str(quiet)]) == 0
    # The alarm line is drawn only where an alarm was raised.
    assert _orange_pixels(out) > 50
    assert _orange_pixels(quiet) == 0
    again = tmp_path / "again.png"
    assert main(["stats", "--db", str(drifting), "--plot", str(again), "--json"]) == 0
    assert again.read_bytes() == data  # deterministic bytes
    angle = tmp_path / "angle.png"
    assert main(["stats", "--db", str(drifting), "--plot", str(angle), "--quantity", "angle"]) == 0
    assert angle.read_bytes()[:8] == PNG_SIGNATURE


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (["--window", "1"], "--window must be at least 2"),
        (["--plot", "chart.jpg"], "must name a .png"),
        (["--plot", "/nonexistent-dir/chart.png"], "does not exist"),
    ],
)
def test_bad_options_exit_2_with_one_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], extra: list[str], message: str
) -> None:
    db = build(tmp_path, series(5, 10))
    assert main(["stats", "--db", str(db), *extra]) == 2
    err = capsys.readouterr().err
    assert message in err
    assert len(err.strip().splitlines()) == 1


def test_missing_journal_and_ambiguous_plot_exit_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    missing = tmp_path / "none.sqlite3"
    assert main(["stats", "--db", str(missing)]) == 2
    assert "no journal" in capsys.readouterr().err
    assert not missing.exists()  # never creates a journal
    two = [result(i, 47.0 + 0.1 * i, 30.0, wrench=f"wr-0{1 + i % 2}") for i in range(6)]
    db = journal(tmp_path / "two.sqlite3", two)
    assert main(["stats", "--db", str(db), "--plot", str(tmp_path / "c.png")]) == 2
    err = capsys.readouterr().err
    assert "found 2: spindle-m10-8.8/wr-01, spindle-m10-8.8/wr-02" in err
    assert not (tmp_path / "c.png").exists()

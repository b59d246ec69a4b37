"""``clampd plot``: a result from a real journal file drawn to a PNG.

Sources beside the checks: the PNG signature and IHDR layout from the PNG specification
(ISO/IEC 15948, W3C PNG 2nd ed. §5.2 and §11.2.2); pixels read back with matplotlib's own
``imread`` (a general-purpose reference reader). The results are the demo scenario's
invented data (protocol/examples/RundownResult.json).
"""

from __future__ import annotations

import copy
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

EXAMPLE = Path(__file__).resolve().parents[1] / "protocol" / "examples" / "RundownResult.json"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG spec §5.2
WINDOW_GREEN = np.array([0x3A, 0x9D, 0x5D]) / 255.0  # the window shade colour of _plot.py


def example() -> dict[str, Any]:
    data: dict[str, Any] = json.loads(EXAMPLE.read_text())
    return data


def journal_with(tmp_path: Path, *payloads: dict[str, Any]) -> Path:
    db = tmp_path / "journal" / "outbox.sqlite3"
    with Outbox(db) as ob:
        for p in payloads:
            ob.put(
                p["id"],
                "brackenfield/deck-assembly/line-3/st-120/result",
                json.dumps(p).encode(),
                station=p["station"],
                wrench=p["wrench"]["wrench_id"],
                program=p["program"]["program_id"],
                part_id=p["part_id"],
                status=p["status"],
                finished_at=p["finished_at"],
            )
    return db


def shaded_fraction(png: Path) -> float:
    """Share of pixels that are the window colour blended at 15 % over white."""
    img: npt.NDArray[np.float64] = np.asarray(mpimg.imread(png), dtype=np.float64)
    blend = 1.0 - 0.15 * (1.0 - WINDOW_GREEN)
    close = np.all(np.abs(img[..., :3] - blend) < 0.02, axis=-1)
    return float(close.mean())


def test_plot_writes_a_png_of_the_right_size_with_the_window_drawn(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    ok = example()
    bare = copy.deepcopy(ok)
    bare["id"] = "0196c36e-4f0a-7b21-9c3d-5e8f1a2b3c4f"
    bare["windows"] = None
    db = journal_with(tmp_path, ok, bare)
    out = tmp_path / "curve.png"
    assert main(["plot", ok["id"], "--db", str(db), "--out", str(out)]) == 0
    assert capsys.readouterr().out.strip() == f"wrote {out}"
    data = out.read_bytes()
    assert data[:8] == PNG_SIGNATURE
    # IHDR is the first chunk: length, type, width, height (big-endian u32; spec §11.2.2).
    length, kind, width, height = struct.unpack(">I4sII", data[8:24])
    assert (length, kind) == (13, b"IHDR")
    assert (width, height) == (800, 500)
    assert mpimg.imread(out).shape[:2] == (500, 800)
    # The window box is visible; without windows there is no shade at all.
    out_bare = tmp_path / "bare.png"
    assert main(["plot", bare["id"], "--db", str(db), "--out", str(out_bare)]) == 0
    assert shaded_fraction(out) > 0.002
    assert shaded_fraction(out_bare) == 0.0


def test_same_result_same_bytes(tmp_path: Path) -> None:
    result = example()
    db = journal_with(tmp_path, result)
    a, b = tmp_path / "a.png", tmp_path / "b.png"
    assert main(["plot", result["id"], "--db", str(db), "--out", str(a)]) == 0
    assert main(["plot", result["id"], "--db", str(db), "--out", str(b)]) == 0
    assert a.read_bytes() == b.read_bytes()


def test_nok_with_yield_point_and_torque_window_only(tmp_path: Path) -> None:
    nok = example()
    nok["status"] = "NOK"
    nok["reasons"] = ["angle_high"]
    nok["yield_point"] = {"torque_nm": 46.0, "angle_deg": 25.0}
    nok["windows"] = {
        "torque_min_nm": 40.0,
        "torque_max_nm": 58.0,
        "angle_min_deg": None,
        "angle_max_deg": None,
    }
    db = journal_with(tmp_path, nok)
    out = tmp_path / "nok.png"
    assert main(["plot", nok["id"], "--db", str(db), "--out", str(out)]) == 0
    # A torque band spans the full width: more shade than a box would.
    assert shaded_fraction(out) > 0.05


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--out", "{tmp}/x.png", "--db", "{tmp}/missing.sqlite3"], "no journal at"),
        (["--out", "{tmp}/nodir/x.png", "--db", "{db}"], "does not exist"),
        (["--out", "{tmp}/x.jpg", "--db", "{db}"], "must name a .png"),
    ],
)
def test_bad_input_is_a_one_line_error_and_writes_nothing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], args: list[str], message: str
) -> None:
    result = example()
    db = journal_with(tmp_path, result)
    argv = [a.format(tmp=tmp_path, db=db) for a in args]
    assert main(["plot", result["id"], *argv]) == 2
    err = capsys.readouterr().err
    assert message in err
    assert err.count("\n") == 1
    assert not (tmp_path / "missing.sqlite3").exists()  # never creates a journal
    assert not list(tmp_path.glob("x.*"))


def test_unknown_id_is_refused(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    db = journal_with(tmp_path, example())
    other = "0196c36e-4f0a-7b21-9c3d-000000000000"
    assert main(["plot", other, "--db", str(db), "--out", str(tmp_path / "x.png")]) == 2
    assert f"no result {other}" in capsys.readouterr().err
    assert not (tmp_path / "x.png").exists()


def test_a_stored_row_that_is_no_valid_result_is_a_one_line_error(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # A damaged or foreign row: two fields break the contract (MQTT.md, result payload), so
    # pydantic's own report would run over several lines.
    broken = example()
    broken["final_torque_nm"] = "plenty"
    del broken["curve"]
    db = journal_with(tmp_path, broken)
    out = tmp_path / "x.png"
    assert main(["plot", broken["id"], "--db", str(db), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1
    assert "not a valid result" in err
    assert "2 problems" in err
    assert not out.exists()

"""`clampd replay`: run the engine over recorded samples and print the judged rundown.

The CSV has a header naming at least ``t_s,torque_nm,rate_dps`` (rate about the fastener
axis, positive when tightening; rows in time order; extra columns are ignored). Rows are fed
to the engine in frames of ``--frame`` samples (the result does not depend on it: the engine
is sample-exact). If the file ends while a rundown is still in progress, the rundown is ended
the way a station would end it: by its timeout (NOK ``timeout``).

Indices in the output are 0-based data rows; angles are degrees from snug (the rundown angle:
from the first turn to snug). The program's error-proofing checks (prevailing torque, rundown
angle, joint rate, re-hit, torque falling while turning) are listed with their measured value,
limits and verdict; a failed check's reason is among the rundown's reasons. With several
rundowns in one file the first is printed (``rundowns`` says how many there were).

Results support, never replace, the joint designer's specification, local codes and licensed
practice.

Exit status: 0 replayed (OK or NOK alike), 2 bad input (unreadable or invalid program or CSV,
no rundown in the file) with a one-line error on stderr.
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import sys
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

from clampd.daemon.engine import (
    Check,
    CheckOutcome,
    Engine,
    EngineSettings,
    EngineUsageError,
    Event,
    ProgramError,
    RundownFinished,
    RundownResult,
    SensorDataError,
    load_program,
)
from clampd.protocol import format_torque

__all__ = ["ReplayInputError", "add_arguments", "read_samples", "result_as_dict", "run"]

_COLUMNS = ("t_s", "torque_nm", "rate_dps")
# Frame size when replaying: the profile's 22-sample frame (any size gives the same result).
_FRAME = 22


class ReplayInputError(ValueError):
    """The samples file cannot be replayed (the caller's input)."""


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Declare the program, the samples file and the output format."""
    parser.add_argument(
        "--program", required=True, type=Path, help="program file (TOML, one [program])"
    )
    parser.add_argument("samples", type=Path, help="CSV with header t_s,torque_nm,rate_dps")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.add_argument(
        "--deflection", type=float, default=0.0, help="wrench deflection, deg per N·m (default 0)"
    )
    parser.add_argument("--frame", type=int, default=_FRAME, help="samples per fed frame")


def read_samples(
    path: Path,
) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64], npt.NDArray[np.float64]]:
    """Read the three columns; raise ``ReplayInputError`` naming the line on any bad row."""
    try:
        fh = path.open(newline="", encoding="utf-8")
    except OSError as exc:
        raise ReplayInputError(f"cannot read {path}: {exc.strerror or exc}") from None
    with fh:
        reader = csv.reader(fh)
        try:
            header = next(reader)
        except StopIteration:
            raise ReplayInputError(
                f"{path}: empty file (expected header t_s,torque_nm,rate_dps)"
            ) from None
        except (csv.Error, UnicodeDecodeError) as exc:
            raise ReplayInputError(f"{path}: not a CSV file ({exc})") from None
        names = [h.strip() for h in header]
        missing = [c for c in _COLUMNS if c not in names]
        if missing:
            raise ReplayInputError(
                f"{path}: header lacks {', '.join(missing)} (expected t_s,torque_nm,rate_dps)"
            )
        cols = [names.index(c) for c in _COLUMNS]
        rows: list[tuple[float, float, float]] = []
        try:
            for row in reader:
                line = reader.line_num
                if not row or all(not c.strip() for c in row):
                    continue
                try:
                    vals = tuple(float(row[i]) for i in cols)
                except (ValueError, IndexError):
                    raise ReplayInputError(
                        f"{path} line {line}: expected three numbers, got {row!r}"
                    ) from None
                if not all(math.isfinite(v) for v in vals):
                    raise ReplayInputError(f"{path} line {line}: value is not finite: {row!r}")
                rows.append((vals[0], vals[1], vals[2]))
        except (csv.Error, UnicodeDecodeError) as exc:
            raise ReplayInputError(f"{path}: not a CSV file ({exc})") from None
    if not rows:
        raise ReplayInputError(f"{path}: no data rows")
    arr = np.asarray(rows, dtype=np.float64)
    return arr[:, 0].copy(), arr[:, 1].copy(), arr[:, 2].copy()


def _replay(
    engine: Engine,
    t: npt.NDArray[np.float64],
    T: npt.NDArray[np.float64],
    r: npt.NDArray[np.float64],
    frame: int,
) -> list[Event]:
    events: list[Event] = []
    for a in range(0, t.shape[0], frame):
        events += engine.feed(t[a : a + frame], T[a : a + frame], r[a : a + frame])
    if engine.state.value != "idle":  # the file ended mid-rundown: end it as the station would
        timeout = engine.program.timeout_s or engine.settings.timeout_s
        events += engine.tick(float(t[-1]) + timeout + 1.0)
    return events


def _summary(res: RundownResult, count: int) -> str:
    lines = [
        f"rundown: {res.status.value}"
        + (f" ({', '.join(r.value for r in res.reasons)})" if res.reasons else ""),
        f"program: {res.program_id} v{res.program_version}, strategy {res.strategy}",
        f"rows {res.start_index}..{res.end_index}, t {res.start_t_s:.4f}..{res.end_t_s:.4f} s",
    ]
    if res.snug:
        lines.append(f"snug: row {res.snug.index}, {format_torque(res.snug.torque_nm)}")
    else:
        lines.append("snug: not reached")
    if res.stop:
        lines.append(
            f"stop: row {res.stop.index} ({res.stop.trigger.value}), "
            f"{format_torque(res.stop.torque_nm)}, {res.stop.angle_deg:.2f}° from snug"
        )
    for c in res.cues:
        lines.append(f"cue {c.kind.value} (step {c.step}): row {c.index}")
    lines.append(
        f"final: {format_torque(res.final_torque_nm)}, {res.final_angle_deg:.2f}° from snug"
    )
    lines.append(f"peak torque: {format_torque(res.peak_torque_nm)}")
    if res.yield_point:
        y = res.yield_point
        lines.append(f"yield: row {y.index}, {y.torque_nm:.2f} N·m at {y.angle_deg:.2f}°")
    if res.joint_rate_nm_per_deg is not None:
        lines.append(
            f"joint rate: {res.joint_rate_nm_per_deg:.4f} N·m/deg (r² {res.joint_rate_r2:.4f})"
        )
    if res.prevailing_torque_nm is not None:
        lines.append(f"prevailing torque: {format_torque(res.prevailing_torque_nm)}")
    if res.rundown_angle_deg is not None:
        lines.append(f"rundown angle (first turn to snug): {res.rundown_angle_deg:.1f}°")
    if res.contact_to_snug_deg is not None:
        lines.append(f"first contact to snug: {res.contact_to_snug_deg:.1f}°")
    lines.extend(_check_line(c) for c in res.checks)
    if count > 1:
        lines.append(f"({count} rundowns in the file; the first is shown)")
    lines.append(
        "Results support, never replace, the joint designer's specification, local codes "
        "and licensed practice."
    )
    return "\n".join(lines)


# How each check's value and limits read (unit, and whether the limits form a window).
_CHECK_UNITS = {
    Check.PREVAILING_TORQUE: "N·m",
    Check.RUNDOWN_ANGLE: "°",
    Check.JOINT_RATE: "N·m/deg",
    Check.REHIT: "°",
    Check.TORQUE_DROP: "of peak",
}


def _check_line(c: CheckOutcome) -> str:
    unit = _CHECK_UNITS[c.check]
    verdict = {True: "pass", False: "FAIL", None: "not measured"}[c.passed]
    value = "—" if c.value is None else f"{c.value:.4g} {unit}"
    if c.check is Check.REHIT:
        limits = f"re-hit at ≤ {c.low:.4g} {unit} to snug"
    elif c.check is Check.TORQUE_DROP:
        limits = f"fall ≥ {c.high:.4g} {unit} while turning"
    else:
        limits = f"window [{c.low:.4g}, {c.high:.4g}] {unit}"
    where = "" if c.index is None else f" at row {c.index}"
    return f"check {c.check.value}: {verdict}{where} ({value}; {limits})"


def result_as_dict(res: RundownResult, count: int) -> dict[str, Any]:
    """The JSON object: the result's summary and how many rundowns the file held."""
    d = res.to_dict()
    d["rundowns"] = count
    return d


def run(args: argparse.Namespace) -> int:
    """Replay; exit 0 with the judged rundown, 2 on bad input (one line on stderr)."""
    try:
        if args.frame < 1:
            raise ReplayInputError(f"--frame must be at least 1, got {args.frame}")
        program = load_program(args.program)
        t, T, r = read_samples(args.samples)
        engine = Engine(program, EngineSettings(deflection_deg_per_nm=args.deflection))
        events = _replay(engine, t, T, r, args.frame)
    except ProgramError as exc:
        print(f"clampd replay: {args.program}: {exc}", file=sys.stderr)
        return 2
    except SensorDataError as exc:
        line = "" if exc.index is None else f" line {exc.index + 2}"
        print(f"clampd replay: {args.samples}{line}: {exc}", file=sys.stderr)
        return 2
    except (ReplayInputError, EngineUsageError) as exc:
        print(f"clampd replay: {exc}", file=sys.stderr)
        return 2
    results = [e.result for e in events if isinstance(e, RundownFinished)]
    if not results:
        print(
            f"clampd replay: {args.samples}: no rundown (torque never reached the start level "
            f"of {engine.settings.start_torque_nm} N·m)",
            file=sys.stderr,
        )
        return 2
    res = results[0]
    if args.json:
        print(json.dumps(result_as_dict(res, len(results))))
    else:
        print(_summary(res, len(results)))
    return 0

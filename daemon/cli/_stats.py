"""``clampd stats``: capability, control-chart state and drift alarms from the journal.

Replays every result in the station's journal (the outbox database), in the order it was
stored, through the same ``QualityTracker`` the running station uses, and prints per program ×
wrench and per program × joint position: counts, mean and standard deviation of final torque
and final angle over the last ``--window`` results, Cm/Cmk and Cp/Cpk against the program's
windows, and the X̄–R chart's state (baseline progress, in control, or drifting with the
run-rule tests that fired). ``--plot FILE.png`` draws the X̄ and R charts of one program on one
wrench. Like ``clampd results`` this command only reads and never creates a journal.

Journal entries that are not valid results (a damaged or foreign row) are skipped and counted
on stderr; they do not stop the report. The figures describe measured results; they support,
and never replace, the joint designer's specification, local codes and licensed practice.

Exit status: 0 printed (also when nothing matched), 2 bad input (one line on stderr).
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import sys
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from clampd.daemon.cli._journal import JournalError, add_journal_arguments, open_journal
from clampd.daemon.cli._png import png_output_problem
from clampd.daemon.quality import (
    ChartPoint,
    GroupSnapshot,
    MonitorSettings,
    QualityTracker,
    QuantitySummary,
    TrackerSettings,
)
from clampd.daemon.runtime._outbox import Outbox, OutboxError
from clampd.protocol import RundownResult

__all__ = ["add_arguments", "collect", "plot_chart", "run"]

CAUTION = (
    "Figures describe measured results only; they support, never replace, the joint "
    "designer's specification, local codes and licensed practice."
)
# Every subgroup point is kept for the report: a year of a busy station is ~10^5 points,
# a few MB in memory for one command run (our estimate).
_CLI_HISTORY = 1_000_000
# 9 x 6 in at 100 dpi = 900 x 600 px: two charts stacked, readable on a station screen.
FIGURE_SIZE_IN = (9.0, 6.0)
DPI = 100
_UNITS = {"torque": "N·m", "angle": "deg"}
_MONITOR = MonitorSettings(history=_CLI_HISTORY)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of ``clampd stats``."""
    add_journal_arguments(parser)
    parser.add_argument("--program", help="only results of this program id")
    parser.add_argument("--wrench", help="only results of this wrench id")
    parser.add_argument(
        "--window", type=int, default=TrackerSettings().window, help="rolling window (default 50)"
    )
    parser.add_argument("--json", action="store_true", help="machine-readable output")
    parser.add_argument(
        "--plot", type=Path, metavar="FILE.png", help="draw the X̄–R chart of one program × wrench"
    )
    parser.add_argument(
        "--quantity",
        choices=("torque", "angle"),
        default="torque",
        help="what --plot draws (default: final torque)",
    )


def _fail(message: str) -> int:
    print(f"clampd stats: {message}", file=sys.stderr)
    return 2


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Collected:
    """What a journal replay produced: the tracker's groups and how many rows were skipped."""

    snapshots: list[GroupSnapshot]
    results: int
    skipped: int


def collect(
    journal: Outbox, *, window: int, program: str | None = None, wrench: str | None = None
) -> Collected:
    """Replay the journal's results (append order) through a fresh tracker.

    Rows whose payload is not a valid result are counted in ``skipped``. Raises OutboxError
    for an unreadable journal and ValueError for a window below 2.
    """
    settings = TrackerSettings(window=window, monitor=_MONITOR)
    tracker = QualityTracker(settings)
    used = skipped = 0
    for entry in journal.iter_all():
        try:
            result = RundownResult.model_validate_json(entry.payload, strict=False)
        except (ValidationError, ValueError):
            skipped += 1
            continue
        if program is not None and result.program.program_id != program:
            continue
        if wrench is not None and result.wrench.wrench_id != wrench:
            continue
        tracker.add(result)
        used += 1
    return Collected(
        snapshots=[tracker.snapshot(k) for k in tracker.groups()], results=used, skipped=skipped
    )


def run(args: argparse.Namespace) -> int:
    """Print the report (and draw the chart); 2 with a one-line error for bad input."""
    if args.window < 2:
        return _fail(f"--window must be at least 2, got {args.window}")
    plot: Path | None = args.plot
    problem = None if plot is None else png_output_problem(plot, "--plot")
    if problem is not None:
        return _fail(problem)
    try:
        journal, path = open_journal(args)
    except JournalError as exc:
        return _fail(str(exc))
    try:
        with journal:
            got = collect(journal, window=args.window, program=args.program, wrench=args.wrench)
    except OutboxError as exc:
        return _fail(str(exc))
    if got.skipped:
        print(
            f"clampd stats: skipped {got.skipped} journal entries that are not valid results",
            file=sys.stderr,
        )
    if plot is not None:
        wrench_groups = [s for s in got.snapshots if s.key.kind == "wrench"]
        if len(wrench_groups) != 1:
            found = ", ".join(f"{s.key.program_id}/{s.key.member}" for s in wrench_groups)
            return _fail(
                "--plot draws one program on one wrench; narrow with --program and --wrench"
                f" (found {len(wrench_groups)}: {found or 'none'})"
            )
        plot_chart(wrench_groups[0], args.quantity, plot)
    if args.json:
        print(json.dumps(_report_json(got, path, args.window), indent=2))
    else:
        _print_table(got, path)
    if plot is not None:
        print(f"wrote {plot}", file=sys.stderr if args.json else sys.stdout)
    return 0


def _chart_state(q: QuantitySummary, baseline: int) -> str:
    if q.limits is None:
        return f"baseline {q.baseline_done}/{baseline}"
    if q.limits.range_center == 0:
        return "no spread"
    if q.drift_alarm:
        judged = [p for p in q.points if p.z is not None]
        tests = sorted({int(t) for p in judged[-3:] for t in p.fired})
        return "DRIFT (tests " + ",".join(map(str, tests)) + ")"
    return "in control"


def _num(value: float | None, digits: int = 2) -> str:
    return "-" if value is None else f"{value:.{digits}f}"


def _print_table(got: Collected, path: Path) -> None:
    if not got.snapshots:
        print(f"no results in {path} matching the filters")
        return
    header = (
        "program", "group", "quantity", "n", "ok", "nok",
        "mean", "s", "Cm", "Cmk", "Cp", "Cpk", "chart",
    )  # fmt: skip
    rows: list[tuple[str, ...]] = []
    baseline = _MONITOR.baseline_subgroups
    for snap in got.snapshots:
        for name in ("torque", "angle"):
            q: QuantitySummary = getattr(snap, name)
            rows.append(
                (
                    snap.key.program_id,
                    f"{snap.key.kind} {snap.key.member}",
                    f"{name} [{_UNITS[name]}]",
                    str(q.n),
                    str(snap.ok_count),
                    str(snap.nok_count),
                    _num(q.mean, 3),
                    _num(q.std, 3),
                    _num(q.cm),
                    _num(q.cmk),
                    _num(q.cp),
                    _num(q.cpk),
                    _chart_state(q, baseline),
                )
            )
    widths = [max(len(r[i]) for r in (header, *rows)) for i in range(len(header))]
    for r in (header, *rows):
        print("  ".join(cell.ljust(w) for cell, w in zip(r, widths, strict=True)).rstrip())
    print(f"{got.results} results; window {got.snapshots[0].window_size}. {CAUTION}")


def _point_json(p: ChartPoint) -> dict[str, Any]:
    return {
        "index": p.index,
        "xbar": p.xbar,
        "range": p.range,
        "z": p.z,
        "tests": sorted(int(t) for t in p.fired),
        "range_beyond": p.range_beyond,
        "raised": p.raised,
        "cleared": p.cleared,
    }


def _quantity_json(q: QuantitySummary) -> dict[str, Any]:
    lim = q.limits
    return {
        "n": q.n,
        "mean": q.mean,
        "std": q.std,
        "lsl": q.lsl,
        "usl": q.usl,
        "cm": q.cm,
        "cmk": q.cmk,
        "cp": q.cp,
        "cpk": q.cpk,
        "baseline_subgroups_done": q.baseline_done,
        "chart": None if lim is None else dataclasses.asdict(lim),
        "drift_alarm": q.drift_alarm,
        "points": [_point_json(p) for p in q.points],
    }


def _report_json(got: Collected, path: Path, window: int) -> dict[str, Any]:
    def when(t: Any) -> str | None:
        return None if t is None else t.isoformat()

    return {
        "journal": str(path),
        "window": window,
        "results": got.results,
        "skipped": got.skipped,
        "groups": [
            {
                "kind": s.key.kind,
                "program_id": s.key.program_id,
                "member": s.key.member,
                "station": s.station,
                "count": s.count,
                "ok_count": s.ok_count,
                "nok_count": s.nok_count,
                "first_at": when(s.first_at),
                "last_at": when(s.last_at),
                "final_torque_nm": _quantity_json(s.torque),
                "final_angle_deg": _quantity_json(s.angle),
            }
            for s in got.snapshots
        ],
        "caution": CAUTION,
    }


def plot_chart(snap: GroupSnapshot, quantity: str, out: Path) -> None:
    """Draw the X̄ chart (top) and R chart (bottom) of one group's quantity into ``out``.

    Baseline subgroups are drawn hollow, judged ones filled; points where a run-rule test
    fired are red, and the subgroups where the drift alarm was raised carry a marker line.
    Deterministic: the same journal gives the same bytes (no date or version in the file).
    """
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib import pyplot as plt
    from matplotlib.figure import Figure

    q: QuantitySummary = getattr(snap, quantity)
    unit = _UNITS[quantity]
    points = list(q.points)
    idx = [p.index for p in points]
    fig: Figure = plt.figure(figsize=FIGURE_SIZE_IN, dpi=DPI)
    try:
        ax_x, ax_r = fig.subplots(2, 1, sharex=True, height_ratios=(3, 2))
        for ax, values, centre, ucl, lcl, label in (
            (
                ax_x,
                [p.xbar for p in points],
                None if q.limits is None else q.limits.xbar_center,
                None if q.limits is None else q.limits.xbar_ucl,
                None if q.limits is None else q.limits.xbar_lcl,
                f"subgroup mean [{unit}]",
            ),
            (
                ax_r,
                [p.range for p in points],
                None if q.limits is None else q.limits.range_center,
                None if q.limits is None else q.limits.range_ucl,
                None if q.limits is None else q.limits.range_lcl,
                f"subgroup range [{unit}]",
            ),
        ):
            ax.plot(idx, values, color="#1f5fa8", lw=0.9)
            base = [i for i, p in zip(idx, points, strict=True) if p.z is None]
            ax.plot(
                base,
                [v for v, p in zip(values, points, strict=True) if p.z is None],
                "o",
                mfc="white",
                color="#1f5fa8",
                ms=3.5,
                label="baseline",
            )
            if centre is not None and ucl is not None and lcl is not None:
                ax.axhline(centre, color="#2c3e50", lw=0.9, label="centre")
                ax.axhline(ucl, color="#c0392b", lw=0.9, ls="--", label="UCL / LCL")
                ax.axhline(lcl, color="#c0392b", lw=0.9, ls="--")
            ax.set_ylabel(label)
            ax.grid(True, lw=0.3)
        judged = [p for p in points if p.z is not None]
        ax_x.plot(
            [p.index for p in judged if not p.fired],
            [p.xbar for p in judged if not p.fired],
            "o",
            color="#1f5fa8",
            ms=3.5,
        )
        ax_x.plot(
            [p.index for p in judged if p.fired],
            [p.xbar for p in judged if p.fired],
            "o",
            color="#c0392b",
            ms=4.5,
            label="run-rule test fired",
        )
        ax_r.plot(
            [p.index for p in judged if p.range_beyond],
            [p.range for p in judged if p.range_beyond],
            "o",
            color="#c0392b",
            ms=4.5,
        )
        for p in judged:
            if p.raised:
                ax_x.axvline(p.index, color="#d68910", lw=1.2, label="drift alarm raised")
            if p.cleared:
                ax_x.axvline(p.index, color="#3a9d5d", lw=1.2, label="drift alarm cleared")
        handles, labels = ax_x.get_legend_handles_labels()
        unique = dict(zip(labels, handles, strict=True))
        ax_x.legend(unique.values(), unique.keys(), loc="upper left", fontsize=7)
        n = _MONITOR.subgroup_size
        ax_r.set_xlabel(f"subgroup (n = {n} consecutive results)")
        ax_x.set_title(
            f"X̄–R chart · final {quantity} · {snap.key.describe()} · "
            f"{_chart_state(q, _MONITOR.baseline_subgroups)}",
            fontsize=9,
        )
        fig.text(0.01, 0.01, f"{snap.station} · {CAUTION}", fontsize=6.5, color="#555555")
        fig.tight_layout(rect=(0.0, 0.03, 1.0, 1.0))
        fig.savefig(out, format="png", metadata={"Software": None})
    finally:
        plt.close(fig)

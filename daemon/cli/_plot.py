"""``clampd plot RESULT_ID --out curve.png``: draw one result's torque-angle curve.

The result is read from the station's journal (the outbox database) exactly as it was
published, so the picture shows what the MES received: the downsampled curve (angle from
snug, torque), the snug point, the stop, the onset of yield when one was found, and the
program's windows as shaded bands (a box where both are given). The title carries the
program, part, joint position and the OK/NOK judgement with its reasons.

Where the journal is: ``--db PATH``, else ``[outbox] path`` of ``--config FILE``, else the
production default. Like ``clampd results`` this command never creates a journal.

The picture supports, and never replaces, the joint designer's specification, local codes
and licensed practice; a curve that looks right does not prove the joint sound.

Exit status: 0 written, 2 bad input (one line on stderr; nothing written).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from pydantic import ValidationError

from clampd.daemon.cli._journal import JournalError, add_journal_arguments, open_journal
from clampd.daemon.cli._png import png_output_problem
from clampd.daemon.runtime._outbox import OutboxError
from clampd.protocol import RundownResult

__all__ = ["add_arguments", "plot_result", "run"]

# Figure size and resolution: 8 x 5 in at 100 dpi is 800 x 500 px, readable on a station
# screen and small enough (~50 kB) to attach to a quality report (our choice).
FIGURE_SIZE_IN = (8.0, 5.0)
DPI = 100
_CAUTION = (
    "Supports, never replaces, the joint designer's specification, local codes and "
    "licensed practice."
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of ``clampd plot``."""
    parser.add_argument("result_id", metavar="RESULT_ID", help="the result's id (see 'results')")
    parser.add_argument(
        "--out", type=Path, required=True, metavar="FILE.png", help="where to write the PNG"
    )
    add_journal_arguments(parser)


def _fail(message: str) -> int:
    print(f"clampd plot: {message}", file=sys.stderr)
    return 2


def run(args: argparse.Namespace) -> int:
    """Read the result, draw it, write the PNG; 2 with a one-line error for bad input."""
    out: Path = args.out
    problem = png_output_problem(out, "--out")
    if problem is not None:
        return _fail(problem)
    try:
        journal, path = open_journal(args)
    except JournalError as exc:
        return _fail(str(exc))
    try:
        with journal:
            entry = journal.get(args.result_id)
    except OutboxError as exc:
        return _fail(str(exc))
    if entry is None:
        return _fail(f"no result {args.result_id} in the journal {path}")
    try:
        result = RundownResult.model_validate_json(entry.payload, strict=False)
    except ValidationError as exc:
        return _fail(
            f"result {args.result_id} in the journal is not a valid result: {_first_error(exc)}"
        )
    plot_result(result, out)
    print(f"wrote {out}")
    return 0


def _first_error(exc: ValidationError) -> str:
    """pydantic's report in one line: the first problem and how many there are."""
    first = exc.errors()[0]
    where = ".".join(str(part) for part in first["loc"]) or "payload"
    count = exc.error_count()
    return f"{where}: {first['msg']}" + (f" ({count} problems)" if count > 1 else "")


def plot_result(result: RundownResult, out: Path) -> None:
    """Draw ``result``'s torque-angle curve with its marks and windows into ``out`` (PNG).

    Deterministic: the same result gives the same bytes (no date or version in the file).
    """
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib import pyplot as plt
    from matplotlib.figure import Figure

    fig: Figure = plt.figure(figsize=FIGURE_SIZE_IN, dpi=DPI)
    try:
        ax = fig.add_subplot()
        curve = result.curve
        ax.plot(curve.angle_deg, curve.torque_nm, color="#1f5fa8", lw=1.4, label="torque")
        w = result.windows
        if w is not None:
            t_lo, t_hi = w.torque_min_nm, w.torque_max_nm
            a_lo, a_hi = w.angle_min_deg, w.angle_max_deg
            green, alpha = "#3a9d5d", 0.15
            if t_lo is not None and t_hi is not None and a_lo is not None and a_hi is not None:
                ax.fill_between([a_lo, a_hi], t_lo, t_hi, color=green, alpha=alpha, label="window")
            elif t_lo is not None and t_hi is not None:
                ax.axhspan(t_lo, t_hi, color=green, alpha=alpha, label="torque window")
            elif a_lo is not None and a_hi is not None:
                ax.axvspan(a_lo, a_hi, color=green, alpha=alpha, label="angle window")
        if result.snug_torque_nm is not None:
            ax.plot([0.0], [result.snug_torque_nm], "o", color="#7a4fb0", label="snug")
        if result.final_angle_deg is not None:
            ax.plot(
                [result.final_angle_deg],
                [result.final_torque_nm],
                "s",
                color="#c0392b" if result.status.value == "NOK" else "#2c3e50",
                label=f"stop ({result.stop_trigger.value})",
            )
        else:
            ax.axhline(result.final_torque_nm, color="#2c3e50", ls=":", label="final torque")
        yp = result.yield_point
        if yp is not None:
            ax.plot([yp.angle_deg], [yp.torque_nm], "^", color="#d68910", label="yield onset")
        ax.axvline(0.0, color="#999999", lw=0.6)
        ax.set_xlabel("angle from snug [deg]")
        ax.set_ylabel("torque [N·m]")
        verdict = result.status.value
        if result.reasons:
            verdict += " (" + ", ".join(r.value for r in result.reasons) + ")"
        ax.set_title(
            f"{result.program.program_id} v{result.program.version} · {result.part_id} / "
            f"{result.joint_position} · {verdict}",
            fontsize=10,
        )
        ax.grid(True, lw=0.3)
        ax.legend(loc="upper left", fontsize=8)
        fig.text(
            0.01,
            0.01,
            f"{result.id} · {result.wrench.wrench_id} · {result.finished_at.isoformat()}\n"
            + _CAUTION,
            fontsize=6.5,
            color="#555555",
        )
        fig.tight_layout(rect=(0.0, 0.05, 1.0, 1.0))
        fig.savefig(out, format="png", metadata={"Software": None})
    finally:
        plt.close(fig)

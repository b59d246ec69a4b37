"""The demo's live terminal view: plain ANSI, no dependency, line output when not a terminal.

Theory of operation
-------------------
``TerminalView`` keeps a small model of what a person at the station wants to see: one row
per wrench (program, part, joint position, live torque with a bar against the tool's
capacity, link state), the latest results as the MES received them, and a footer with the
totals. Updates only change the model; nothing is written until ``refresh()``.

- On a terminal (``isatty``) ``refresh()`` redraws the whole block in place: it moves the
  cursor up over the previous block (``ESC [ n F``), clears each line (``ESC [ 2 K``) and
  writes the new one (ECMA-48 control functions CPL and EL), so the picture stays put while
  torque climbs. A redraw happens at most every ``MIN_REDRAW_S``.
- Anywhere else (a pipe, a log file, CI) there is no cursor to move, so the view prints one
  line per event (a result, a selection, a link change) and never the live torque, which
  would flood a log.

``render()`` is pure (the model to a list of lines), so tests check the content without a
terminal. The view never reads the clock itself except to rate-limit redraws.
"""

from __future__ import annotations

import dataclasses
import time
from collections import deque
from typing import TextIO

__all__ = ["MIN_REDRAW_S", "ResultRow", "TerminalView", "WrenchRow"]

# Redraw at most ten times a second: smooth enough for a torque that climbs over a second or
# two, cheap on a small board's serial console (common practice for text UIs, no source).
MIN_REDRAW_S = 0.1
# Result rows kept on screen: the latest few parts' worth (our choice).
_RESULT_ROWS = 8
_BAR = 24  # characters of the torque bar

_RESET = "\x1b[0m"
_BOLD = "\x1b[1m"
_DIM = "\x1b[2m"
_GREEN = "\x1b[32m"
_RED = "\x1b[31m"
_YELLOW = "\x1b[33m"


@dataclasses.dataclass(slots=True)
class WrenchRow:
    """What the view knows about one wrench."""

    wrench_id: str
    capacity_nm: float
    connected: bool = False
    program: str = "-"
    part: str = "-"
    position: str = "-"
    torque_nm: float | None = None
    note: str = ""


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ResultRow:
    """One result as received by the MES."""

    at: str
    wrench_id: str
    part: str
    position: str
    status: str
    reasons: tuple[str, ...]
    final_torque_nm: float
    final_angle_deg: float | None
    valid: bool
    latency_s: float | None


class TerminalView:
    """The live view; see the module docstring. ``tty=None`` asks the stream."""

    def __init__(self, stream: TextIO, *, tty: bool | None = None, colour: bool | None = None):
        self.stream = stream
        self.tty = stream.isatty() if tty is None else tty
        self.colour = self.tty if colour is None else colour
        self.title = "clampd demo"
        self.subtitle = ""
        self.wrenches: dict[str, WrenchRow] = {}
        self.results: deque[ResultRow] = deque(maxlen=_RESULT_ROWS)
        self.footer = ""
        self._drawn = 0
        self._last_draw = -1e9

    # -- model updates ---------------------------------------------------------------

    def add_wrench(self, wrench_id: str, capacity_nm: float) -> None:
        """Show a row for this wrench."""
        self.wrenches[wrench_id] = WrenchRow(wrench_id, capacity_nm)

    def wrench(
        self,
        wrench_id: str,
        *,
        connected: bool | None = None,
        program: str | None = None,
        part: str | None = None,
        position: str | None = None,
        torque_nm: float | None = None,
        note: str | None = None,
    ) -> None:
        """Update a wrench row; an event worth a line (link change, selection) is printed
        at once when not on a terminal."""
        row = self.wrenches[wrench_id]
        if connected is not None and connected != row.connected:
            row.connected = connected
            self.event(f"{wrench_id} {'connected' if connected else 'link lost'}")
        if program is not None:
            row.program = program
        if part is not None:
            row.part = part
        if position is not None and position != row.position:
            row.position = position
        if torque_nm is not None:
            row.torque_nm = torque_nm
        if note is not None:
            row.note = note

    def result(self, row: ResultRow) -> None:
        """Add a received result (and print its line when not on a terminal)."""
        self.results.append(row)
        if not self.tty:
            self.stream.write(self._result_line(row) + "\n")
            self.stream.flush()

    def event(self, text: str) -> None:
        """Something happened that deserves a line of its own when not on a terminal."""
        if not self.tty:
            self.stream.write(f"{text}\n")
            self.stream.flush()

    # -- drawing ---------------------------------------------------------------------

    def render(self) -> list[str]:
        """The whole block as lines, without cursor movement."""
        lines = [self._c(_BOLD, self.title)]
        if self.subtitle:
            lines.append(self._c(_DIM, self.subtitle))
        lines.append("")
        for row in self.wrenches.values():
            lines.append(self._wrench_line(row))
        lines.append("")
        lines.append(self._c(_BOLD, "results received by the MES (schema-checked)"))
        if not self.results:
            lines.append(self._c(_DIM, "  (none yet)"))
        lines.extend(self._result_line(r) for r in self.results)
        if self.footer:
            lines.append("")
            lines.append(self.footer)
        return lines

    def refresh(self, *, force: bool = False) -> None:
        """Redraw in place on a terminal (rate-limited); nothing to do otherwise."""
        if not self.tty:
            return
        now = time.monotonic()
        if not force and now - self._last_draw < MIN_REDRAW_S:
            return
        self._last_draw = now
        lines = self.render()
        out: list[str] = []
        if self._drawn:
            out.append(f"\x1b[{self._drawn}F")  # CPL: to the start of the block's first line
        out.extend(f"\x1b[2K{line}\n" for line in lines)
        # A shorter block than last time: clear the leftover lines below it.
        extra = self._drawn - len(lines)
        if extra > 0:
            out.append("\x1b[2K\n" * extra)
            out.append(f"\x1b[{extra}F")
        self.stream.write("".join(out))
        self.stream.flush()
        self._drawn = len(lines)

    # -- helpers -----------------------------------------------------------------------

    def _c(self, code: str, text: str) -> str:
        return f"{code}{text}{_RESET}" if self.colour else text

    def _wrench_line(self, row: WrenchRow) -> str:
        link = self._c(_GREEN, "link up  ") if row.connected else self._c(_YELLOW, "no link  ")
        torque = row.torque_nm
        if torque is None:
            bar = " " * _BAR
            value = "     -    "
        else:
            filled = round(max(0.0, min(1.0, torque / row.capacity_nm)) * _BAR)
            bar = "#" * filled + "." * (_BAR - filled)
            value = f"{torque:6.1f} N·m"
        return (
            f"  {row.wrench_id:<7}{link}{row.program:<17} {row.part:<18} {row.position:<15}"
            f" [{bar}] {value} {row.note}"
        ).rstrip()

    def _result_line(self, r: ResultRow) -> str:
        ok = r.status == "OK"
        status = self._c(_GREEN, "OK ") if ok else self._c(_RED, f"{r.status:<3}")
        angle = "     -  " if r.final_angle_deg is None else f"{r.final_angle_deg:6.1f}°"
        why = f" ({', '.join(r.reasons)})" if r.reasons else ""
        check = "schema ok" if r.valid else self._c(_RED, "SCHEMA FAIL")
        lat = "" if r.latency_s is None else f" {r.latency_s * 1e3:5.0f} ms"
        return (
            f"  {r.at} {r.wrench_id:<7}{r.part:<18} {r.position:<15} {status}"
            f" {r.final_torque_nm:6.1f} N·m {angle} {check}{lat}{why}"
        )

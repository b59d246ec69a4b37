"""One entry point for every study: run it, then render JSON, a table or a PNG.

The CLI (``clampd simulate study``) and the tests call :func:`run_study`; the study modules
stay free of output formatting beyond their own table.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path
from typing import Any

from clampd.simulators.studies._angle import angle_study, angle_table
from clampd.simulators.studies._common import StudyError, dumps
from clampd.simulators.studies._cues import cue_study, cue_table
from clampd.simulators.studies._error_proofing import error_proofing_study, error_proofing_table
from clampd.simulators.studies._plot import plot_angle, plot_cues, plot_preload
from clampd.simulators.studies._preload import preload_study, preload_table

__all__ = ["STUDY_KINDS", "StudyReport", "run_study"]

STUDY_KINDS: tuple[str, ...] = ("preload", "cues", "angle", "error-proofing")


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True, eq=False)
class StudyReport:
    """A finished study: its figures (JSON-ready, rounded) and the raw values for a plot."""

    kind: str
    joints: int
    seed: int
    figures: dict[str, Any]
    values: dict[str, Any]

    def json_text(self) -> str:
        """Sorted keys, rounded floats: the same seed gives the same bytes."""
        return dumps(self.figures)

    def table(self) -> str:
        """The human-readable table, with the published ranges and cautions."""
        match self.kind:
            case "preload":
                return preload_table(self.figures, self.joints, self.seed)
            case "cues":
                return cue_table(self.figures, self.joints, self.seed)
            case "error-proofing":
                return error_proofing_table(self.figures, self.joints, self.seed)
            case _:
                return angle_table(self.figures, self.joints, self.seed)

    def plot(self, path: Path) -> None:
        """Write the study's PNG; :class:`StudyError` when matplotlib or the path fails."""
        match self.kind:
            case "preload":
                plot_preload(path, self.figures, self.values)
            case "cues":
                plot_cues(path, self.values)
            case "error-proofing":
                raise StudyError("the error-proofing study has no plot; read its table or --json")
            case _:
                plot_angle(path, self.values)


def run_study(kind: str, *, joints: int, seed: int, workers: int | None = 1) -> StudyReport:
    """Run one study. ``workers`` processes share the joints (None: one per CPU); the figures
    do not depend on it. Workers are spawned interpreters that import the caller's main
    module, so a script asking for more than one needs the ``if __name__ == "__main__":``
    guard. Raises :class:`StudyError` on an unknown kind or bad arguments."""
    values: dict[str, Any]
    match kind:
        case "preload":
            figures, values = preload_study(joints, seed, workers=workers)
        case "cues":
            figures, values = cue_study(joints, seed, workers=workers)
        case "error-proofing":
            figures, values = error_proofing_study(joints, seed, workers=workers)
        case "angle":
            figures, points = angle_study(joints, seed, workers=workers)
            values = dict(points)
        case _:
            raise StudyError(f"unknown study {kind!r}; choose one of {', '.join(STUDY_KINDS)}")
    return StudyReport(kind=kind, joints=joints, seed=seed, figures=figures, values=dict(values))

"""Tightening programs: what a joint needs, as a frozen pydantic model with SI floats inside.

A program file holds one ``[program]`` table. Keys are the trade's words without units
(``snug_torque``, ``target_angle``); values may carry units (``"20 ft*lbf"``, ``"30 deg"``) and
are converted once, here, through the shared units parser (exact definitions of the foot and
the pound-force). Attribute names carry the SI unit (``snug_torque_nm``); TOML keys are their
aliases. A bare number is already SI (N·m, deg, s).

Unknown keys are an error, and so is a known key the chosen strategy would ignore (a
``target_torque`` on a yield program is a mistake someone meant to matter). Every problem is
reported at once in a :class:`ProgramError` with its field path.

Programs describe intent; they do not replace the joint designer's specification, local codes
or licensed practice.
"""

from __future__ import annotations

import enum
import re
import tomllib
from collections.abc import Mapping
from typing import Annotated, Any

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field, ValidationError, model_validator

from clampd.daemon.engine._errors import ProgramError
from clampd.protocol._units import Kind, parse_quantity

__all__ = [
    "Program",
    "Step",
    "StepKind",
    "Strategy",
    "parse_program",
    "program_from_mapping",
]


def _q(kind: Kind) -> BeforeValidator:
    def conv(v: Any) -> Any:
        if isinstance(v, str | int | float):
            return parse_quantity(v, kind)
        return v

    return BeforeValidator(conv)


def _window(kind: Kind) -> BeforeValidator:
    def conv(v: Any) -> Any:
        if isinstance(v, list | tuple):
            if len(v) != 2:
                raise ValueError("a window is a two-element list [min, max]")
            return tuple(parse_quantity(x, kind) for x in v)
        return v

    return BeforeValidator(conv)


Torque = Annotated[float, _q(Kind.TORQUE)]
Angle = Annotated[float, _q(Kind.ANGLE)]
Seconds = Annotated[float, _q(Kind.TIME)]
TorqueWindow = Annotated[tuple[float, float], _window(Kind.TORQUE)]
AngleWindow = Annotated[tuple[float, float], _window(Kind.ANGLE)]
RateWindow = Annotated[tuple[float, float], _window(Kind.JOINT_RATE)]


class Strategy(enum.StrEnum):
    """How the rundown is controlled."""

    TORQUE = "torque"
    TORQUE_ANGLE = "torque-angle"
    YIELD = "yield"
    TORQUE_TO_YIELD = "torque-to-yield"
    MULTI_STEP = "multi-step"


class StepKind(enum.StrEnum):
    """What a step of a multi-step program drives to."""

    TORQUE = "torque"  # until torque reaches target_torque
    ANGLE = "angle"  # until the angle since the previous step's stop reaches target_angle


_STRICT = ConfigDict(frozen=True, extra="forbid", populate_by_name=True)


class Step(BaseModel):
    """One step of a multi-step program (a ``[[program.step]]`` table)."""

    model_config = _STRICT

    kind: StepKind
    target_torque_nm: Torque | None = Field(default=None, alias="target_torque", gt=0)
    target_angle_deg: Angle | None = Field(default=None, alias="target_angle", gt=0)

    @model_validator(mode="after")
    def _targets(self) -> Step:
        if self.kind is StepKind.TORQUE and (
            self.target_torque_nm is None or self.target_angle_deg is not None
        ):
            raise ValueError("target_torque: a torque step needs target_torque and no target_angle")
        if self.kind is StepKind.ANGLE and (
            self.target_angle_deg is None or self.target_torque_nm is not None
        ):
            raise ValueError("target_angle: an angle step needs target_angle and no target_torque")
        return self


class Program(BaseModel):
    """A tightening program, SI inside (N·m, degrees, seconds). Construct via the loaders."""

    model_config = _STRICT

    # The program's revision, raised by whoever edits its values; results carry it so the MES
    # can trace which revision tightened a joint (and pin one in select_program).
    version: int = Field(default=1, ge=1)
    id: str = Field(min_length=1, max_length=64)
    name: str | None = None
    strategy: Strategy
    snug_torque_nm: Torque = Field(alias="snug_torque", gt=0)
    target_torque_nm: Torque | None = Field(default=None, alias="target_torque", gt=0)
    target_angle_deg: Angle | None = Field(default=None, alias="target_angle", gt=0)
    # Stop (yield strategy) when the slope falls to this fraction of its linear-range maximum;
    # "commonly about half" (DESIGN.md domain notes; common practice, no source).
    yield_fraction: float = Field(default=0.5, gt=0, lt=1)
    # Slope window: least squares over this trailing angle span. Our choice: 2° averages noise
    # over dozens of samples at 1 kHz; the detection lags the true knee by about half of it.
    slope_window_deg: Angle = Field(default=2.0, alias="slope_window", gt=0)
    # Yield is not judged before this angle past snug (default: twice the slope window).
    yield_min_angle_deg: Angle | None = Field(default=None, alias="yield_min_angle", gt=0)
    # Watch for yield on strategies that do not stop on it (reported, not a stop).
    monitor_yield: bool = False
    torque_window_nm: TorqueWindow | None = Field(default=None, alias="torque_window")
    angle_window_deg: AngleWindow | None = Field(default=None, alias="angle_window")
    max_torque_nm: Torque | None = Field(default=None, alias="max_torque", gt=0)
    release_torque_nm: Torque | None = Field(default=None, alias="release_torque", gt=0)
    timeout_s: Seconds | None = Field(default=None, alias="timeout", gt=0)
    approach_lead_s: Seconds | None = Field(default=None, alias="approach_lead", ge=0)
    reaction_time_s: Seconds | None = Field(default=None, alias="reaction_time", ge=0)
    cue_latency_s: Seconds | None = Field(default=None, alias="cue_latency", ge=0)
    # Where the stop cue aims inside the window, as a fraction from the target to the window's
    # upper limit (None: the station's setting, EngineSettings.cue_aim).
    cue_aim: float | None = Field(default=None, alias="cue_aim", ge=0, le=1)
    steps: tuple[Step, ...] = Field(default=(), alias="step")
    # Error proofing from the curve (all optional, off when absent; see _proofing.py for the
    # definitions of run-in, first contact and rundown angle). ``clampd plan`` proposes them.
    prevailing_torque_window_nm: TorqueWindow | None = Field(
        default=None, alias="prevailing_torque_window"
    )
    rundown_angle_window_deg: AngleWindow | None = Field(default=None, alias="rundown_angle_window")
    joint_rate_window_nm_per_deg: RateWindow | None = Field(default=None, alias="joint_rate_window")
    rehit_angle_max_deg: Angle | None = Field(default=None, alias="rehit_angle_max", gt=0)
    # Torque falling this fraction below its running peak while the fastener turns (past snug).
    torque_drop_fraction: float | None = Field(default=None, alias="torque_drop", gt=0, lt=1)
    # First contact: torque rises above the prevailing level by this margin. Default: a quarter
    # of the snug torque (our choice: well above sensor noise and the scatter of the prevailing
    # torque of a plain nut, well below snug).
    contact_margin_nm: Torque | None = Field(default=None, alias="contact_margin", gt=0)

    @model_validator(mode="after")
    def _consistent(self) -> Program:
        problems: list[str] = []
        s = self.strategy
        needs_torque = s is Strategy.TORQUE
        needs_angle = s in (Strategy.TORQUE_ANGLE, Strategy.TORQUE_TO_YIELD)
        if needs_torque and self.target_torque_nm is None:
            problems.append(f"target_torque: required by strategy {s.value!r}")
        if not needs_torque and self.target_torque_nm is not None:
            problems.append(f"target_torque: not used by strategy {s.value!r}")
        if needs_angle and self.target_angle_deg is None:
            problems.append(f"target_angle: required by strategy {s.value!r}")
        if not needs_angle and self.target_angle_deg is not None:
            problems.append(f"target_angle: not used by strategy {s.value!r}")
        if s is Strategy.MULTI_STEP and not self.steps:
            problems.append("step: strategy 'multi-step' needs at least one [[program.step]]")
        if s is not Strategy.MULTI_STEP and self.steps:
            problems.append(f"step: steps are only for 'multi-step', not {s.value!r}")
        for name, w in (
            ("torque_window", self.torque_window_nm),
            ("angle_window", self.angle_window_deg),
            ("prevailing_torque_window", self.prevailing_torque_window_nm),
            ("rundown_angle_window", self.rundown_angle_window_deg),
            ("joint_rate_window", self.joint_rate_window_nm_per_deg),
        ):
            if w is not None and not 0.0 <= w[0] <= w[1]:
                problems.append(f"{name}: must be [min, max] with 0 <= min <= max, got {list(w)}")
        torques = [self.snug_torque_nm]
        if self.target_torque_nm is not None:
            torques.append(self.target_torque_nm)
            if self.target_torque_nm <= self.snug_torque_nm:
                problems.append("target_torque: must be above snug_torque")
        step_torques = [st.target_torque_nm for st in self.steps if st.target_torque_nm is not None]
        if any(tq <= self.snug_torque_nm for tq in step_torques):
            problems.append("step: every torque step must target more than snug_torque")
        torques += step_torques
        if self.max_torque_nm is not None and self.max_torque_nm <= max(torques):
            problems.append("max_torque: must be above snug_torque and every target torque")
        if self.release_torque_nm is not None and self.release_torque_nm >= self.snug_torque_nm:
            problems.append("release_torque: must be below snug_torque")
        if problems:
            raise ValueError(" | ".join(problems))
        return self

    @property
    def contact_margin(self) -> float:
        """Torque above the prevailing level that marks first contact, N·m."""
        if self.contact_margin_nm is not None:
            return self.contact_margin_nm
        return 0.25 * self.snug_torque_nm

    @property
    def yield_min_angle(self) -> float:
        """Angle past snug before which yield is not judged, degrees."""
        if self.yield_min_angle_deg is not None:
            return self.yield_min_angle_deg
        return 2.0 * self.slope_window_deg


_FIELD_MSG = re.compile(r"^(\w+): (.*)$")


def _path(loc: tuple[int | str, ...]) -> str:
    out = "program"
    for part in loc:
        out += f"[{part}]" if isinstance(part, int) else f".{part}"
    return out


def _problems(exc: ValidationError) -> list[tuple[str, str]]:
    problems: list[tuple[str, str]] = []
    for err in exc.errors():
        loc = tuple(err["loc"])
        msg = str(err["msg"]).removeprefix("Value error, ")
        if err["type"] == "extra_forbidden":
            msg = "unknown key"
        # Model-level checks report "key: message | key: message"; give each its own path.
        for piece in msg.split(" | "):
            m = _FIELD_MSG.match(piece)
            if m and err["type"] == "value_error":
                problems.append((_path((*loc, m.group(1))), m.group(2)))
            else:
                problems.append((_path(loc), piece))
    return problems


def program_from_mapping(mapping: Mapping[str, Any]) -> Program:
    """Build a program from the contents of a ``[program]`` table (also embedded in station
    configs). Raises ``ProgramError`` listing every problem with its field path."""
    if not isinstance(mapping, Mapping):
        raise ProgramError([("program", "must be a table")])
    try:
        return Program.model_validate(dict(mapping))
    except ValidationError as exc:
        raise ProgramError(_problems(exc)) from None


def parse_program(toml_text: str) -> Program:
    """Parse a program file's text: exactly one ``[program]`` table. Raises ``ProgramError``."""
    try:
        doc = tomllib.loads(toml_text)
    except tomllib.TOMLDecodeError as exc:
        raise ProgramError([("(file)", f"not valid TOML: {exc}")]) from None
    except RecursionError:
        # tomllib recurses per nesting level: a hostile file nested thousands deep is bad input
        raise ProgramError([("(file)", "nested too deeply to be a program")]) from None
    problems = [
        (k, "unknown top-level key (a program file holds one [program])")
        for k in sorted(doc)
        if k != "program"
    ]
    if "program" not in doc:
        problems.append(("program", "missing [program] table"))
    if problems:
        raise ProgramError(problems)
    table = doc["program"]
    if not isinstance(table, dict):
        raise ProgramError([("program", "must be a table, not a list or value")])
    return program_from_mapping(table)

"""The tightening engine: a pure, I/O-free state machine per wrench.

Feed it samples, get typed events back (see ``_engine.py`` for the theory of operation and
``_machine.py`` for every state transition). Programs are validated pydantic models; settings
describe the wrench and the station. Results support, never replace, the joint designer's
specification, local codes and licensed practice.
"""

from clampd.daemon.engine._engine import Engine
from clampd.daemon.engine._errors import (
    EngineError,
    EngineUsageError,
    ProgramError,
    SensorDataError,
)
from clampd.daemon.engine._events import (
    Check,
    CheckOutcome,
    CueFired,
    CueKind,
    CueRecord,
    EngineFault,
    Event,
    OverTorque,
    Reason,
    RundownFinished,
    RundownResult,
    RundownStarted,
    SnugPoint,
    SnugReached,
    Status,
    StopPoint,
    StopReached,
    StopTrigger,
    YieldDetected,
    YieldPoint,
)
from clampd.daemon.engine._load import load_program
from clampd.daemon.engine._machine import Input, State, next_state
from clampd.daemon.engine._program import (
    Program,
    Step,
    StepKind,
    Strategy,
    parse_program,
    program_from_mapping,
)
from clampd.daemon.engine._settings import EngineSettings

__all__ = [
    "Check",
    "CheckOutcome",
    "CueFired",
    "CueKind",
    "CueRecord",
    "Engine",
    "EngineError",
    "EngineFault",
    "EngineSettings",
    "EngineUsageError",
    "Event",
    "Input",
    "OverTorque",
    "Program",
    "ProgramError",
    "Reason",
    "RundownFinished",
    "RundownResult",
    "RundownStarted",
    "SensorDataError",
    "SnugPoint",
    "SnugReached",
    "State",
    "Status",
    "Step",
    "StepKind",
    "StopPoint",
    "StopReached",
    "StopTrigger",
    "Strategy",
    "YieldDetected",
    "YieldPoint",
    "load_program",
    "next_state",
    "parse_program",
    "program_from_mapping",
]

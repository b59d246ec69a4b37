"""Simulators of joint, wrench sensor, operator, BLE peripheral and MES: an independent truth.

The joint physics, the sensor front-end with its own frame encoder, the operator and the
closed-loop rundown never import the engine or the protocol decoder, so the engine is checked
against physics rather than against a copy of itself (tests/test_sim_independence.py).
"""

from clampd.simulators._encoder import (
    FRAME_HEADER_SIZE,
    INFO_SIZE,
    MAX_SAMPLES_PER_NOTIFICATION,
    CuePattern,
    DeclarativeEncoder,
    EncodeError,
    FrameFlags,
    Opcode,
    encode_control,
    encode_cue,
    encode_frame,
    encode_info,
    encode_set_rate,
)
from clampd.simulators._joint import (
    Fault,
    JointError,
    JointModel,
    JointPoint,
    JointPopulation,
    JointResponse,
    apply_fault,
    bolt_resilience_mm_per_n,
    clamped_resilience_mm_per_n,
)
from clampd.simulators._operator import (
    Bench,
    Motion,
    MotionSource,
    Operator,
    OperatorError,
    OperatorParams,
    OperatorPhase,
)
from clampd.simulators._rundown import CSV_HEADER, CueListener, Trace, simulate_rundown
from clampd.simulators._sensor import (
    ControlRejected,
    FrameSource,
    Reading,
    SensorError,
    SensorParams,
    SensorSample,
    VirtualWrenchSensor,
)

__all__ = [
    "CSV_HEADER",
    "FRAME_HEADER_SIZE",
    "INFO_SIZE",
    "MAX_SAMPLES_PER_NOTIFICATION",
    "Bench",
    "ControlRejected",
    "CueListener",
    "CuePattern",
    "DeclarativeEncoder",
    "EncodeError",
    "Fault",
    "FrameFlags",
    "FrameSource",
    "JointError",
    "JointModel",
    "JointPoint",
    "JointPopulation",
    "JointResponse",
    "Motion",
    "MotionSource",
    "Opcode",
    "Operator",
    "OperatorError",
    "OperatorParams",
    "OperatorPhase",
    "Reading",
    "SensorError",
    "SensorParams",
    "SensorSample",
    "Trace",
    "VirtualWrenchSensor",
    "apply_fault",
    "bolt_resilience_mm_per_n",
    "clamped_resilience_mm_per_n",
    "encode_control",
    "encode_cue",
    "encode_frame",
    "encode_info",
    "encode_set_rate",
    "simulate_rundown",
]

"""The joint planner: preload, torque and angle from bolt and joint data (VDI 2230, ISO 898-1).

Pure: no I/O, no clock. ``plan_joint(JointInput(...))`` gives a ``JointPlan``;
``propose_program(plan)`` and ``program_toml(plan, proposal)`` turn it into a program file
for the engine. Every error is a ``PlannerError`` naming the input at fault. Every plan
carries ``CAUTIONS``: its values support, never replace, the joint designer's
specification, and must be confirmed by tests on the real joint.
"""

from clampd.daemon.planner._errors import PlannerError
from clampd.daemon.planner._joint import (
    CAUTIONS,
    PLANNER_VERSION,
    JointInput,
    JointPlan,
    plan_joint,
)
from clampd.daemon.planner._materials import PROPERTY_CLASSES, PropertyClass, property_class
from clampd.daemon.planner._program_out import (
    PROGRAM_KEYS,
    ProgramProposal,
    program_toml,
    propose_program,
)
from clampd.daemon.planner._resilience import (
    BoltResilience,
    ClampedResilience,
    bolt_resilience,
    clamped_resilience,
    cone_tan_phi,
    frustum_resilience,
    rotation_deg,
)
from clampd.daemon.planner._threads import (
    ThreadSpec,
    clearance_hole_mm,
    head_bearing_mm,
    thread_spec,
)
from clampd.daemon.planner._toolfit import ToolFit, TorqueUnit, from_nm, to_nm, tool_fit
from clampd.daemon.planner._vdi2230 import (
    ALPHA_A,
    TighteningMethod,
    permissible_preload_n,
    preload_from_torque_n,
    tightening_torque_nm,
    torque_per_preload_mm,
)

__all__ = [
    "ALPHA_A",
    "CAUTIONS",
    "PLANNER_VERSION",
    "PROGRAM_KEYS",
    "PROPERTY_CLASSES",
    "BoltResilience",
    "ClampedResilience",
    "JointInput",
    "JointPlan",
    "PlannerError",
    "ProgramProposal",
    "PropertyClass",
    "ThreadSpec",
    "TighteningMethod",
    "ToolFit",
    "TorqueUnit",
    "bolt_resilience",
    "clamped_resilience",
    "clearance_hole_mm",
    "cone_tan_phi",
    "from_nm",
    "frustum_resilience",
    "head_bearing_mm",
    "permissible_preload_n",
    "plan_joint",
    "preload_from_torque_n",
    "program_toml",
    "property_class",
    "propose_program",
    "rotation_deg",
    "thread_spec",
    "tightening_torque_nm",
    "to_nm",
    "tool_fit",
    "torque_per_preload_mm",
]

"""Error proofing from the torque-angle curve: is this the right joint, assembled right?

A torque or angle window says whether the rundown reached its target; these checks say whether
the joint under the wrench behaved like the joint the program was written for. Each is
switched on by its program key and ends the rundown NOK with its own reason.

Definitions
-----------
*Run-in*: the rotation that brings the fastener down to its seat. It starts at the first turn
of the wrench after it last rested for ``EngineSettings.runin_rest_s`` (or since the engine
started) and includes the idle stretch before torque reached the rundown's start level: a
plain nut on a clean thread turns with almost no torque, and a wrong bolt length shows only
in that free rotation. Idle samples count while the rate about the fastener axis exceeds
``rest_rate_dps`` (ratchet back-swings turn the handle backwards and are not counted); inside
the rundown the engine's own ratchet logic says which samples turned the fastener, with the
wrench's deflection removed. The gyro bias estimated at the rundown's start is removed from
both.

*First contact*: the sample from which the torque stays above the prevailing level plus
``contact_margin`` up to snug — the head or nut has met the part. The prevailing level used to
find it is the median torque of the turning samples before snug; the *prevailing torque* then
reported is the median over the turning samples before first contact (a median, because a
ratchet stroke's start and end and the first touch are brief and should not move it). It is
measured only when the run-in before contact spans at least ``MIN_RUNIN_DEG``.

*Rundown angle*: rotation from the start of the run-in to snug. Too low: a bolt too short,
a part missing under the head, a bolt bottoming in a blind hole. Too high: a bolt too long,
an extra part. Judged high even when snug never came (the rotation already exceeds the window).

*Re-hit*: snug reached after no more than ``rehit_angle_max`` of rotation: the wrench went onto
a joint that is already tight (torque rises while the fastener stands still).

*Joint rate*: the least-squares slope dT/dθ after snug the result already reports (from snug
to the stop, or to one slope window before yield). Low: a soft joint (missing washer, soft or
wrong material); high: a stiff one (wrong part, a bolt bottoming out).

*Torque falling while turning*: past snug, on a sample where the fastener turns, torque below
``(1 − torque_drop)`` × the highest torque seen while turning — a stripped thread or a necking
bolt. The reported value is the deepest such fall, as a fraction of that peak.

Every figure is computed once, when the rundown ends, from the samples the engine kept, with
elementwise operations and ordered sums: per-sample and per-frame feeding give identical
figures (the engine's sample-exact invariant).

The checks support, never replace, the joint designer's specification, local codes and
licensed practice; the windows come from the program, which the planner proposes.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from clampd.daemon.engine._events import Check, CheckOutcome, Reason
from clampd.daemon.engine._program import Program

__all__ = ["MIN_RUNIN_DEG", "Limits", "Proofing", "judge"]

FloatArray = npt.NDArray[np.float64]
BoolArray = npt.NDArray[np.bool_]

# The prevailing torque is measured only over a run-in of at least this rotation before first
# contact. Our choice: ten times the wind-up of a 0.02 deg/N·m wrench at 15 N·m of snug, so
# the wind-up of a re-hit (the fastener does not turn at all) is never taken for a run-in.
MIN_RUNIN_DEG = 3.0


@dataclass(frozen=True, slots=True)
class Limits:
    """The checks a program switched on, folded once per program (SI units)."""

    prevailing: tuple[float, float] | None
    rundown: tuple[float, float] | None
    rate: tuple[float, float] | None
    rehit_max: float | None
    drop: float | None
    margin: float

    @classmethod
    def of(cls, p: Program) -> Limits:
        """The limits of program ``p``."""
        return cls(
            prevailing=p.prevailing_torque_window_nm,
            rundown=p.rundown_angle_window_deg,
            rate=p.joint_rate_window_nm_per_deg,
            rehit_max=p.rehit_angle_max_deg,
            drop=p.torque_drop_fraction,
            margin=p.contact_margin,
        )


@dataclass(frozen=True, slots=True)
class Proofing:
    """What the checks found: reasons to add, one outcome per switched-on check, figures."""

    reasons: tuple[Reason, ...]
    checks: tuple[CheckOutcome, ...]
    prevailing_torque_nm: float | None
    rundown_angle_deg: float | None
    contact_to_snug_deg: float | None


def _window(
    check: Check,
    *,
    value: float | None,
    window: tuple[float, float],
    low: Reason,
    high: Reason,
    reasons: list[Reason],
) -> CheckOutcome:
    lo, hi = window
    if value is None:
        return CheckOutcome(check=check, value=None, low=lo, high=hi, passed=None)
    if value < lo:
        reasons.append(low)
    elif value > hi:
        reasons.append(high)
    return CheckOutcome(check=check, value=value, low=lo, high=hi, passed=lo <= value <= hi)


def judge(
    lim: Limits,
    *,
    runin_torque_nm: FloatArray,
    runin_angle_deg: FloatArray,
    t: FloatArray,
    T: FloatArray,
    rc: FloatArray,
    turn: BoolArray,
    snug: int | None,
    snug_torque_nm: float,
    deflection_deg_per_nm: float,
    joint_rate: float | None,
    start_index: int,
) -> Proofing:
    """Judge one finished rundown.

    ``runin_*``: the idle run-in before the rundown started (turning samples' torque and the
    cumulative angle at each, bias removed). ``t, T, rc, turn``: the rundown's samples up to
    its last (bias-corrected rate, turning flags). ``snug``: local index or ``None``.
    """
    n = t.shape[0]
    end = snug if snug is not None else n - 1
    base = float(runin_angle_deg[-1]) if runin_angle_deg.shape[0] else 0.0
    if end > 0:
        dt = t[1 : end + 1] - t[:end]
        trap = (rc[1 : end + 1] + rc[:end]) * 0.5 * dt
        if deflection_deg_per_nm != 0.0:
            trap = trap - deflection_deg_per_nm * (T[1 : end + 1] - T[:end])
        counted = turn[1 : end + 1] | turn[:end]
        inc = np.where(counted, np.maximum(trap, 0.0), 0.0)
        acc = np.empty(end + 1)
        acc[0] = base
        acc[1:] = inc
        cum = np.cumsum(acc)[1:]
        theta_end = float(cum[-1])
        moving = inc > 0.0
        seq_T = np.concatenate((runin_torque_nm, T[1 : end + 1][moving]))
        seq_th = np.concatenate((runin_angle_deg, cum[moving]))
    else:
        theta_end = base
        seq_T, seq_th = runin_torque_nm, runin_angle_deg

    prevailing: float | None = None
    contact_to_snug: float | None = None
    if seq_T.shape[0]:
        level = float(np.median(seq_T))
        below = np.flatnonzero(seq_T <= level + lim.margin)
        if below.shape[0]:
            c = int(below[-1]) + 1  # first turning sample of the final rise: first contact
            if float(seq_th[c - 1]) >= MIN_RUNIN_DEG:
                prevailing = float(np.median(seq_T[:c]))
            if snug is not None:
                contact_to_snug = max(theta_end - float(seq_th[c - 1]), 0.0)
    rundown_angle = theta_end if snug is not None else None

    reasons: list[Reason] = []
    checks: list[CheckOutcome] = []
    if lim.prevailing is not None:
        checks.append(
            _window(
                Check.PREVAILING_TORQUE,
                value=prevailing,
                window=lim.prevailing,
                low=Reason.PREVAILING_TORQUE_LOW,
                high=Reason.PREVAILING_TORQUE_HIGH,
                reasons=reasons,
            )
        )
    if lim.rundown is not None:
        if snug is None and theta_end > lim.rundown[1]:
            # no snug, but the rotation already exceeds the window: certainly too long
            reasons.append(Reason.RUNDOWN_ANGLE_HIGH)
            checks.append(
                CheckOutcome(
                    check=Check.RUNDOWN_ANGLE,
                    value=theta_end,
                    low=lim.rundown[0],
                    high=lim.rundown[1],
                    passed=False,
                )
            )
        else:
            checks.append(
                _window(
                    Check.RUNDOWN_ANGLE,
                    value=rundown_angle,
                    window=lim.rundown,
                    low=Reason.RUNDOWN_ANGLE_LOW,
                    high=Reason.RUNDOWN_ANGLE_HIGH,
                    reasons=reasons,
                )
            )
    if lim.rehit_max is not None:
        passed = None if rundown_angle is None else rundown_angle > lim.rehit_max
        if passed is False:
            reasons.append(Reason.REHIT)
        checks.append(
            CheckOutcome(
                check=Check.REHIT,
                value=rundown_angle,
                low=lim.rehit_max,
                high=None,
                passed=passed,
            )
        )
    if lim.rate is not None:
        rate = joint_rate if joint_rate is not None and math.isfinite(joint_rate) else None
        checks.append(
            _window(
                Check.JOINT_RATE,
                value=rate,
                window=lim.rate,
                low=Reason.JOINT_RATE_LOW,
                high=Reason.JOINT_RATE_HIGH,
                reasons=reasons,
            )
        )
    if lim.drop is not None:
        checks.append(
            _torque_drop(
                lim.drop,
                T=T,
                turn=turn,
                snug=snug,
                snug_torque_nm=snug_torque_nm,
                start_index=start_index,
                reasons=reasons,
            )
        )
    return Proofing(
        reasons=tuple(reasons),
        checks=tuple(checks),
        prevailing_torque_nm=prevailing,
        rundown_angle_deg=rundown_angle,
        contact_to_snug_deg=contact_to_snug,
    )


def _torque_drop(
    fraction: float,
    *,
    T: FloatArray,
    turn: BoolArray,
    snug: int | None,
    snug_torque_nm: float,
    start_index: int,
    reasons: list[Reason],
) -> CheckOutcome:
    if snug is None:
        return CheckOutcome(
            check=Check.TORQUE_DROP, value=None, low=None, high=fraction, passed=None
        )
    Ts = T[snug:]
    ts = turn[snug:]
    peak = np.maximum.accumulate(np.where(ts, Ts, -np.inf))
    judged = ts & (peak >= snug_torque_nm)
    if not judged.any():
        return CheckOutcome(
            check=Check.TORQUE_DROP, value=0.0, low=None, high=fraction, passed=True
        )
    fall = np.zeros(Ts.shape[0])
    np.divide(peak - Ts, peak, out=fall, where=judged)
    worst = float(fall.max())
    hit = judged & (fall >= fraction)
    index = None
    if hit.any():
        index = start_index + snug + int(hit.argmax())
        reasons.append(Reason.TORQUE_FELL_WHILE_TURNING)
    return CheckOutcome(
        check=Check.TORQUE_DROP,
        value=max(worst, 0.0),
        low=None,
        high=fraction,
        passed=index is None,
        index=index,
    )

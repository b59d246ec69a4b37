"""Per-wrench, per-station settings of the engine (not part of a program).

A program says what the joint needs; these settings say how this wrench and this station
behave (its deflection, its gyro, the link, the technician's reaction). Every default carries
its source; where a value is our own engineering choice it says so.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields

from clampd.daemon.engine._errors import EngineUsageError

__all__ = ["EngineSettings"]


@dataclass(frozen=True, slots=True, kw_only=True)
class EngineSettings:
    """How one wrench at one station is read. Invalid values raise ``EngineUsageError``."""

    # Wrench + socket elastic deflection under load, deg per N·m; measured per tool on a rigid
    # fixture. 0 = no compensation (the honest default when it has not been measured).
    deflection_deg_per_nm: float = 0.0
    # A rundown starts when torque rises to this level. Our choice: ~1 % of a 100 N·m wrench,
    # well above strain-bridge noise of a few hundredths of a N·m (from memory, typical bridges).
    start_torque_nm: float = 1.0
    # The tool counts as at rest (gyro bias sampled) while |rate| and |torque| stay below these.
    # MEMS gyro zero-rate offsets are typically within a few deg/s (from memory of datasheets);
    # 5 deg/s admits them while rejecting deliberate motion (hand rotation is tens of deg/s).
    rest_rate_dps: float = 5.0
    rest_torque_nm: float = 0.5
    # Gyro bias = mean rate of the latest at-rest samples spanning this window (the rest before
    # a free run-in counts too).
    # Our choice: long enough to average noise (≥ 250 samples at 250 Hz), short enough that
    # thermal drift of the bias within it is negligible.
    bias_window_s: float = 1.0
    # Rest older than this before the rundown starts is not trusted for the bias: MEMS gyro
    # bias drifts with temperature over minutes (from memory of datasheets); our choice.
    bias_max_age_s: float = 60.0
    # Rest samples closer than this to motion (before it begins, after it ends) are left out
    # of the bias: a hand's rate passes through rest_rate_dps on its way up or down, and at
    # 600 deg/s² (the operator model's pull) that takes ~8 ms, at a gentle 100 deg/s² 50 ms.
    # Counting them biased the estimate by +0.03…+0.13 deg/s in the simulated population
    # (30 rundowns of the cue study, seed 1). Our choice: 0.1 s, twice the gentle case.
    rest_guard_s: float = 0.1
    # Fewer at-rest samples than this and the bias is taken as 0 (nothing trustworthy to remove).
    bias_min_samples: int = 10
    # While angle is counted, a hole in the sample times longer than this ends the rundown NOK
    # (data_gap); shorter holes are bridged by the trapezoid. 50 ms bridges one or two lost
    # 22-sample frames at 1 kHz (the profile's frame size), our choice.
    max_gap_s: float = 0.05
    # Human reaction to an audible cue: ~0.15–0.25 s (DESIGN.md domain notes); middle value.
    reaction_time_s: float = 0.2
    # Time from the engine's cue to sound at the operator's ear (BLE write + buzzer/audio
    # buffer). Our estimate; measure per station.
    cue_latency_s: float = 0.05
    # The approach cue fires this much earlier than the stop cue. Our choice.
    approach_lead_s: float = 0.5
    # Rate of change for the cue prediction is taken over this trailing window (noise vs lag),
    # our choice: 50 ms is ~2 frames at 1 kHz.
    cue_rate_window_s: float = 0.05
    # The stop cue aims this fraction of the way from the target to the upper limit of the
    # window that judges the last step (clipped to it; 0 aims at the target itself). Aiming
    # past the target trades short stops (the rundown stays open until the technician pulls
    # again) for overshoot. Since a pull again hears its stop cue at once (see _engine.py,
    # "Cueing"), short stops cost little. Evidence, cue study population (seed 1, 500 joints,
    # 0.2 s reaction): aim 0 / 0.1 / 0.2 gave 96.8 / 96.2 / 94.6 % of final angles within ±3°
    # (sampling error about ±1 %). We take 0.
    cue_aim: float = 0.0
    # A new ratchet stroke counts angle only once torque is back to this fraction of the level
    # where the previous stroke ended (the fastener does not turn before). Common practice, no
    # source; 0.98 leaves 2 % of the wind-up deflection counted, see tests/test_engine_angle.py.
    resume_fraction: float = 0.98
    # Rundown timeout when the program gives none: torque below release for this long ends the
    # rundown NOK (timeout). Our choice: longer than a re-grip between ratchet strokes.
    timeout_s: float = 5.0
    # The run-in (free rundown counted for error proofing, see _proofing.py) starts afresh after
    # the wrench has rested this long: a technician who lets go for a second has left the
    # fastener. Our choice: regrips between ratchet strokes take a few tenths of a second.
    runin_rest_s: float = 1.0

    def __post_init__(self) -> None:
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, bool) or not isinstance(value, int | float):
                raise EngineUsageError(f"setting {f.name} must be a number, got {value!r}")
            if not math.isfinite(value):
                raise EngineUsageError(f"setting {f.name} must be finite, got {value!r}")
        positive = (
            "start_torque_nm",
            "rest_rate_dps",
            "rest_torque_nm",
            "bias_window_s",
            "bias_max_age_s",
            "max_gap_s",
            "cue_rate_window_s",
            "timeout_s",
            "runin_rest_s",
        )
        for name in positive:
            if getattr(self, name) <= 0:
                raise EngineUsageError(f"setting {name} must be > 0, got {getattr(self, name)!r}")
        for name in (
            "deflection_deg_per_nm",
            "rest_guard_s",
            "reaction_time_s",
            "cue_latency_s",
            "approach_lead_s",
        ):
            if getattr(self, name) < 0:
                raise EngineUsageError(f"setting {name} must be >= 0, got {getattr(self, name)!r}")
        if not 0.0 < self.resume_fraction <= 1.0:
            raise EngineUsageError(
                f"setting resume_fraction must be in (0, 1], got {self.resume_fraction!r}"
            )
        if not 0.0 <= self.cue_aim <= 1.0:
            raise EngineUsageError(f"setting cue_aim must be in [0, 1], got {self.cue_aim!r}")
        if self.bias_min_samples < 1:
            raise EngineUsageError("setting bias_min_samples must be >= 1")

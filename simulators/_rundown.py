"""Closed-loop rundown: operator, wrench and joint, sampled by the virtual sensor, with a cue hook.

Theory of operation. :func:`simulate_rundown` builds a :class:`Bench` (one joint, one operator)
and a :class:`VirtualWrenchSensor` on it, then takes samples one at a time on the sensor's clock.
After every sample it offers the controller (``cue_listener``) what a controller may see — the
decoded :class:`Reading`, never the truth — and delivers any cue it returns to the operator, after
an optional delivery delay (speaker or radio latency) in sensor time. The run ends a short tail
after the operator has released the tool, or at the duration limit.

The :class:`Trace` keeps the measured stream and the truth side by side (true fastener angle,
preload, torque, handle angle) so studies can score a controller against the physics.

Reproducibility: the generator passed in is split once (``rng.spawn``) into the sensor's and
the operator's streams; the same seed gives the same trace and a byte-identical CSV.
"""

from __future__ import annotations

import dataclasses
from collections import deque
from collections.abc import Callable
from pathlib import Path

import numpy as np
import numpy.typing as npt

from clampd.simulators._encoder import CuePattern
from clampd.simulators._joint import JointModel
from clampd.simulators._operator import Bench, OperatorParams
from clampd.simulators._sensor import Reading, SensorError, SensorParams, VirtualWrenchSensor

__all__ = ["CSV_HEADER", "CueListener", "Trace", "simulate_rundown"]

CSV_HEADER = "t_s,torque_nm,rate_dps"

CueListener = Callable[[Reading], CuePattern | None]
"""Called after every sample with what the sensor reported; may return a cue to play."""


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True, eq=False)
class Trace:
    """One rundown: the measured sample stream (sensor time) and the truth behind it.

    Compared by identity (arrays have no single truth value); compare ``csv_text()`` or the
    arrays themselves.
    """

    t_s: npt.NDArray[np.float64]  # sensor clock, s, first sample at 0
    torque_nm: npt.NDArray[np.float64]  # measured (quantised) torque
    rate_dps: npt.NDArray[np.float64]  # measured rates, shape (n, 3), sensor axes
    axis_rate_dps: npt.NDArray[np.float64]  # measured, about the fastener axis, + tightening
    true_time_s: npt.NDArray[np.float64]  # host time of each sample
    true_torque_nm: npt.NDArray[np.float64]
    true_handle_rate_dps: npt.NDArray[np.float64]
    handle_angle_deg: npt.NDArray[np.float64]
    fastener_angle_deg: npt.NDArray[np.float64]
    preload_n: npt.NDArray[np.float64]
    yielded: npt.NDArray[np.bool_]
    broken: npt.NDArray[np.bool_]
    cues: tuple[tuple[float, CuePattern], ...]  # (sensor t_s when played, pattern)
    joint: JointModel
    sensor: SensorParams
    operator: OperatorParams
    stop_reason: str | None  # why the operator stopped; None when the time limit ended it

    def __len__(self) -> int:
        return int(self.t_s.shape[0])

    def csv_text(self) -> str:
        """The replay CSV (``t_s,torque_nm,rate_dps``; rate about the fastener axis)."""
        lines = [CSV_HEADER]
        lines.extend(
            f"{t:.6f},{m:.6f},{r:.6f}"
            for t, m, r in zip(
                self.t_s.tolist(), self.torque_nm.tolist(), self.axis_rate_dps.tolist(), strict=True
            )
        )
        return "\n".join(lines) + "\n"

    def to_csv(self, path: str | Path) -> None:
        """Write the replay CSV; the text is fixed-format so equal traces give equal bytes."""
        Path(path).write_text(self.csv_text(), encoding="ascii", newline="\n")


def simulate_rundown(
    joint: JointModel,
    sensor_params: SensorParams,
    operator: OperatorParams,
    rng: np.random.Generator,
    *,
    duration_limit_s: float = 30.0,
    cue_listener: CueListener | None = None,
    cue_delay_s: float = 0.0,
    tail_s: float = 0.3,
) -> Trace:
    """Run one rundown in closed loop and return its trace.

    ``cue_listener`` stands for the controller; its cues reach the operator ``cue_delay_s``
    later (sensor time). Raises :class:`SensorError` on a non-positive limit or negative delay.
    """
    if not duration_limit_s > 0.0 or not tail_s >= 0.0 or not cue_delay_s >= 0.0:
        raise SensorError("duration_limit_s must be > 0, tail_s and cue_delay_s ≥ 0")
    sensor_rng, operator_rng = rng.spawn(2)
    bench = Bench(
        joint,
        dataclasses.replace(operator, part_pause_s=(0.0, 0.0)),
        operator_rng,
        deflection_deg_per_nm=sensor_params.deflection_deg_per_nm,
    )
    sensor = VirtualWrenchSensor(
        dataclasses.replace(sensor_params, start_timestamp_us=0), sensor_rng, bench
    )
    n_max = int(duration_limit_s * sensor_params.sample_rate_hz) + 1
    cols: dict[str, list[float]] = {k: [] for k in _COLUMNS}
    flags: dict[str, list[bool]] = {"yielded": [], "broken": []}
    rates: list[tuple[float, float, float]] = []
    pending: deque[tuple[float, CuePattern]] = deque()
    played: list[tuple[float, CuePattern]] = []
    stop_reason: str | None = None
    end_at: float | None = None
    for _ in range(n_max):
        s = sensor.sample_once()
        r, m = s.reading, s.truth
        for key, value in (
            ("t_s", r.t_s),
            ("torque_nm", r.torque_nm),
            ("axis_rate_dps", r.axis_rate_dps),
            ("true_time_s", s.true_time_s),
            ("true_torque_nm", m.torque_nm),
            ("true_handle_rate_dps", m.handle_rate_dps),
            ("handle_angle_deg", m.handle_angle_deg),
            ("fastener_angle_deg", m.fastener_angle_deg),
            ("preload_n", m.preload_n),
        ):
            cols[key].append(value)
        flags["yielded"].append(m.yielded)
        flags["broken"].append(m.broken)
        rates.append(r.rate_dps)
        while pending and pending[0][0] <= r.t_s:
            _, due = pending.popleft()
            played.append((r.t_s, due))
            bench.hear(due)
        if cue_listener is not None:
            cue = cue_listener(r)
            if cue is not None:
                if cue_delay_s == 0.0:
                    played.append((r.t_s, cue))
                    bench.hear(cue)
                else:
                    pending.append((r.t_s + cue_delay_s, cue))
        if end_at is None and bench.parts_done >= 1:
            stop_reason = bench.stop_reasons[0]
            end_at = r.t_s + tail_s
        if end_at is not None and r.t_s >= end_at:
            break
    return Trace(
        t_s=_f64(cols["t_s"]),
        torque_nm=_f64(cols["torque_nm"]),
        axis_rate_dps=_f64(cols["axis_rate_dps"]),
        true_time_s=_f64(cols["true_time_s"]),
        true_torque_nm=_f64(cols["true_torque_nm"]),
        true_handle_rate_dps=_f64(cols["true_handle_rate_dps"]),
        handle_angle_deg=_f64(cols["handle_angle_deg"]),
        fastener_angle_deg=_f64(cols["fastener_angle_deg"]),
        preload_n=_f64(cols["preload_n"]),
        rate_dps=np.asarray(rates, dtype=np.float64).reshape(-1, 3),
        yielded=np.asarray(flags["yielded"], dtype=np.bool_),
        broken=np.asarray(flags["broken"], dtype=np.bool_),
        cues=tuple(played),
        joint=joint,
        sensor=sensor_params,
        operator=operator,
        stop_reason=stop_reason,
    )


_COLUMNS = (
    "t_s",
    "torque_nm",
    "axis_rate_dps",
    "true_time_s",
    "true_torque_nm",
    "true_handle_rate_dps",
    "handle_angle_deg",
    "fastener_angle_deg",
    "preload_n",
)


def _f64(values: list[float]) -> npt.NDArray[np.float64]:
    return np.asarray(values, dtype=np.float64)

"""Bolted-joint physics: the torque a fastener resists with, as a function of how far it turned.

Theory of operation. The fastener angle ``angle_deg`` counts from the start of a rundown. Until
the head touches (``contact_angle_deg``) only the prevailing torque acts (a locking element or a
damaged thread). From contact the nut advances ``P/360`` mm per degree; the advance closes a
small gap and flattens surface roughness first (``seating_angle_deg``: the clamp force rises with
the square of the advance, so the torque-angle curve bends upward), then the joint is linear
elastic with

    F = (θ − θ0)/360 · P / (δS + δP)            (resilience relation, VDI 2230 Part 1)

where θ0 is the elastic line's intercept (contact + half the seating angle, so that force and
slope are continuous at snug). The torque needed to turn the fastener is

    MA = F · (P/(2π) + μG · d2/(2·cos 30°) + μK · DKm/2) + MÜ

the linearised thread-torque relation of VDI 2230 Part 1 (0.16·P + 0.58·d2·μG is its rounded
form) plus the prevailing torque MÜ. The thread torque twists the bolt: with the plastic
torsional section modulus π·d0³/12 (VDI 2230 uses it for the assembly state) the equivalent
stress is σred = sqrt(σM² + 3·τ²), σM = F/A0, so σred is proportional to F and yield onset sits
at the closed-form preload

    F_y = A0 · Rp0.2 / sqrt(1 + 3·[3/2 · d2/d0 · (P/(π·d2) + 1.155·μG)]²)

(VDI 2230 Part 1 with ν = 1). Past F_y the bolt lengthens plastically with hyperbolic hardening
toward the Rm-based limit F_u = F_y · Rm/Rp0.2, u_p = u_h · x/(1−x), x = (F−F_y)/(F_u−F_y); the
torque-angle slope therefore falls from the elastic value at yield onset. When the plastic
elongation reaches the fracture elongation the bolt breaks: preload and torque drop to zero. A
stripped thread behaves alike at ``strip_preload_n`` (the nut spins on with the prevailing torque).

Invariants. The fastener never turns backwards in a rundown, so every quantity is a function of
the fastener angle alone (plastic deformation and fracture are reached at one angle and stay
beyond it). The model shares published formulas with the planner but not its code: it is the
independent truth that the engine and the planner are checked against.

All lengths are mm, forces N, stresses MPa (N/mm²), torques N·m, angles degrees.
"""

from __future__ import annotations

import dataclasses
import enum
import math
from collections.abc import Mapping
from typing import NamedTuple

import numpy as np
import numpy.typing as npt

__all__ = [
    "ISO_COARSE_PITCH_MM",
    "PROPERTY_CLASSES",
    "Fault",
    "JointError",
    "JointModel",
    "JointPoint",
    "JointPopulation",
    "JointResponse",
    "apply_fault",
    "bolt_resilience_mm_per_n",
    "clamped_resilience_mm_per_n",
]

_COS30 = math.cos(math.radians(30.0))

# ISO 261 / ISO 724 coarse pitches (mm) and ISO 4014 minimum bearing diameters dw (mm), with the
# ISO 273 medium-series clearance hole dh (mm). Values from memory of those standards.
ISO_COARSE_PITCH_MM: Mapping[int, float] = {6: 1.0, 8: 1.25, 10: 1.5, 12: 1.75, 16: 2.0, 20: 2.5}
_BEARING_DW_MM: Mapping[int, float] = {
    6: 8.88,
    8: 11.63,
    10: 14.63,
    12: 16.63,
    16: 22.49,
    20: 28.19,
}
_HOLE_DH_MM: Mapping[int, float] = {6: 6.6, 8: 9.0, 10: 11.0, 12: 13.5, 16: 17.5, 20: 22.0}

# ISO 898-1 minimum lower yield / 0.2 % proof strength and minimum tensile strength (MPa) for
# d ≤ 16 mm (8.8 above 16 mm: 660 / 830). From memory of ISO 898-1 Table 3.
PROPERTY_CLASSES: Mapping[str, tuple[float, float]] = {
    "8.8": (640.0, 800.0),
    "10.9": (940.0, 1040.0),
    "12.9": (1100.0, 1220.0),
}

_E_STEEL_MPA = 205_000.0  # Young's modulus of steel used by VDI 2230 examples (common practice)


class JointError(ValueError):
    """Joint parameters that no physical joint can have (the caller's input)."""


class Fault(enum.Enum):
    """Joint faults the error-proofing tests provoke; each maps to parameters, nothing else."""

    NONE = "none"
    REHIT = "rehit"  # already tightened: starts past snug
    STRIPPED_THREAD = "stripped-thread"  # thread shears below the bolt's yield point
    MISSING_WASHER = "missing-washer"  # softer clamped part, more embedding, smaller head bearing
    CROSS_THREAD = "cross-thread"  # high and rising prevailing torque
    LONG_BOLT = "long-bolt"  # more free rundown before the head touches


class JointPoint(NamedTuple):
    """One fastener angle's state (scalars)."""

    torque_nm: float
    preload_n: float
    yielded: bool
    broken: bool


class _Derived(NamedTuple):
    """Constants of one joint that ``point`` needs on every call (computed once)."""

    fracture_angle_deg: float
    delta_mm_per_n: float
    u_seat_mm: float
    yield_preload_n: float
    ultimate_preload_n: float
    torque_per_newton_nm: float
    hardening_mm: float
    strip_u_mm: float | None  # advance past contact where the thread strips (None: never)


class JointResponse(NamedTuple):
    """The state over an array of fastener angles."""

    torque_nm: npt.NDArray[np.float64]
    preload_n: npt.NDArray[np.float64]
    yielded: npt.NDArray[np.bool_]
    broken: npt.NDArray[np.bool_]


def bolt_resilience_mm_per_n(
    d_mm: float, p_mm: float, clamp_length_mm: float, e_mpa: float
) -> float:
    """Axial resilience δS of a fully threaded hex bolt with a nut (mm/N).

    VDI 2230 Part 1 element sum (from memory): head 0.5·d over the nominal area, the loaded free
    thread (= clamp length) and 0.5·d of engaged thread over the core area Ad3, nut 0.4·d over
    the nominal area.
    """
    _positive(d_mm=d_mm, p_mm=p_mm, clamp_length_mm=clamp_length_mm, e_mpa=e_mpa)
    a_n = math.pi / 4.0 * d_mm**2
    d3 = d_mm - 1.226869 * p_mm
    a_d3 = math.pi / 4.0 * d3**2
    return (0.5 * d_mm / a_n + (clamp_length_mm + 0.5 * d_mm) / a_d3 + 0.4 * d_mm / a_n) / e_mpa


def clamped_resilience_mm_per_n(
    dw_mm: float, dh_mm: float, outer_mm: float, clamp_length_mm: float, e_mpa: float
) -> float:
    """Compressive resilience δP of the clamped parts via a substitute sleeve (mm/N).

    Substitute-sleeve area of the 1986 edition of VDI 2230 (from memory):
    A = π/4·(dw² − dh²) + π/8·dw·(DA − dw)·((x+1)² − 1), x = ∛(lK·dw/DA²), with the outer
    diameter DA limited to dw + lK (the pressure cone does not spread further).
    """
    _positive(dw_mm=dw_mm, dh_mm=dh_mm, outer_mm=outer_mm, clamp_length_mm=clamp_length_mm)
    _positive(e_mpa=e_mpa)
    if dh_mm >= dw_mm or outer_mm < dw_mm:
        raise JointError(f"need dh < dw ≤ DA, got dh={dh_mm}, dw={dw_mm}, DA={outer_mm}")
    da = min(outer_mm, dw_mm + clamp_length_mm)
    x = math.cbrt(clamp_length_mm * dw_mm / da**2)
    area = math.pi / 4.0 * (dw_mm**2 - dh_mm**2) + math.pi / 8.0 * dw_mm * (da - dw_mm) * (
        (x + 1.0) ** 2 - 1.0
    )
    return clamp_length_mm / (e_mpa * area)


def _positive(**values: float) -> None:
    for name, value in values.items():
        if not (math.isfinite(value) and value > 0.0):
            raise JointError(f"{name} must be finite and > 0, got {value!r}")


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class JointModel:
    """One physical joint (bolt, nut, clamped parts, friction), immutable.

    Build one directly for a reference check, or draw one from a population with
    :meth:`sample`. Raises :class:`JointError` on impossible parameters.
    """

    d_mm: float
    pitch_mm: float
    rp02_mpa: float  # actual 0.2 % proof strength of this bolt (not the class minimum)
    rm_mpa: float  # actual tensile strength of this bolt
    mu_thread: float  # μG
    mu_head: float  # μK
    head_friction_diameter_mm: float  # DKm
    bolt_resilience_mm_per_n: float  # δS
    clamped_resilience_mm_per_n: float  # δP
    contact_angle_deg: float = 90.0
    seating_angle_deg: float = 8.0
    prevailing_torque_nm: float = 0.0  # MÜ at the start of the rundown
    prevailing_slope_nm_per_deg: float = 0.0  # cross-threading makes MÜ grow with angle
    fracture_elongation_mm: float = 0.5  # plastic bolt elongation at fracture
    strip_preload_n: float | None = None  # thread strips at this preload (None: never)
    fault: Fault = Fault.NONE
    # Derived constants, computed once in __post_init__: point() runs ~10 times per simulated
    # sample inside the bench's root search, and recomputing them there doubled study times.
    _k: _Derived = dataclasses.field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        _positive(
            d_mm=self.d_mm,
            pitch_mm=self.pitch_mm,
            rp02_mpa=self.rp02_mpa,
            rm_mpa=self.rm_mpa,
            head_friction_diameter_mm=self.head_friction_diameter_mm,
            bolt_resilience_mm_per_n=self.bolt_resilience_mm_per_n,
            clamped_resilience_mm_per_n=self.clamped_resilience_mm_per_n,
            seating_angle_deg=self.seating_angle_deg,
            fracture_elongation_mm=self.fracture_elongation_mm,
        )
        if self.pitch_mm >= self.d_mm / 2.0:
            raise JointError(f"pitch {self.pitch_mm} mm is implausible for d = {self.d_mm} mm")
        if self.rm_mpa <= self.rp02_mpa:
            raise JointError(f"Rm ({self.rm_mpa}) must exceed Rp0.2 ({self.rp02_mpa})")
        for name in ("mu_thread", "mu_head"):
            mu = getattr(self, name)
            if not (math.isfinite(mu) and 0.0 < mu < 1.0):
                raise JointError(f"{name} must lie in (0, 1), got {mu!r}")
        for name in ("contact_angle_deg", "prevailing_torque_nm", "prevailing_slope_nm_per_deg"):
            if not math.isfinite(getattr(self, name)):
                raise JointError(f"{name} must be finite")
        if self.prevailing_torque_nm < 0.0 or self.prevailing_slope_nm_per_deg < 0.0:
            raise JointError("prevailing torque and its slope must be ≥ 0")
        if self.strip_preload_n is not None:
            _positive(strip_preload_n=self.strip_preload_n)
        # frozen and slotted: functools.cached_property cannot be used, so set the field directly
        object.__setattr__(self, "_k", self._derive())

    def _derive(self) -> _Derived:
        # the same expressions as the properties below, so cached and fresh values are identical
        delta = self.bolt_resilience_mm_per_n + self.clamped_resilience_mm_per_n
        u_seat = self.seating_angle_deg * self.pitch_mm / 360.0
        strip_u: float | None = None
        if self.strip_preload_n is not None:
            f_strip = min(self.strip_preload_n, self.yield_preload_n)
            strip_u = f_strip * delta + u_seat / 2.0
            if f_strip * delta < u_seat / 2.0:  # strips inside the seating region
                strip_u = math.sqrt(2.0 * u_seat * delta * f_strip)
        return _Derived(
            fracture_angle_deg=self.fracture_angle_deg,
            delta_mm_per_n=delta,
            u_seat_mm=u_seat,
            yield_preload_n=self.yield_preload_n,
            ultimate_preload_n=self.ultimate_preload_n,
            torque_per_newton_nm=self.torque_per_newton_nm,
            hardening_mm=self._hardening_mm,
            strip_u_mm=strip_u,
        )

    # -- geometry (ISO 68-1 basic profile) ------------------------------------------------
    @property
    def d2_mm(self) -> float:
        """Pitch diameter d2 = d − 0.649519·P (ISO 724)."""
        return self.d_mm - 0.649519 * self.pitch_mm

    @property
    def d3_mm(self) -> float:
        """Minor diameter of the bolt d3 = d − 1.226869·P (ISO 724)."""
        return self.d_mm - 1.226869 * self.pitch_mm

    @property
    def d0_mm(self) -> float:
        """Diameter of the stress cross-section (d2 + d3)/2 for a fully threaded bolt."""
        return (self.d2_mm + self.d3_mm) / 2.0

    @property
    def stress_area_mm2(self) -> float:
        """Tensile stress area As = π/4·((d2+d3)/2)² (ISO 898-1)."""
        return math.pi / 4.0 * self.d0_mm**2

    @property
    def joint_stiffness_n_per_deg(self) -> float:
        """Preload gained per degree in the elastic range: P/360 / (δS + δP)."""
        return (
            self.pitch_mm
            / 360.0
            / (self.bolt_resilience_mm_per_n + self.clamped_resilience_mm_per_n)
        )

    @property
    def torque_per_newton_nm(self) -> float:
        """dMA/dF: thread lead + thread friction + head friction lever arms (m)."""
        lever_mm = (
            self.pitch_mm / (2.0 * math.pi)
            + self.mu_thread * self.d2_mm / (2.0 * _COS30)
            + self.mu_head * self.head_friction_diameter_mm / 2.0
        )
        return lever_mm / 1000.0

    @property
    def thread_torque_per_newton_nm(self) -> float:
        """dMG/dF: the part of the torque that twists the bolt (m)."""
        return (
            self.pitch_mm / (2.0 * math.pi) + self.mu_thread * self.d2_mm / (2.0 * _COS30)
        ) / 1000.0

    @property
    def equivalent_stress_per_newton(self) -> float:
        """σred/F (1/mm²): tension plus torsion with the plastic section modulus π·d0³/12."""
        sigma = 1.0 / self.stress_area_mm2
        tau = self.thread_torque_per_newton_nm * 1000.0 / (math.pi * self.d0_mm**3 / 12.0)
        return math.sqrt(sigma**2 + 3.0 * tau**2)

    # -- landmarks for studies ----------------------------------------------------------
    @property
    def snug_angle_deg(self) -> float:
        """Angle where seating ends and the curve becomes linear (true snug)."""
        return self.contact_angle_deg + self.seating_angle_deg

    @property
    def elastic_origin_deg(self) -> float:
        """Intercept of the elastic force line with zero force."""
        return self.contact_angle_deg + self.seating_angle_deg / 2.0

    @property
    def yield_preload_n(self) -> float:
        """Preload at which σred reaches Rp0.2 (yield onset)."""
        return self.rp02_mpa / self.equivalent_stress_per_newton

    @property
    def ultimate_preload_n(self) -> float:
        """Asymptotic preload of the hardening branch, scaled from Rm."""
        return self.rm_mpa / self.equivalent_stress_per_newton

    @property
    def true_yield_onset_angle_deg(self) -> float:
        """Fastener angle at yield onset (if the thread strips first, the joint never yields)."""
        return self.elastic_origin_deg + self.yield_preload_n / self.joint_stiffness_n_per_deg

    @property
    def snug_torque_nm(self) -> float:
        """Torque at true snug."""
        return self.point(self.snug_angle_deg).torque_nm

    @property
    def _hardening_mm(self) -> float:
        # u_h: plastic elongation scale of the hardening law; a third of the fracture
        # elongation puts fracture at x = 0.75, past the torque peak region (modelling choice).
        return self.fracture_elongation_mm / 3.0

    @property
    def fracture_angle_deg(self) -> float:
        """Fastener angle at which the bolt breaks."""
        x = 0.75
        f = self.yield_preload_n + x * (self.ultimate_preload_n - self.yield_preload_n)
        delta = self.bolt_resilience_mm_per_n + self.clamped_resilience_mm_per_n
        u = f * delta + self.fracture_elongation_mm
        return self.elastic_origin_deg + u * 360.0 / self.pitch_mm

    def prevailing_nm(self, angle_deg: float) -> float:
        """Prevailing torque at an angle (grows for a cross-threaded nut)."""
        return self.prevailing_torque_nm + self.prevailing_slope_nm_per_deg * max(angle_deg, 0.0)

    # -- the response ------------------------------------------------------------------
    def point(self, angle_deg: float) -> JointPoint:
        """Torque needed to keep turning, preload and flags at one fastener angle."""
        if not math.isfinite(angle_deg):
            raise JointError(f"angle must be finite, got {angle_deg!r}")
        k = self._k
        mu_prev = self.prevailing_nm(angle_deg)
        if angle_deg >= k.fracture_angle_deg:
            return JointPoint(0.0, 0.0, True, True)
        u_contact = (angle_deg - self.contact_angle_deg) * self.pitch_mm / 360.0
        if u_contact <= 0.0:
            return JointPoint(mu_prev, 0.0, False, False)
        u_seat = k.u_seat_mm
        delta = k.delta_mm_per_n
        if u_contact < u_seat:
            force = u_contact**2 / (2.0 * u_seat * delta)
        else:
            force = (u_contact - u_seat / 2.0) / delta
        f_y, f_u = k.yield_preload_n, k.ultimate_preload_n
        yielded = force > f_y
        if yielded:
            a = (f_u - f_y) * delta
            excess = (u_contact - u_seat / 2.0) - f_y * delta
            b = a + k.hardening_mm + excess
            x = (b - math.sqrt(b * b - 4.0 * a * excess)) / (2.0 * a)
            force = f_y + x * (f_u - f_y)
        if k.strip_u_mm is not None and u_contact >= k.strip_u_mm:
            return JointPoint(mu_prev, 0.0, yielded, True)
        return JointPoint(force * k.torque_per_newton_nm + mu_prev, force, yielded, False)

    def torque_at(self, angle_deg: npt.ArrayLike) -> JointResponse:
        """The response over an array of fastener angles (any shape, same shape out)."""
        angles = np.asarray(angle_deg, dtype=np.float64)
        flat = angles.ravel()
        points = [self.point(float(a)) for a in flat]
        shape = angles.shape
        return JointResponse(
            np.array([p.torque_nm for p in points], dtype=np.float64).reshape(shape),
            np.array([p.preload_n for p in points], dtype=np.float64).reshape(shape),
            np.array([p.yielded for p in points], dtype=np.bool_).reshape(shape),
            np.array([p.broken for p in points], dtype=np.bool_).reshape(shape),
        )

    @classmethod
    def sample(
        cls,
        rng: np.random.Generator,
        population: JointPopulation | None = None,
        fault: Fault = Fault.NONE,
    ) -> JointModel:
        """Draw one joint of a population (default: M10 8.8, steel, 30 mm clamp length)."""
        return (population or JointPopulation()).draw(rng, fault)


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class JointPopulation:
    """The scatter of a production joint: what varies from one bolt to the next.

    Friction is drawn from normal distributions truncated to ±3 σ; the bolt's actual proof
    strength lies above the class minimum (as delivered bolts do), with a coefficient of
    variation; contact angle and seating width vary with part tolerances.
    """

    d_mm: int = 10
    pitch_mm: float | None = None  # None: ISO coarse pitch
    property_class: str = "8.8"
    clamp_length_mm: float = 30.0
    outer_diameter_mm: float | None = None  # None: 3·d
    clamped_e_mpa: float = _E_STEEL_MPA
    # Friction class of lightly oiled zinc-plated parts, μ ≈ 0.10–0.16 (common practice, no
    # source; VDI 2230 Part 1 Table A5 gives classes of this width).
    mu_thread_mean: float = 0.13
    mu_thread_sd: float = 0.01
    mu_head_mean: float = 0.13
    mu_head_sd: float = 0.012
    # Delivered bolts exceed the class minimum by ~10 % with ~3 % scatter (from memory of
    # published lot statistics; a modelling choice for the demo).
    strength_margin: float = 1.10
    strength_cv: float = 0.03
    contact_angle_deg: tuple[float, float] = (60.0, 180.0)  # uniform range
    seating_angle_deg: tuple[float, float] = (5.0, 15.0)  # uniform range, "a few degrees"
    prevailing_torque_nm: float = 0.0
    fracture_elongation_per_pitch: tuple[float, float] = (0.3, 0.5)  # uniform, in pitches

    def draw(self, rng: np.random.Generator, fault: Fault = Fault.NONE) -> JointModel:
        """One joint; the fault, if any, is applied on top of the drawn scatter."""
        if self.d_mm not in ISO_COARSE_PITCH_MM:
            raise JointError(f"no geometry for M{self.d_mm}; sizes: {sorted(ISO_COARSE_PITCH_MM)}")
        if self.property_class not in PROPERTY_CLASSES:
            raise JointError(f"unknown property class {self.property_class!r}")
        d = float(self.d_mm)
        pitch = self.pitch_mm if self.pitch_mm is not None else ISO_COARSE_PITCH_MM[self.d_mm]
        rp_min, rm_min = PROPERTY_CLASSES[self.property_class]
        dw, dh = _BEARING_DW_MM[self.d_mm], _HOLE_DH_MM[self.d_mm]
        outer = self.outer_diameter_mm if self.outer_diameter_mm is not None else 3.0 * d
        delta_s = bolt_resilience_mm_per_n(d, pitch, self.clamp_length_mm, _E_STEEL_MPA)
        delta_p = clamped_resilience_mm_per_n(
            dw, dh, outer, self.clamp_length_mm, self.clamped_e_mpa
        )
        scale = self.strength_margin * (1.0 + self.strength_cv * _trunc_normal(rng))
        mu_g = self.mu_thread_mean + self.mu_thread_sd * _trunc_normal(rng)
        mu_k = self.mu_head_mean + self.mu_head_sd * _trunc_normal(rng)
        contact = float(rng.uniform(*self.contact_angle_deg))
        seating = float(rng.uniform(*self.seating_angle_deg))
        fracture = float(rng.uniform(*self.fracture_elongation_per_pitch)) * pitch
        joint = JointModel(
            d_mm=d,
            pitch_mm=pitch,
            rp02_mpa=rp_min * scale,
            rm_mpa=rm_min * scale,
            mu_thread=mu_g,
            mu_head=mu_k,
            head_friction_diameter_mm=(dw + dh) / 2.0,
            bolt_resilience_mm_per_n=delta_s,
            clamped_resilience_mm_per_n=delta_p,
            contact_angle_deg=contact,
            seating_angle_deg=seating,
            prevailing_torque_nm=self.prevailing_torque_nm,
            fracture_elongation_mm=fracture,
        )
        return apply_fault(joint, fault, rng)


def _trunc_normal(rng: np.random.Generator) -> float:
    z = float(rng.standard_normal())
    return max(-3.0, min(3.0, z))


def apply_fault(joint: JointModel, fault: Fault, rng: np.random.Generator) -> JointModel:
    """Turn a sound joint into a faulty one; the magnitudes are modelling choices for tests."""
    match fault:
        case Fault.NONE:
            return joint
        case Fault.REHIT:
            # Previously tightened to 60–80 % of yield: the rundown starts on the elastic line.
            f0 = float(rng.uniform(0.6, 0.8)) * joint.yield_preload_n
            start = joint.elastic_origin_deg + f0 / joint.joint_stiffness_n_per_deg
            shift = joint.contact_angle_deg - start
            return dataclasses.replace(joint, contact_angle_deg=shift, fault=fault)
        case Fault.STRIPPED_THREAD:
            strip = float(rng.uniform(0.3, 0.6)) * joint.yield_preload_n
            return dataclasses.replace(joint, strip_preload_n=strip, fault=fault)
        case Fault.MISSING_WASHER:
            # The head bears on the softer part around the hole edge: ~1.6× compliance,
            # twice the embedding, bearing circle shrunk by ~10 % (modelling choice).
            return dataclasses.replace(
                joint,
                clamped_resilience_mm_per_n=joint.clamped_resilience_mm_per_n * 1.6,
                seating_angle_deg=joint.seating_angle_deg * 2.0,
                head_friction_diameter_mm=joint.head_friction_diameter_mm * 0.9,
                fault=fault,
            )
        case Fault.CROSS_THREAD:
            snug_free = joint.torque_per_newton_nm * joint.yield_preload_n
            return dataclasses.replace(
                joint,
                prevailing_torque_nm=0.08 * snug_free,
                prevailing_slope_nm_per_deg=0.15 * snug_free / 360.0,
                fault=fault,
            )
        case Fault.LONG_BOLT:
            extra = float(rng.uniform(540.0, 1080.0))
            return dataclasses.replace(
                joint, contact_angle_deg=joint.contact_angle_deg + extra, fault=fault
            )

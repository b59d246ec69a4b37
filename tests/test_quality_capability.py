"""Capability indices (Cm/Cmk, Cp/Cpk) against published worked examples and reference libraries.

Sources beside each check:
- Montgomery, "Introduction to Statistical Quality Control" (6th ed.), ch. 6 and 8, worked
  examples: piston-ring inside diameter (x̿ = 74.001 mm, R̄ = 0.023 mm, n = 5, specification
  74.000 ± 0.05 mm, Cp ≈ 1.68); hard-bake flow width (R̄ = 0.32521 µm, n = 5, specification
  1.00–2.00 µm, Cp = 1.192); glass-bottle bursting strength (x̄ = 264, s = 32 psi,
  LSL = 200 psi, Cpl = 0.67). All from memory.
- Python's ``statistics`` module and numpy (``std(ddof=1)``) as independent standard deviations;
  scipy.stats.norm for the normal tail that Ck stands for.
"""

from __future__ import annotations

import math
import statistics

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy import stats as sps

from clampd.daemon.quality import CapabilityError, capability, sample_mean_std, shewhart


def test_piston_ring_cp_from_montgomery() -> None:
    # Montgomery ch. 8 (from memory): σ̂ = R̄/d2 = 0.023/2.326 = 0.0099; Cp = 0.10/(6·0.0099) = 1.68.
    sigma = 0.023 / shewhart(5).d2
    cap = capability(mean=74.001, sigma=sigma, lsl=73.95, usl=74.05)
    assert cap.c is not None
    assert cap.c == pytest.approx(1.68, abs=0.01)
    # Off-centre by 0.001 mm: Ck = (74.05 − 74.001)/(3σ̂), just below Cp.
    assert cap.ck == pytest.approx((74.05 - 74.001) / (3 * sigma), rel=1e-12)
    assert cap.ck is not None
    assert cap.ck < cap.c


def test_hard_bake_cp_from_montgomery() -> None:
    # Montgomery ch. 8 (from memory): σ̂ = 0.32521/2.326 = 0.1398, Cp = 1/(6·0.1398) = 1.192.
    cap = capability(mean=1.5056, sigma=0.32521 / 2.326, lsl=1.0, usl=2.0)
    assert cap.c == pytest.approx(1.192, abs=0.0005)


def test_one_sided_bottle_strength_from_montgomery() -> None:
    # Montgomery ch. 8 (from memory): Cpl = (264 − 200)/(3·32) = 0.67; no Cp without a USL.
    cap = capability(mean=264.0, sigma=32.0, lsl=200.0, usl=None)
    assert cap.c is None
    assert cap.ck == pytest.approx(0.67, abs=0.005)
    upper_only = capability(mean=264.0, sigma=32.0, lsl=None, usl=300.0)
    assert upper_only.c is None
    assert upper_only.ck == pytest.approx(36.0 / 96.0)


def test_cm_cmk_of_a_torque_sample_against_independent_statistics() -> None:
    # Invented demo data: 50 final torques of a 47.5 N·m joint, window 40–58 N·m.
    rng = np.random.default_rng(20261201)
    torques = list(47.5 + 0.9 * rng.standard_normal(50))
    mean, s = sample_mean_std(torques)
    assert mean == pytest.approx(statistics.fmean(torques), rel=1e-15)
    assert s == pytest.approx(statistics.stdev(torques), rel=1e-12)
    assert s == pytest.approx(float(np.std(torques, ddof=1)), rel=1e-12)
    cap = capability(mean=mean, sigma=s, lsl=40.0, usl=58.0)
    assert cap.c == pytest.approx(18.0 / (6 * statistics.stdev(torques)), rel=1e-12)
    nearer = min(58.0 - mean, mean - 40.0)
    assert cap.ck == pytest.approx(nearer / (3 * statistics.stdev(torques)), rel=1e-12)
    # Ck is the nearer limit's distance in units of 3σ: the normal tail there is Φ(−3·Ck).
    assert cap.ck is not None
    tail = sps.norm.sf(nearer, loc=0.0, scale=s)
    assert sps.norm.sf(3 * cap.ck) == pytest.approx(tail, rel=1e-9)


@given(
    mean=st.floats(-1e3, 1e3),
    sigma=st.floats(1e-3, 1e2),
    lsl=st.floats(-1e3, 1e3),
    width=st.floats(1e-2, 1e3),
)
def test_ck_never_exceeds_c_and_equals_it_when_centred(
    mean: float, sigma: float, lsl: float, width: float
) -> None:
    # Definitional (ISO 22514-2, from memory): Ck ≤ C, equality exactly for a centred mean.
    usl = lsl + width
    cap = capability(mean=mean, sigma=sigma, lsl=lsl, usl=usl)
    assert cap.c is not None
    assert cap.ck is not None
    assert cap.ck <= cap.c + 1e-9 * abs(cap.c)
    centred = capability(mean=(lsl + usl) / 2, sigma=sigma, lsl=lsl, usl=usl)
    assert centred.ck == pytest.approx(centred.c, rel=1e-9)


def test_two_pass_std_keeps_digits_on_a_large_offset() -> None:
    values = [1e9 + v for v in (0.1, 0.2, 0.3, 0.4)]
    _, s = sample_mean_std(values)
    assert s == pytest.approx(statistics.stdev([0.1, 0.2, 0.3, 0.4]), rel=1e-6)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"mean": 1.0, "sigma": -0.1, "lsl": 0.0, "usl": 2.0}, "sigma"),
        ({"mean": 1.0, "sigma": 0.1, "lsl": 2.0, "usl": 2.0}, "below"),
        ({"mean": math.nan, "sigma": 0.1, "lsl": 0.0, "usl": 2.0}, "finite"),
        ({"mean": 1.0, "sigma": math.inf, "lsl": 0.0, "usl": 2.0}, "finite"),
    ],
)
def test_bad_input_is_a_typed_error(kwargs: dict[str, float], match: str) -> None:
    with pytest.raises(CapabilityError, match=match):
        capability(**kwargs)


def test_degenerate_cases_give_none_not_infinity() -> None:
    assert capability(mean=1.0, sigma=0.0, lsl=0.0, usl=2.0).c is None
    none = capability(mean=1.0, sigma=0.5, lsl=None, usl=None)
    assert (none.c, none.ck) == (None, None)
    with pytest.raises(CapabilityError, match="two values"):
        sample_mean_std([1.0])
    with pytest.raises(CapabilityError, match="finite"):
        sample_mean_std([1.0, math.nan])

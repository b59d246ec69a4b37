"""X̄–R chart constants and limits against the published table, a worked example and scipy.

Sources beside each check:
- The table of control-chart factors A2, D3, D4, d2, d3 for n = 2..10: ASTM MNL 7, "Manual on
  Presentation of Data and Control Chart Analysis", and Montgomery, "Introduction to
  Statistical Quality Control", Appendix VI (typed here from memory, as printed: 3 decimals).
- Independent of that table: d2 = E[range] and d3 = SD[range] of n standard normal values by
  numerical integration with scipy (the range distribution
  F_W(w) = n ∫ φ(x) [Φ(x + w) − Φ(x)]^(n−1) dx, textbook order statistics), and the
  definitions A2 = 3/(d2√n), D3 = max(0, 1 − 3 d3/d2), D4 = 1 + 3 d3/d2.
- Montgomery, Example 6.1 (piston-ring inside diameter, 25 subgroups of 5; from memory):
  x̿ = 74.001, R̄ = 0.023 → X̄ chart 73.988 / 74.014, R chart 0 / 0.049.
- A seeded data set against the same limits computed directly with numpy.
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt
import pytest
from scipy import integrate
from scipy import stats as sps

from clampd.daemon.quality import (
    SHEWHART,
    ChartError,
    shewhart,
    subgroup_stats,
    xbar_r_limits,
    xbar_r_limits_from_summary,
)

# ASTM MNL 7 / Montgomery Appendix VI, from memory: n: (A2, D3, D4, d2, d3).
PUBLISHED = {
    2: (1.880, 0.0, 3.267, 1.128, 0.853),
    3: (1.023, 0.0, 2.574, 1.693, 0.888),
    4: (0.729, 0.0, 2.282, 2.059, 0.880),
    5: (0.577, 0.0, 2.114, 2.326, 0.864),
    6: (0.483, 0.0, 2.004, 2.534, 0.848),
    7: (0.419, 0.076, 1.924, 2.704, 0.833),
    8: (0.373, 0.136, 1.864, 2.847, 0.820),
    9: (0.337, 0.184, 1.816, 2.970, 0.808),
    10: (0.308, 0.223, 1.777, 3.078, 0.797),
}


def _range_moments(n: int) -> tuple[float, float]:
    """(d2, d3) by integrating the distribution of the range of n standard normals."""
    x = np.linspace(-9.0, 9.0, 1801)
    w = np.linspace(0.0, 14.0, 1401)
    phi = sps.norm.pdf(x)
    big_phi = sps.norm.cdf(x)
    shifted = sps.norm.cdf(x[None, :] + w[:, None])
    cdf: npt.NDArray[np.float64] = n * integrate.simpson(
        phi[None, :] * (shifted - big_phi[None, :]) ** (n - 1), x=x, axis=1
    )
    mean = float(integrate.simpson(1.0 - cdf, x=w))
    second = float(integrate.simpson(2.0 * w * (1.0 - cdf), x=w))
    return mean, math.sqrt(second - mean**2)


def test_table_matches_the_published_values() -> None:
    assert sorted(SHEWHART) == list(range(2, 11))
    for n, (a2, d3_, d4, d2, d3) in PUBLISHED.items():
        k = shewhart(n)
        assert (k.n, k.A2, k.D3, k.D4, k.d2, k.d3) == (n, a2, d3_, d4, d2, d3)


@pytest.mark.parametrize("n", range(2, 11))
def test_table_matches_an_independent_integration(n: int) -> None:
    d2, d3 = _range_moments(n)
    # d2 a second way: E[W] = ∫ 1 − Φ(x)^n − (1 − Φ(x))^n dx (scipy quad).
    d2_quad = integrate.quad(
        lambda t: 1.0 - sps.norm.cdf(t) ** n - sps.norm.sf(t) ** n, -np.inf, np.inf
    )[0]
    assert d2 == pytest.approx(d2_quad, abs=1e-6)
    k = shewhart(n)
    half_unit = 0.0005 + 1e-9  # table values are rounded to 3 decimals
    assert abs(k.d2 - d2) <= half_unit
    assert abs(k.d3 - d3) <= half_unit
    assert abs(k.A2 - 3.0 / (d2 * math.sqrt(n))) <= half_unit
    assert abs(k.D3 - max(0.0, 1.0 - 3.0 * d3 / d2)) <= half_unit
    # D4 is printed from rounded d2, d3 in some tables: allow one more unit in the last place.
    assert abs(k.D4 - (1.0 + 3.0 * d3 / d2)) <= 2 * half_unit


def test_piston_ring_limits_from_montgomery() -> None:
    lim = xbar_r_limits_from_summary(grand_mean=74.001, mean_range=0.023, n=5, subgroups=25)
    assert round(lim.xbar_ucl, 3) == 74.014
    assert round(lim.xbar_lcl, 3) == 73.988
    assert round(lim.range_ucl, 3) == 0.049
    assert lim.range_lcl == 0.0
    assert lim.sigma_within == pytest.approx(0.023 / 2.326)
    assert lim.sigma_xbar == pytest.approx(0.577 * 0.023 / 3)


def test_limits_of_a_seeded_data_set_agree_with_numpy() -> None:
    rng = np.random.default_rng(7)
    for n in (2, 5, 8):
        data = 30.0 + 0.4 * rng.standard_normal((25, n))  # invented angles, degrees
        lim = xbar_r_limits(data.tolist())
        grand = float(data.mean(axis=1).mean())
        rbar = float(np.ptp(data, axis=1).mean())
        a2, d3_, d4, _, _ = PUBLISHED[n]
        assert lim.subgroups == 25
        assert lim.xbar_center == pytest.approx(grand, rel=1e-14)
        assert lim.range_center == pytest.approx(rbar, rel=1e-12)
        assert lim.xbar_ucl == pytest.approx(grand + a2 * rbar, rel=1e-12)
        assert lim.xbar_lcl == pytest.approx(grand - a2 * rbar, rel=1e-12)
        assert lim.range_ucl == pytest.approx(d4 * rbar, rel=1e-12)
        assert lim.range_lcl == pytest.approx(d3_ * rbar, rel=1e-12)


def test_subgroup_stats() -> None:
    mean, rng = subgroup_stats([47.1, 48.0, 47.4])
    assert mean == pytest.approx(47.5)
    assert rng == pytest.approx(0.9)


@pytest.mark.parametrize(
    ("groups", "match"),
    [
        ([], "at least one"),
        ([[1.0]], r"2\.\.10"),
        ([[1.0] * 11], r"2\.\.10"),
        ([[1.0, 2.0], [1.0, 2.0, 3.0]], "same size"),
        ([[1.0, math.nan]], "finite"),
    ],
)
def test_bad_subgroups_are_a_typed_error(groups: list[list[float]], match: str) -> None:
    with pytest.raises(ChartError, match=match):
        xbar_r_limits(groups)


def test_bad_summary_is_a_typed_error() -> None:
    with pytest.raises(ChartError, match="range"):
        xbar_r_limits_from_summary(grand_mean=1.0, mean_range=-0.1, n=5)
    with pytest.raises(ChartError, match=r"2\.\.10"):
        shewhart(1)

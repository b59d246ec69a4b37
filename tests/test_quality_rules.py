"""Nelson's eight tests: each fires alone on a sequence built to break exactly it, and each
fires at the rate probability theory gives for independent normal points.

Sources beside each check:
- The tests: L. S. Nelson, "The Shewhart Control Chart — Tests for Special Causes", J. Quality
  Technology 16(4), 1984 (from memory).
- Firing rates: exact per-point probabilities for independent standard normal points, with the
  normal tail from scipy.stats.norm; all orderings of continuous iid values equally likely
  (test 3: 2/6!), and the probability that 14 such values alternate, 2·E₁₄/14! with the Euler
  zigzag number E₁₄ = 199 360 981 (OEIS A000111, from memory).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats as sps

from clampd.daemon.quality import RunTest, fired_at, scan

# A background that breaks none of the tests (checked below).
QUIET = [0.5, 1.5, -0.5, -1.5, 0.2] * 3

BREAKS = {
    RunTest.BEYOND_3_SIGMA: [3.5],
    RunTest.NINE_SAME_SIDE: [0.5, 0.6, 0.3, 0.4, 0.2, 0.7, 0.8, 0.3, 0.5],
    RunTest.SIX_TRENDING: [-0.9, -0.5, -0.1, 0.3, 0.7, 0.9],
    RunTest.FOURTEEN_ALTERNATING: [
        1.2, -0.3, 0.8, -1.2, 0.4, -0.6, 1.3, -0.2, 0.5, -1.1, 0.9, -0.4, 1.1, -0.7,
    ],
    RunTest.TWO_OF_THREE_BEYOND_2_SIGMA: [2.5, 0.3, 2.4],
    RunTest.FOUR_OF_FIVE_BEYOND_1_SIGMA: [1.5, 1.2, 0.5, 1.8, 1.3],
    RunTest.FIFTEEN_WITHIN_1_SIGMA: [
        0.5, -0.3, -0.6, 0.4, 0.2, -0.5, -0.2, 0.6, 0.3, -0.4, -0.7, 0.1, 0.5, -0.1, -0.3,
    ],
    RunTest.EIGHT_OUTSIDE_1_SIGMA: [1.5, 1.2, -1.3, -1.6, 1.4, 1.1, -1.2, -1.5],
}  # fmt: skip


def test_the_background_is_quiet() -> None:
    assert not any(scan(QUIET))
    assert fired_at([]) == frozenset()


@pytest.mark.parametrize("test", list(RunTest), ids=lambda t: t.name)
def test_each_test_fires_alone_on_its_own_pattern(test: RunTest) -> None:
    sequence = QUIET + BREAKS[test] + QUIET
    fired = scan(sequence)
    assert set().union(*fired) == {test}
    # It fires where the pattern is completed, not before.
    first = next(i for i, f in enumerate(fired) if f)
    assert first == len(QUIET) + len(BREAKS[test]) - 1 or test in {
        RunTest.NINE_SAME_SIDE,  # the background's own positive points extend the run
        RunTest.FIFTEEN_WITHIN_1_SIGMA,
        RunTest.FOURTEEN_ALTERNATING,
    }
    assert first >= len(QUIET)


def test_mirrored_patterns_fire_the_same_tests() -> None:
    for test, pattern in BREAKS.items():
        mirrored = [-v for v in QUIET + pattern + QUIET]
        assert set().union(*scan(mirrored)) == {test}


def test_a_point_on_the_centre_line_breaks_a_run() -> None:
    assert RunTest.NINE_SAME_SIDE in fired_at([0.1] * 9)
    assert RunTest.NINE_SAME_SIDE not in fired_at([0.1] * 4 + [0.0] + [0.1] * 4)


def test_zone_tests_fire_only_when_the_last_point_is_in_the_zone() -> None:
    assert RunTest.TWO_OF_THREE_BEYOND_2_SIGMA in fired_at([2.5, 0.1, 2.1])
    assert RunTest.TWO_OF_THREE_BEYOND_2_SIGMA not in fired_at([2.5, 2.1, 0.1])
    assert RunTest.TWO_OF_THREE_BEYOND_2_SIGMA not in fired_at([2.5, 0.1, -2.1])


def _expected_rates() -> dict[RunTest, tuple[float, int]]:
    """(probability that the test fires at a point, points before it can fire)."""
    q1, q2, q3 = sps.norm.sf(1.0), sps.norm.sf(2.0), sps.norm.sf(3.0)
    zigzag_14 = 199_360_981  # OEIS A000111, from memory
    return {
        RunTest.BEYOND_3_SIGMA: (2 * q3, 0),
        RunTest.NINE_SAME_SIDE: (2 * 0.5**9, 8),
        RunTest.SIX_TRENDING: (2 / math.factorial(6), 5),
        RunTest.FOURTEEN_ALTERNATING: (2 * zigzag_14 / math.factorial(14), 13),
        # last point beyond +2 and at least one of the two before it too; both sides
        RunTest.TWO_OF_THREE_BEYOND_2_SIGMA: (2 * q2 * (1 - (1 - q2) ** 2), 2),
        # last point beyond +1 and at least three of the four before it too; both sides
        RunTest.FOUR_OF_FIVE_BEYOND_1_SIGMA: (
            2 * q1 * (4 * q1**3 * (1 - q1) + q1**4),
            4,
        ),
        RunTest.FIFTEEN_WITHIN_1_SIGMA: ((1 - 2 * q1) ** 15, 14),
        RunTest.EIGHT_OUTSIDE_1_SIGMA: ((2 * q1) ** 8 - 2 * q1**8, 7),
    }


@pytest.mark.slow
def test_firing_rates_match_probability_theory() -> None:
    n = 200_000
    z = np.random.default_rng(1984).standard_normal(n).tolist()
    fired = scan(z)
    for test, (p, warmup) in _expected_rates().items():
        expected = p * (n - warmup)
        observed = sum(test in f for f in fired)
        # Overlapping windows fire in clusters, which inflates the variance of the count
        # over the binomial one; a factor 3 covers the longest clusters seen here.
        tolerance = 5 * math.sqrt(3 * expected)
        assert abs(observed - expected) <= tolerance, (test, observed, expected)

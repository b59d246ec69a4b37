"""Run rules for an X̄ chart: Nelson's eight tests for special causes.

Source: L. S. Nelson, "The Shewhart Control Chart — Tests for Special Causes", Journal of
Quality Technology 16(4), 1984, pp. 237–239 (from memory). Tests 1, 5, 6 and the run test are
the Western Electric zone rules (Statistical Quality Control Handbook, 1956) with Nelson's
run length of nine; tests 3, 4, 7 and 8 are his additions. With the chart's centre c and the
standard deviation of a plotted point σ (for X̄: σ̂/√n = A2 R̄/3), each point is a z-score
z = (x − c)/σ and the zones are |z| < 1 (C), 1–2 (B), 2–3 (A):

1. one point beyond 3σ;
2. nine points in a row on the same side of the centre line;
3. six points in a row steadily increasing or steadily decreasing (five rises or five falls);
4. fourteen points in a row alternating up and down;
5. two out of three points in a row beyond 2σ on the same side;
6. four out of five points in a row beyond 1σ on the same side;
7. fifteen points in a row within 1σ, on either side (stratification: limits too wide);
8. eight points in a row beyond 1σ on either side, none within 1σ (a mixture).

A test "fires at" the point that completes its pattern. Tests 5 and 6 fire only when that
last point is itself one of the points beyond the zone, so one pattern is reported where it
is completed, not again while it slides out of the window. A point exactly on the centre line
belongs to neither side and breaks a run (test 2), as does a tie between neighbours (tests 3,
4): common practice, no source.

False alarms (normal, independent points, known parameters): test 1 fires with probability
2·(1 − Φ(3)) ≈ 0.0027 per point, an average run length of about 370 points; adding tests
raises the rate (for the four Western Electric rules together the in-control ARL is about 92,
Champ & Woodall, Technometrics 1987, from memory). Which tests raise an alarm is the
tracker's choice; see ``clampd.daemon.quality._tracker``.
"""

from __future__ import annotations

import enum
import itertools
from collections.abc import Sequence

__all__ = ["RunTest", "fired_at", "scan"]

# The longest test (7) looks at 15 points.
_LOOKBACK = 15


class RunTest(enum.IntEnum):
    """Nelson's tests, numbered as he numbered them."""

    BEYOND_3_SIGMA = 1
    NINE_SAME_SIDE = 2
    SIX_TRENDING = 3
    FOURTEEN_ALTERNATING = 4
    TWO_OF_THREE_BEYOND_2_SIGMA = 5
    FOUR_OF_FIVE_BEYOND_1_SIGMA = 6
    FIFTEEN_WITHIN_1_SIGMA = 7
    EIGHT_OUTSIDE_1_SIGMA = 8

    @property
    def text(self) -> str:
        """A short description for an alarm text or a chart legend."""
        return _TEXT[self]


_TEXT = {
    RunTest.BEYOND_3_SIGMA: "one point beyond 3 sigma",
    RunTest.NINE_SAME_SIDE: "nine points in a row on one side of the centre line",
    RunTest.SIX_TRENDING: "six points in a row steadily rising or falling",
    RunTest.FOURTEEN_ALTERNATING: "fourteen points in a row alternating up and down",
    RunTest.TWO_OF_THREE_BEYOND_2_SIGMA: "two of three points beyond 2 sigma on one side",
    RunTest.FOUR_OF_FIVE_BEYOND_1_SIGMA: "four of five points beyond 1 sigma on one side",
    RunTest.FIFTEEN_WITHIN_1_SIGMA: "fifteen points in a row within 1 sigma",
    RunTest.EIGHT_OUTSIDE_1_SIGMA: "eight points in a row beyond 1 sigma on both sides",
}


def _sign(x: float) -> int:
    return 1 if x > 0 else (-1 if x < 0 else 0)


def _k_of_last_m_beyond(z: Sequence[float], k: int, m: int, limit: float) -> bool:
    last = z[-1]
    side = _sign(last)
    if side == 0 or abs(last) <= limit or len(z) < k:
        return False
    tail = z[-m:]
    return sum(1 for v in tail if _sign(v) == side and abs(v) > limit) >= k


def fired_at(z: Sequence[float]) -> frozenset[RunTest]:
    """Tests that fire at the last point of ``z`` (z-scores, oldest first).

    Pure and cheap (looks back at most 15 points), so a tracker can call it once per new point.
    An empty sequence fires nothing. The caller guarantees finite values.
    """
    if not z:
        return frozenset()
    z = [float(v) for v in z[-_LOOKBACK:]]  # numpy-safe, and no test looks further back
    fired: set[RunTest] = set()
    last = z[-1]
    if abs(last) > 3.0:
        fired.add(RunTest.BEYOND_3_SIGMA)
    if len(z) >= 9 and _sign(last) != 0 and all(_sign(v) == _sign(last) for v in z[-9:]):
        fired.add(RunTest.NINE_SAME_SIDE)
    if len(z) >= 6:
        steps = [b - a for a, b in itertools.pairwise(z[-6:])]
        if all(s > 0 for s in steps) or all(s < 0 for s in steps):
            fired.add(RunTest.SIX_TRENDING)
    if len(z) >= 14:
        steps = [b - a for a, b in itertools.pairwise(z[-14:])]
        if all(s != 0 for s in steps) and all(
            _sign(a) == -_sign(b) for a, b in itertools.pairwise(steps)
        ):
            fired.add(RunTest.FOURTEEN_ALTERNATING)
    if _k_of_last_m_beyond(z, 2, 3, 2.0):
        fired.add(RunTest.TWO_OF_THREE_BEYOND_2_SIGMA)
    if _k_of_last_m_beyond(z, 4, 5, 1.0):
        fired.add(RunTest.FOUR_OF_FIVE_BEYOND_1_SIGMA)
    if len(z) >= 15 and all(abs(v) < 1.0 for v in z[-15:]):
        fired.add(RunTest.FIFTEEN_WITHIN_1_SIGMA)
    if len(z) >= 8:
        tail = z[-8:]
        if all(abs(v) > 1.0 for v in tail) and {_sign(v) for v in tail} == {-1, 1}:
            fired.add(RunTest.EIGHT_OUTSIDE_1_SIGMA)
    return frozenset(fired)


def scan(z: Sequence[float]) -> list[frozenset[RunTest]]:
    """``fired_at`` for every prefix: what fired at each point of a whole chart."""
    return [fired_at(z[max(0, i + 1 - _LOOKBACK) : i + 1]) for i in range(len(z))]

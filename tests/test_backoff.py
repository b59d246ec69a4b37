"""Reconnection back-off: capped exponential with full jitter.

Reference: Marc Brooker, "Exponential Backoff And Jitter", AWS Architecture Blog, 2015 —
full jitter is ``sleep = random_between(0, min(cap, base * 2 ** attempt))``.
"""

from __future__ import annotations

import itertools
import random
import statistics

import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy import stats

from clampd.daemon.runtime import next_delay


@given(
    attempt=st.integers(min_value=0, max_value=10_000),
    seed=st.integers(min_value=0, max_value=2**32),
    base=st.floats(min_value=0.01, max_value=5.0),
    extra=st.floats(min_value=0.0, max_value=100.0),
)
def test_delay_always_within_zero_and_the_capped_exponential(
    attempt: int, seed: int, base: float, extra: float
) -> None:
    # Bound from the article's formula: 0 <= sleep <= min(cap, base * 2**attempt).
    cap = base + extra
    delay = next_delay(attempt, random.Random(seed), base_s=base, cap_s=cap)
    ceiling = cap if attempt > 60 else min(cap, base * 2.0**attempt)
    assert 0.0 <= delay <= ceiling


def test_same_seed_gives_the_same_sequence() -> None:
    a = [next_delay(i, random.Random(7)) for i in range(20)]
    b = [next_delay(i, random.Random(7)) for i in range(20)]
    assert a == b


def test_upper_bound_grows_then_stays_at_the_cap() -> None:
    # The largest of many draws approaches each attempt's ceiling: 0.5, 1, 2, 4, ... 30.
    rng = random.Random(2015)
    maxima = [max(next_delay(i, rng) for _ in range(2000)) for i in range(12)]
    for earlier, later in itertools.pairwise(maxima):
        assert later >= earlier * 0.99 or later > 29.0
    assert maxima[0] <= 0.5
    assert 29.0 < maxima[-1] <= 30.0
    assert all(m <= 30.0 for m in maxima)


def test_capped_draws_are_uniform_on_zero_to_cap() -> None:
    # Full jitter means the whole interval is used evenly once the cap is reached:
    # Kolmogorov-Smirnov against U(0, 30) (scipy.stats.kstest) must not reject it.
    rng = random.Random(42)
    draws = [next_delay(20, rng) for _ in range(5000)]
    result = stats.kstest(draws, stats.uniform(loc=0.0, scale=30.0).cdf)
    assert result.pvalue > 0.001
    # Mean of U(0, 30) is 15 (textbook); 5000 draws put the sample mean within ±0.5.
    assert statistics.fmean(draws) == pytest.approx(15.0, abs=0.5)


def test_huge_attempt_numbers_do_not_overflow() -> None:
    assert 0.0 <= next_delay(10**9, random.Random(1)) <= 30.0


@pytest.mark.parametrize(
    ("attempt", "base", "cap"), [(-1, 0.5, 30.0), (0, 0.0, 30.0), (0, 1.0, 0.5)]
)
def test_misuse_is_a_value_error(attempt: int, base: float, cap: float) -> None:
    with pytest.raises(ValueError, match="must be"):
        next_delay(attempt, random.Random(0), base_s=base, cap_s=cap)

"""LTTB downsampling of curves (issue 2, part 5).

Reference: S. Steinarsson, "Downsampling Time Series for Visual Representation", MSc thesis,
University of Iceland, 2013, §4 (Largest-Triangle-Three-Buckets). ``_reference_lttb`` below is a
plain, loop-by-loop rendering of that algorithm, written independently of the numpy code
under test: first and last point kept, the points between split into ``threshold - 2`` buckets
of fractional size, and in each bucket the point forming the largest triangle with the last
kept point and the average of the next bucket is kept (the first such point on ties).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from clampd.protocol import Curve, DownsampleError, lttb_indices, take


def _reference_lttb(xs: list[float], ys: list[float], threshold: int) -> list[int]:
    n = len(xs)
    if threshold >= n or threshold == 0:
        return list(range(n))
    every = (n - 2) / (threshold - 2)
    a = 0
    sampled = [0]
    for i in range(threshold - 2):
        avg_start = math.floor((i + 1) * every) + 1
        avg_end = min(math.floor((i + 2) * every) + 1, n)
        avg_len = avg_end - avg_start
        avg_x = 0.0
        avg_y = 0.0
        for j in range(avg_start, avg_end):
            avg_x += xs[j]
            avg_y += ys[j]
        avg_x /= avg_len
        avg_y /= avg_len
        range_offs = math.floor(i * every) + 1
        range_to = math.floor((i + 1) * every) + 1
        ax, ay = xs[a], ys[a]
        max_area = -1.0
        next_a = range_offs
        for j in range(range_offs, range_to):
            area = abs((ax - avg_x) * (ys[j] - ay) - (ax - xs[j]) * (avg_y - ay)) * 0.5
            if area > max_area:
                max_area = area
                next_a = j
        sampled.append(next_a)
        a = next_a
    sampled.append(n - 1)
    return sampled


# Integer-valued coordinates keep every sum and product exact in binary floating point, so the
# numpy code (pairwise summation) and the plain loops must agree index for index, ties included.
_int_points = st.integers(min_value=3, max_value=400).flatmap(
    lambda n: st.tuples(
        st.lists(st.integers(-1000, 1000), min_size=n, max_size=n),
        st.lists(st.integers(-1000, 1000), min_size=n, max_size=n),
    )
)


@settings(max_examples=300, deadline=None)
@given(points=_int_points, n_out=st.integers(min_value=3, max_value=120))
def test_agrees_with_the_thesis_algorithm_on_exact_data(
    points: tuple[list[int], list[int]], n_out: int
) -> None:
    xs = [float(v) for v in points[0]]
    ys = [float(v) for v in points[1]]
    assert lttb_indices(xs, ys, n_out).tolist() == _reference_lttb(xs, ys, n_out)


@pytest.mark.parametrize("seed", range(20))
def test_agrees_with_the_thesis_algorithm_on_a_noisy_rundown(seed: int) -> None:
    """Real-valued data shaped like a rundown: ties are improbable, so indices must agree."""
    rng = np.random.default_rng(seed)
    n = int(rng.integers(300, 3000))
    angle = np.cumsum(rng.uniform(0.0, 0.1, n))
    torque = np.where(angle < angle[n // 2], 1.0, 1.0 + 2.0 * (angle - angle[n // 2]))
    torque = torque + rng.normal(0.0, 0.05, n)
    n_out = int(rng.integers(3, 300))
    got = lttb_indices(angle, torque, n_out).tolist()
    assert got == _reference_lttb(angle.tolist(), torque.tolist(), n_out)


@settings(max_examples=200, deadline=None)
@given(
    ys=st.lists(st.floats(-1e6, 1e6, allow_nan=False), min_size=0, max_size=500),
    n_out=st.integers(min_value=2, max_value=300),
)
def test_bounded_count_endpoints_kept_strictly_increasing(ys: list[float], n_out: int) -> None:
    xs = [float(i) for i in range(len(ys))]
    idx = lttb_indices(xs, ys, n_out)
    assert len(idx) == min(len(ys), n_out)
    if ys:
        assert idx[0] == 0
        assert idx[-1] == len(ys) - 1
    assert all(b > a for a, b in zip(idx.tolist(), idx.tolist()[1:], strict=False))


@settings(max_examples=100, deadline=None)
@given(points=_int_points, n_out=st.integers(min_value=3, max_value=60))
def test_choice_does_not_depend_on_units(points: tuple[list[int], list[int]], n_out: int) -> None:
    """Scaling an axis scales every triangle in a bucket alike (factor 4 is exact in binary)."""
    xs = np.array(points[0], dtype=float)
    ys = np.array(points[1], dtype=float)
    base = lttb_indices(xs, ys, n_out).tolist()
    assert lttb_indices(xs * 4.0, ys, n_out).tolist() == base
    assert lttb_indices(xs, ys * 0.25, n_out).tolist() == base


def test_a_short_peak_survives_where_decimation_loses_it() -> None:
    """The point of LTTB (thesis §1): a one-sample extreme stays visible after downsampling."""
    n = 10_000
    x = np.arange(n, dtype=float)
    y = np.zeros(n)
    y[4_321] = 50.0  # e.g. the peak torque of an over-torque event
    idx = lttb_indices(x, y, 100)
    assert 4_321 in idx.tolist()
    assert 4_321 not in range(0, n, n // 100)  # plain decimation would have dropped it


def test_take_carries_extra_columns_along() -> None:
    t = np.arange(1000) / 1000.0
    angle = np.linspace(-20.0, 30.0, 1000)
    torque = np.sqrt(np.abs(angle))
    idx = lttb_indices(angle, torque, 50)
    picked_t, picked_a = take(idx, t, angle)
    assert picked_t == [i / 1000.0 for i in idx.tolist()]
    assert picked_a == angle[idx].tolist()


def test_curve_from_samples_keeps_time_with_its_points() -> None:
    fs = 1000.0
    n = 1851
    t = np.arange(n) / fs
    angle = np.linspace(-44.0, 30.0, n)
    torque = np.maximum(1.0, 10.0 + 1.25 * angle)
    curve = Curve.from_samples(t, angle, torque, max_points=256)
    assert curve.method == "lttb"
    assert curve.raw_sample_count == n
    assert len(curve.t_s) == 256
    expected = lttb_indices(angle, torque, 256)
    assert curve.t_s == (expected / fs).tolist()
    assert curve.torque_nm[-1] == torque[-1]
    short = Curve.from_samples(t[:100], angle[:100], torque[:100])
    assert short.method == "none"
    assert len(short.t_s) == 100


@pytest.mark.parametrize(
    ("x", "y", "n_out", "message"),
    [
        ([0.0, 1.0, 2.0], [0.0, 1.0], 2, "x has 3 points but y has 2"),
        ([0.0, float("nan"), 2.0], [0.0, 1.0, 2.0], 2, "NaN or infinite"),
        ([0.0, 1.0, 2.0], [0.0, float("inf"), 2.0], 2, "NaN or infinite"),
        ([0.0, 1.0, 2.0], [0.0, 1.0, 2.0], 1, "at least 2"),
    ],
)
def test_bad_columns_raise_a_typed_error(
    x: list[float], y: list[float], n_out: int, message: str
) -> None:
    with pytest.raises(DownsampleError, match=message):
        lttb_indices(x, y, n_out)


def test_two_points_out_are_the_endpoints() -> None:
    assert lttb_indices([0.0, 5.0, 1.0, 2.0], [0.0, 9.0, 1.0, 2.0], 2).tolist() == [0, 3]


@pytest.mark.parametrize(
    ("columns", "max_points", "message"),
    [
        (([0.0, 1.0], [0.0, 1.0], [0.0]), 256, "same length"),
        (([0.0, 1.0], [0.0, 1.0], [0.0, 1.0]), 1, "max_points"),
        (([0.0, 1.0], [0.0, 1.0], [0.0, 1.0]), 5000, "max_points"),
    ],
)
def test_curve_from_bad_samples_raises_a_typed_error(
    columns: tuple[list[float], list[float], list[float]], max_points: int, message: str
) -> None:
    with pytest.raises(DownsampleError, match=message):
        Curve.from_samples(*columns, max_points=max_points)

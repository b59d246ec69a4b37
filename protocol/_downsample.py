"""Largest-triangle-three-buckets (LTTB) downsampling of a torque-angle-time curve.

A rundown sampled at 1–4 kHz holds thousands of points; an MES stores and draws a few hundred.
Plain decimation (every k-th point) can miss the short features that matter on a tightening
curve — the snug knee, the yield knee and the final peak. LTTB (S. Steinarsson, "Downsampling
Time Series for Visual Representation", MSc thesis, University of Iceland, 2013) keeps the point
in each bucket that spans the largest triangle with the point kept in the previous bucket and the
mean of the next bucket, so visual extremes survive.

Invariants (tested against a plain rendering of the thesis' algorithm):
- the first and the last point are always kept;
- at most ``n_out`` indices are returned, strictly increasing;
- when the input already has ``n_out`` points or fewer, every index is returned.

The choice in each bucket depends on the previous choice, so the loop over buckets stays in
Python; the work inside a bucket (areas, argmax, the next bucket's mean) is numpy. Because
scaling an axis scales every candidate triangle in a bucket by the same factor, the chosen
indices do not depend on the units of x or y.

Only indices are returned, so any number of extra columns (time, rate, flags) can be carried
along with :func:`take`.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import numpy.typing as npt

__all__ = ["DownsampleError", "lttb_indices", "take"]

FloatArray = npt.NDArray[np.float64]
IndexArray = npt.NDArray[np.intp]


class DownsampleError(ValueError):
    """The caller passed columns that cannot be downsampled (lengths differ, NaN, n_out < 2)."""


def _as_column(values: Sequence[float] | FloatArray, name: str) -> FloatArray:
    arr = np.asarray(values, dtype=np.float64)
    if arr.ndim != 1:
        raise DownsampleError(f"{name} must be one-dimensional, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise DownsampleError(f"{name} holds NaN or infinite values")
    return arr


def lttb_indices(
    x: Sequence[float] | FloatArray, y: Sequence[float] | FloatArray, n_out: int
) -> IndexArray:
    """Return the indices of the points LTTB keeps from ``(x, y)``, at most ``n_out`` of them.

    ``x`` need not be monotonic (angle stands still during ratchet back-strokes); buckets are
    formed over sample order. Raises :class:`DownsampleError` (the caller's fault) when the
    columns differ in length, hold non-finite values, or ``n_out`` is below 2.
    """
    xs = _as_column(x, "x")
    ys = _as_column(y, "y")
    n = xs.shape[0]
    if ys.shape[0] != n:
        raise DownsampleError(f"x has {n} points but y has {ys.shape[0]}")
    if n_out < 2:
        raise DownsampleError(f"n_out must be at least 2 (first and last point), got {n_out}")
    if n <= n_out:
        return np.arange(n, dtype=np.intp)
    if n_out == 2:
        return np.array([0, n - 1], dtype=np.intp)

    # Bucket edges exactly as in the thesis: the first and last points are buckets of their own,
    # the n - 2 points between them are split into n_out - 2 buckets of (fractional) size `every`.
    # edges[i] is where bucket i starts; bucket i is edges[i]:edges[i+1]. Computed with the same
    # floating-point operations as the thesis' per-bucket formula, so the buckets are identical.
    every = (n - 2) / (n_out - 2)
    edges = np.minimum(np.floor(np.arange(n_out, dtype=np.float64) * every).astype(np.intp) + 1, n)
    # Mean of each "next bucket" (bucket i + 1; for the last inner bucket, the final point), all
    # at once: one reduceat instead of two sums per bucket inside the sequential loop below.
    # reduceat sums nxt_lo[j]:nxt_lo[j+1], and the last one to the end: exactly the next buckets.
    nxt_lo = edges[1 : n_out - 1]
    counts = edges[2:n_out] - nxt_lo
    avg_xs = np.add.reduceat(xs, nxt_lo) / counts
    avg_ys = np.add.reduceat(ys, nxt_lo) / counts
    out = np.empty(n_out, dtype=np.intp)
    out[0] = 0
    a = 0
    lo_list = edges.tolist()
    for i in range(n_out - 2):
        lo = lo_list[i]
        hi = lo_list[i + 1]
        avg_x = avg_xs[i]
        avg_y = avg_ys[i]
        ax = xs[a]
        ay = ys[a]
        # Twice the triangle area (a, b, avg); the factor 1/2 does not change the argmax.
        area = np.abs((ax - avg_x) * (ys[lo:hi] - ay) - (ax - xs[lo:hi]) * (avg_y - ay))
        a = lo + int(np.argmax(area))  # argmax keeps the first of equal areas, as the thesis
        out[i + 1] = a
    out[n_out - 1] = n - 1
    return out


def take(indices: IndexArray, *columns: Sequence[float] | FloatArray) -> tuple[list[float], ...]:
    """Pick ``indices`` from each column, as plain lists ready for a JSON payload."""
    picked: list[list[float]] = []
    for k, col in enumerate(columns):
        arr = np.asarray(col, dtype=np.float64)
        if arr.ndim != 1:
            raise DownsampleError(f"column {k} must be one-dimensional, got shape {arr.shape}")
        if indices.size and int(indices[-1]) >= arr.shape[0]:
            raise DownsampleError(f"column {k} has {arr.shape[0]} points, fewer than indexed")
        picked.append([float(v) for v in arr[indices]])
    return tuple(picked)

"""PNG figures of the studies, byte-stable for a given seed.

matplotlib is imported only here and only when a figure is asked for (it costs a noticeable
fraction of a second on a small board, and it is an optional extra). The Agg backend renders
without a display; the PNG's metadata is cleared of the software version so the same figures
give the same bytes on the same installation.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from clampd.simulators.studies._common import CAUTION, StudyError

if TYPE_CHECKING:
    from matplotlib.figure import Figure

__all__ = ["plot_angle", "plot_cues", "plot_preload"]

_SIZE_IN = (8.0, 5.0)
_DPI = 100


def _figure() -> Figure:
    try:
        # A bare Figure renders through Agg when saved as PNG; pyplot (and its global backend
        # state) is never touched.
        from matplotlib.figure import Figure
    except ImportError as exc:  # the optional extra "plot" is not installed
        raise StudyError(f"--plot needs matplotlib (pip install 'clampd[plot]'): {exc}") from None
    return Figure(figsize=_SIZE_IN, dpi=_DPI)


def _save(fig: Figure, path: Path) -> None:
    fig.text(0.01, 0.01, CAUTION, fontsize=6, color="0.35")
    try:
        fig.savefig(path, format="png", metadata={"Software": None})
    except OSError as exc:
        raise StudyError(f"cannot write {path}: {exc.strerror or exc}") from None


def plot_preload(
    path: Path, figures: Mapping[str, Any], preloads: Mapping[str, Sequence[float]]
) -> None:
    """Histogram of the achieved preload per strategy, αA in the legend."""
    fig = _figure()
    ax = fig.add_subplot()
    values = [v / 1000.0 for vs in preloads.values() for v in vs]
    lo, hi = (min(values), max(values)) if values else (0.0, 1.0)
    bins = [lo + (hi - lo) * i / 40.0 for i in range(41)] if hi > lo else 10
    for strategy, vs in preloads.items():
        f = figures[strategy]
        alpha = "—" if f["alpha_a"] is None else f"{f['alpha_a']:.2f}"
        vlo, vhi = f["vdi_alpha_a_range"]
        ax.hist(
            [v / 1000.0 for v in vs],
            bins=bins,
            alpha=0.55,
            label=f"{strategy}: αA {alpha} (VDI 2230: {vlo:g}–{vhi:g})",
        )
    ax.set_xlabel("preload after release, kN")
    ax.set_ylabel("joints")
    ax.set_title("Achieved preload per strategy (simulated M10 8.8, μ 0.08–0.16)")
    ax.legend(fontsize=8)
    _save(fig, path)


def plot_cues(path: Path, errors: Mapping[str, Sequence[float]]) -> None:
    """Histogram of the final-angle error per cue case, the ±3° goal band shaded."""
    fig = _figure()
    ax = fig.add_subplot()
    finite = [e for es in errors.values() for e in es if math.isfinite(e)]
    lo, hi = (min(finite), max(finite)) if finite else (-1.0, 1.0)
    bins = [lo + (hi - lo) * i / 50.0 for i in range(51)] if hi > lo else 10
    ax.axvspan(-3.0, 3.0, color="0.9", label="goal ±3°")
    for case, es in errors.items():
        ax.hist([e for e in es if math.isfinite(e)], bins=bins, alpha=0.5, label=case)
    ax.set_xlabel("final angle − target, degrees")
    ax.set_ylabel("rundowns")
    ax.set_title("Final angle error with and without predictive cueing")
    ax.legend(fontsize=8)
    _save(fig, path)


def plot_angle(path: Path, points: Mapping[str, Sequence[tuple[float, float]]]) -> None:
    """Counted-minus-true angle error against the true angle, one series per rate."""
    fig = _figure()
    ax = fig.add_subplot()
    trues = [t for ps in points.values() for t, _ in ps if math.isfinite(t)]
    top = max(trues) if trues else 1.0
    for case, ps in points.items():
        ax.plot([t for t, _ in ps], [e for _, e in ps], ".", markersize=3, label=case)
    ax.plot([0.0, top], [0.5, 0.5 + 0.005 * top], "k--", linewidth=0.8, label="±(0.5° + 0.5 %)")
    ax.plot([0.0, top], [-0.5, -0.5 - 0.005 * top], "k--", linewidth=0.8)
    ax.set_xlabel("true rotation from snug, degrees")
    ax.set_ylabel("counted − true, degrees")
    ax.set_title("Angle counting error by handle rate")
    ax.legend(fontsize=7, ncol=2)
    _save(fig, path)

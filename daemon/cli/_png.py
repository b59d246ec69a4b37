"""Checks before a command draws a PNG (``clampd plot --out``, ``clampd stats --plot``).

Both commands refuse a bad output path before they read the journal or import matplotlib, so
a typo costs nothing and nothing half-written is left behind; the checks and their wording
live here once.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

__all__ = ["png_output_problem"]


def png_output_problem(path: Path, option: str) -> str | None:
    """Why ``path`` (given as ``option``) cannot take a PNG, or None when it can."""
    if path.suffix.lower() != ".png":
        return f"{option} must name a .png file, got {path}"
    if not path.parent.is_dir():
        return f"{option}: directory {path.parent} does not exist"
    if importlib.util.find_spec("matplotlib") is None:
        return "plotting needs matplotlib (pip install 'clampd[plot]')"
    return None

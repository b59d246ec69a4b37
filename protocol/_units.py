"""Physical quantities at the edges: parse "20 ft*lbf", "240 in*lbf", "30 deg", "27 N*m".

Inside clampd every value is SI (N·m, degrees, seconds, metres); units exist only where a
person or a file writes a number. Parsing goes through pint so that the definitions are
exact (1 ft = 0.3048 m and 1 lbf = 0.45359237 kg · 9.80665 m/s², hence
1 ft·lbf = 1.3558179483314004 N·m), not a hand-kept conversion table.

A bare number is taken in the SI unit of its kind. Errors are ``UnitError`` (a
``ValueError``) naming the text and the expected dimension: always the caller's input.
"""

from __future__ import annotations

import enum
import functools
import math
import re
from typing import Any

__all__ = ["NM_PER_FT_LBF", "NM_PER_IN_LBF", "Kind", "UnitError", "format_torque", "parse_quantity"]

# Exact by definition of the international foot and the pound-force (NIST SP 811, B.8).
NM_PER_FT_LBF = 0.3048 * 0.45359237 * 9.80665
NM_PER_IN_LBF = NM_PER_FT_LBF / 12.0


class UnitError(ValueError):
    """A quantity could not be read, or has the wrong dimension for its field."""


class Kind(enum.Enum):
    """What a field holds, with the SI unit it is stored in."""

    TORQUE = "newton * meter"
    ANGLE = "degree"
    TIME = "second"
    LENGTH = "millimeter"
    FORCE = "newton"
    RATE = "degree / second"
    JOINT_RATE = "newton * meter / degree"
    STIFFNESS = "degree / (newton * meter)"
    PRESSURE = "gigapascal"


@functools.cache
def _registry() -> Any:
    import pint  # imported lazily: ~0.3 s, and only configs and the CLI need it

    ureg: Any = pint.UnitRegistry()
    return ureg


# Trade spellings pint reads differently ("Nm" would be a number-metre, "ftlb" femto-troy-pound);
# rewritten before parsing rather than redefined in the registry, which pint logs as a warning.
_TRADE_SPELLINGS = (
    (re.compile(r"\bN\.?m\b"), "N*m"),
    (re.compile(r"\bft\.?lbf?\b"), "ft*lbf"),
    (re.compile(r"\bin\.?lbf?\b"), "in*lbf"),
    (re.compile(r"\blbf?\.?ft\b"), "lbf*ft"),
    (re.compile(r"\blbf?\.?in\b"), "lbf*in"),
)


def parse_quantity(value: str | float | int, kind: Kind) -> float:
    """Return ``value`` in the SI unit of ``kind``; raise ``UnitError`` on bad input."""
    if isinstance(value, bool):
        raise UnitError(f"expected a {kind.name.lower()} quantity, got a boolean")
    if isinstance(value, int | float):
        result = float(value)
    else:
        text = value.strip().replace("·", "*").replace("°", " deg")
        for pattern, replacement in _TRADE_SPELLINGS:
            text = pattern.sub(replacement, text)
        if not text:
            raise UnitError(f"empty {kind.name.lower()} quantity")
        ureg = _registry()
        try:
            q = ureg.Quantity(text)
        except Exception as exc:  # pint raises several unrelated types on bad text
            raise UnitError(f"cannot read {value!r} as a {kind.name.lower()}: {exc}") from None
        if isinstance(q, int | float):
            result = float(q)
        else:
            try:
                result = float(q.to(kind.value).magnitude)
            except Exception:
                raise UnitError(
                    f"{value!r} is not a {kind.name.lower()} (expected units like {kind.value})"
                ) from None
    if not math.isfinite(result):
        raise UnitError(f"{value!r} is not a finite {kind.name.lower()}")
    return result


def format_torque(nm: float) -> str:
    """Show a torque in N·m with ft·lbf and in·lbf beside it, for people at the edges."""
    return f"{nm:.2f} N·m ({nm / NM_PER_FT_LBF:.2f} ft·lbf, {nm / NM_PER_IN_LBF:.1f} in·lbf)"

"""Reading a program file: the one engine module allowed to touch the file system.

Kept apart so the pure core (``_engine``, ``_machine`` ...) never imports it; the purity test
in tests/test_engine_purity.py checks both facts.
"""

from __future__ import annotations

from pathlib import Path

from clampd.daemon.engine._errors import ProgramError
from clampd.daemon.engine._program import Program, parse_program

__all__ = ["load_program"]


def load_program(path: str | Path) -> Program:
    """Read and validate a program file; unreadable or invalid files raise ``ProgramError``."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ProgramError([("(file)", f"cannot read {p}: {exc}")]) from None
    return parse_program(text)

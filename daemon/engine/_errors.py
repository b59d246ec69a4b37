"""Typed errors of the engine, each saying whose fault it is.

- :class:`EngineUsageError` — ours: the calling code asked for something the engine cannot do
  in its current state (it names the state and the input), or passed an invalid setting.
- :class:`SensorDataError` — the sensor's: samples that cannot be physical (time running
  backwards, NaN, arrays of different length). The frame is rejected whole and the engine's
  state is left exactly as it was, so nothing already accepted is lost.
- :class:`ProgramError` — the program author's: a program table that does not validate. It
  carries every problem with its field path (``program.step[1].target_angle``).
"""

from __future__ import annotations

__all__ = ["EngineError", "EngineUsageError", "ProgramError", "SensorDataError"]


class EngineError(Exception):
    """Base of every error the engine raises on purpose."""


class EngineUsageError(EngineError):
    """Misuse of the engine by the calling code (ours), e.g. an impossible (state, input) pair."""

    def __init__(self, message: str, *, state: str | None = None, input: str | None = None) -> None:
        super().__init__(message)
        self.state = state
        self.input = input


class SensorDataError(EngineError, ValueError):
    """Samples that cannot come from a working sensor; the frame was not consumed."""

    def __init__(self, message: str, *, index: int | None = None, field: str | None = None) -> None:
        super().__init__(message)
        self.index = index
        self.field = field


class ProgramError(EngineError, ValueError):
    """A program that does not validate; ``problems`` lists (field path, message) pairs."""

    def __init__(self, problems: list[tuple[str, str]] | tuple[tuple[str, str], ...]) -> None:
        self.problems: tuple[tuple[str, str], ...] = tuple(problems)
        super().__init__("; ".join(f"{path}: {msg}" for path, msg in self.problems))

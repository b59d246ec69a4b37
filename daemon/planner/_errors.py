"""The planner's one error type.

Every planner error is the caller's input (an unknown thread, a negative length, a
geometry that cannot exist); the planner has no peer and no I/O, so there is no "theirs".
The ``field`` names the offending input so a CLI or a config loader can point at it.
"""

from __future__ import annotations

__all__ = ["PlannerError"]


class PlannerError(ValueError):
    """Bad planner input; ``field`` names the input that is wrong."""

    def __init__(self, field: str, message: str) -> None:
        super().__init__(f"{field}: {message}")
        self.field = field
        self.message = message

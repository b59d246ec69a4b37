"""Reconnection delay: capped exponential back-off with full jitter.

Every reconnection loop in the runtime (BLE link to a wrench, MQTT session to the broker)
waits ``next_delay(attempt, rng)`` seconds before its next try. The delay is a pure function
of the attempt number and a random source so it can be tested with a seeded RNG and so
that no loop invents its own policy.

Policy ("full jitter", Marc Brooker, "Exponential Backoff And Jitter", AWS Architecture
Blog, 2015): ``sleep = uniform(0, min(cap, base * 2**attempt))``. Drawing the whole delay
at random, rather than adding a little jitter to a fixed exponential, spreads the retries
of many stations that lost the same broker at the same moment, so they do not reconnect
in lock-step and knock it over again; the article measured it as the variant with the
least total work among those it compared.

Invariants: the result is always in ``[0, cap_s]``; its upper bound never decreases with
the attempt number; the attempt number may grow without bound (no overflow).
"""

from __future__ import annotations

import random

__all__ = ["BASE_S", "CAP_S", "next_delay"]

# First retry within half a second: a BLE wrench that dropped because the technician
# walked past the edge of the radio range usually comes back at once (common practice,
# no source); a broker restart takes seconds, which the doubling reaches in a few steps.
BASE_S = 0.5
# Never wait longer than 30 s: a station that lost its broker for a long time should still
# reconnect within half a minute of it coming back (our own choice; the outbox keeps the
# results meanwhile, so a longer cap would only delay delivery).
CAP_S = 30.0


def next_delay(
    attempt: int, rng: random.Random, *, base_s: float = BASE_S, cap_s: float = CAP_S
) -> float:
    """Return the seconds to wait before reconnection attempt number ``attempt``.

    ``attempt`` counts failed attempts so far, starting at 0. Raises ``ValueError`` (the
    caller's misuse) for a negative attempt, a non-positive base or a cap below the base.
    """
    if attempt < 0:
        raise ValueError(f"attempt must be >= 0, got {attempt}")
    if not base_s > 0.0:
        raise ValueError(f"base_s must be > 0, got {base_s}")
    if not cap_s >= base_s:
        raise ValueError(f"cap_s must be >= base_s, got cap_s={cap_s} base_s={base_s}")
    # Compare exponents instead of computing 2**attempt, which overflows a float for large
    # attempt numbers (a station offline for days keeps counting).
    ceiling = cap_s if attempt >= 1024 else min(cap_s, base_s * 2.0**attempt)
    return rng.uniform(0.0, ceiling)

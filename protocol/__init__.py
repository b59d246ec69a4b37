"""Wire formats of clampd, free of I/O: the BLE wrench sensor profile, declarative
profiles for other sensors, the MQTT topic tree and payloads, and units at the edges.
"""

from clampd.protocol._units import (
    NM_PER_FT_LBF,
    NM_PER_IN_LBF,
    Kind,
    UnitError,
    format_torque,
    parse_quantity,
)

__all__ = [
    "NM_PER_FT_LBF",
    "NM_PER_IN_LBF",
    "Kind",
    "UnitError",
    "format_torque",
    "parse_quantity",
]
